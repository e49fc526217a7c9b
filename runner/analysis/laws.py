"""The detector laws a run can be analysed with, and what each makes of a straight-line fit.

Every law is a straight line V = a + b x in its own input quantity x, so one least-squares fit
(analysis/fit.py) serves all three:

- `log` (log amplifiers, RSSI): x is the level in dBm; b is the slope (V/dB), -a/b the intercept;
- `square` (a diode in its square-law region): x is the power in mW; b is the responsivity (V/mW),
  a the output offset (V);
- `linear` (an RMS detector with a linear output): x is the input's rms voltage into 50 ohm; b is
  the gain (V/V), a the offset (V).

The conformance error is, for every law, the input level the measured output implies through the
fitted law minus the level actually applied, in dB: a reading that implies no input at all (at or
below the fitted offset) has no error (None) and ends the range there. The dBm, mW and V rms
conversions are the usual 50-ohm ones (0 dBm = 1 mW = 223.6 mV rms, common practice).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from nightbench.analysis.gum import combine, coverage_factor, expand, rectangular, welch_satterthwaite

LAWS = ("log", "linear", "square")
REF_OHM = 50.0


def dbm_to_mw(dbm: Any) -> Any:
    return 10.0 ** (np.asarray(dbm, dtype=float) / 10.0)


def dbm_to_vrms(dbm: Any, ohms: float = REF_OHM) -> Any:
    """The rms voltage of a sine of `dbm` into `ohms` (P = V^2 / R)."""
    return np.sqrt(dbm_to_mw(dbm) * 1e-3 * ohms)


def _log10_or_nan(x: np.ndarray) -> np.ndarray:
    out = np.full(x.shape, np.nan)
    ok = x > 0
    out[ok] = np.log10(x[ok])
    return out


@dataclass(frozen=True)
class Law:
    name: str
    x_unit: str  # the input quantity the output is linear in
    param: str | None  # the field of b in its natural unit (None: slope_mv_per_db, for log)
    db_per_neper: float  # dB of input level per unit of ln(x): how an input-level error scales b

    def x(self, dbm: Any) -> np.ndarray:
        """The law's input quantity at these levels (dBm)."""
        dbm = np.asarray(dbm, dtype=float)
        if self.name == "square":
            return np.asarray(dbm_to_mw(dbm))
        if self.name == "linear":
            return np.asarray(dbm_to_vrms(dbm))
        return dbm

    def level_dbm(self, x: Any) -> np.ndarray:
        """The inverse of `x`: NaN where the quantity is not positive (no input implied)."""
        x = np.asarray(x, dtype=float)
        if self.name == "square":
            return 10.0 * _log10_or_nan(x)
        if self.name == "linear":
            return 10.0 * _log10_or_nan(x * x / REF_OHM / 1e-3)
        return x


LAW = {
    "log": Law("log", "dBm", None, 0.0),
    "square": Law("square", "mW", "responsivity_v_per_mw", 10.0 / math.log(10.0)),
    "linear": Law("linear", "V rms", "gain_v_per_v", 20.0 / math.log(10.0)),
}


def get_law(name: str) -> Law:
    if name not in LAW:
        raise ValueError(f"unknown law {name!r}: one of {', '.join(LAWS)}")
    return LAW[name]


def implied_level_dbm(law: Law, intercept_v: float, slope: float, values: Any) -> np.ndarray:
    """The input level each output implies through the fitted line V = a + b x of this law."""
    return law.level_dbm((np.asarray(values, dtype=float) - intercept_v) / slope)


def conformance_db(law: Law, intercept_v: float, slope: float, levels: Any, values: Any) -> np.ndarray:
    """Implied minus applied level, dB (NaN where no input is implied)."""
    return implied_level_dbm(law, intercept_v, slope, values) - np.asarray(levels, dtype=float)


def natural_budget(
    law: Law,
    *,
    slope: float,
    intercept_v: float,
    u_slope_fit: float,
    u_intercept_fit: float,
    x: np.ndarray,
    u_y: Sequence[float | None],
    residual_sd_v: float,
    accuracy: dict[str, float],
    dof_y: Sequence[float] | None = None,
) -> dict[str, Any]:
    """JCGM 100:2008 budget of b (responsivity or gain) and a (offset) for the square and linear laws.

    Type A as for the log law (analysis/uncertainty.py): the readings' scatter propagated through the
    fit; the fit's residuals only where no scatter was measured. Type B: an input-level offset of d dB (source level,
    path loss) scales x by exp(d / db_per_neper), so b by the inverse: u(b)/b = u(d)/db_per_neper;
    the meter's gain scales b and a by its fraction; its offset adds to a. k from the t distribution at
    the Welch-Satterthwaite degrees of freedom (analysis/gum.py), per parameter.
    """
    terms: list[dict[str, Any]] = [
        {
            "key": "fit",
            "type": "A",
            "param_u": u_slope_fit,
            "offset_u": u_intercept_fit,
            "included": True,
            "dof": float(len(x) - 2),
        }
    ]
    known = [u for u in u_y if u is not None]
    if known and len(known) == len(u_y):
        uy = np.asarray(known, dtype=float)
        mx = x.mean()
        c = (x - mx) / float(((x - mx) ** 2).sum())
        d = 1.0 / len(x) - mx * c
        # measured scatter is the Type A; the residuals (which hold the part's own lack of fit) only stand in
        # without it (docs/uncertainty.md)
        use = True
        terms[0]["included"] = not use
        dofs = list(dof_y) if dof_y is not None else [math.inf] * len(known)
        terms.append(
            {
                "key": "reading_scatter",
                "type": "A",
                "param_u": math.sqrt(float(((c * uy) ** 2).sum())),
                "offset_u": math.sqrt(float(((d * uy) ** 2).sum())),
                "included": use,
                "dof": min(welch_satterthwaite(list(c * uy), dofs), welch_satterthwaite(list(d * uy), dofs)),
            }
        )
    level_u = combine(
        rectangular(accuracy.get("source_level_accuracy_db", 0.0)),
        rectangular(accuracy.get("path_loss_accuracy_db", 0.0)),
    )
    gain = rectangular(accuracy.get("meter_gain_accuracy_pct", 0.0) / 100.0)
    terms += [
        {"key": "input_level", "type": "B", "param_u": abs(slope) * level_u / law.db_per_neper, "offset_u": 0.0},
        {"key": "meter_gain", "type": "B", "param_u": abs(slope) * gain, "offset_u": abs(intercept_v) * gain},
        {
            "key": "meter_offset",
            "type": "B",
            "param_u": 0.0,
            "offset_u": rectangular(accuracy.get("meter_offset_accuracy_v", 0.0)),
        },
    ]
    for t in terms:
        t.setdefault("included", True)
        t.setdefault("dof", math.inf)
    used = [t for t in terms if t["included"]]
    nu = {
        q: welch_satterthwaite([float(t[q]) for t in used], [t["dof"] for t in used]) for q in ("param_u", "offset_u")
    }
    k = {q: coverage_factor(v) for q, v in nu.items()}
    param_uc = combine(*(float(t["param_u"]) for t in used))
    offset_uc = combine(*(float(t["offset_u"]) for t in used))
    for t in terms:
        t["dof"] = None if not math.isfinite(t["dof"]) else t["dof"]  # JSON: null is infinite
    return {
        "k": k["param_u"],
        "parameter": law.param,
        "terms": terms,
        "param_uc": param_uc,
        "offset_uc_v": offset_uc,
        "param_U": expand(param_uc, k["param_u"]),
        "offset_U_v": expand(offset_uc, k["offset_u"]),
        "param_k": k["param_u"],
        "param_nu_eff": nu["param_u"] if math.isfinite(nu["param_u"]) else None,
        "offset_k": k["offset_u"],
        "offset_nu_eff": nu["offset_u"] if math.isfinite(nu["offset_u"]) else None,
    }
