"""Uncertainty budget of a group's slope and intercept, the JCGM 100:2008 (GUM) way (docs/uncertainty.md).

Each term is a standard uncertainty already multiplied by its sensitivity coefficient (GUM 5.1.3),
in the units of the result (mV/dB for the slope, dB for the intercept), with its degrees of
freedom. Terms are uncorrelated within a group and combined as a root sum of squares (5.1.2); the
effective degrees of freedom (Welch-Satterthwaite, G.4.1) give k from the t distribution for
95.45 % (analysis/gum.py), separately for slope and intercept.

Type A holds only what is random: the scatter of the samples averaged at each point, and the
scatter between repeated sweeps; they overlap (a sweep's scatter contains the readings'), so only
the larger is combined. The lack of fit (the part's own log-conformance ripple over the fit range)
is not random: it is reported beside the budget as a property of the part (analysis/lackfit.py),
and only stands in for Type A when no scatter was measured at all (one sample a point, no repeats).
Type B: what the plan states about the bench (analysis/stated.py). Each term says whether it is
common to all frequencies of a run (correlated across frequency) and what it rests on (`basis`:
the source, the meter, the path, the calibration file), so comparisons can cancel what is shared.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from nightbench.analysis.gum import (
    COVERAGE,
    INFINITE,
    combine,
    coverage_factor,
    expand,
    rectangular,
    type_a_of_mean,
    welch_satterthwaite,
)

__all__ = ["COVERAGE", "K_EXPANSION", "Budget", "Term", "combine", "expand", "rectangular", "type_a_of_mean"]

K_EXPANSION = 2.0  # k for infinite degrees of freedom at 95.45 % (GUM Table G.2)

# key -> (type, plan key or None, what the term is): the words the report prints
TERMS: dict[str, tuple[str, str | None, str]] = {
    "reading_scatter": (
        "A",
        None,
        "spread of the samples averaged at each point (s/sqrt(n) of the point's mean, n - 1 degrees of freedom), "
        "propagated through the least-squares fit",
    ),
    "repeat_scatter": (
        "A",
        None,
        "spread between repeated sweeps at each level (pooled standard deviation, GUM 4.2.4), propagated through "
        "the fit; it contains the reading scatter, so only the larger of the two is combined",
    ),
    "residual_scatter": (
        "A",
        None,
        "only when no scatter was measured (one sample a point, no repeats): the residuals about the line, an "
        "upper bound that also holds the part's own ripple",
    ),
    "source_level": (
        "B",
        "source_level_accuracy_db",
        "the source's absolute level accuracy (rectangular): an offset common to every level of a group; it moves "
        "the intercept one for one, and the slope as far as the part's response is curved over the fit range "
        "(every level offset does); replaced by the calibration when the path has one",
    ),
    "path_loss": (
        "B",
        "path_loss_accuracy_db",
        "the calibration of the path loss to the DUT input (rectangular), an offset of the intercept; replaced by "
        "the calibration when the path has one",
    ),
    "sensor": (
        "B",
        "calibration: sensor_accuracy_db",
        "the power sensor's stated accuracy (rectangular), through the calibration at the DUT plane: common to "
        "every frequency",
    ),
    "calibration_scatter": (
        "B",
        "calibration: scatter_db",
        "the calibration's own scatter at this frequency (a standard uncertainty), an offset of the intercept",
    ),
    "source_linearity": (
        "B",
        "source_linearity_db",
        "levels set beyond the calibrated ones: the source's linearity, +/- this per 10 dB beyond (rectangular), "
        "a level error growing with the distance, so it moves slope and intercept",
    ),
    "mismatch": (
        "B",
        "mismatch",
        "mismatch between the source side and the DUT input, 20 log10(1 +/- |Gs||Gl|), U-shaped (u = a/sqrt(2)): "
        "an offset of the intercept with a phase that changes with frequency",
    ),
    "meter_gain": (
        "B",
        "meter_gain_accuracy_pct",
        "the meter's gain accuracy, % of reading (rectangular): scales the slope; common to every frequency",
    ),
    "meter_offset": (
        "B",
        "meter_offset_accuracy_v",
        "the meter's offset accuracy, V (rectangular): moves the intercept by offset/slope; common to every frequency",
    ),
}

# which results each term can move (the others get a structural zero, printed as '-')
AFFECTS = {
    "reading_scatter": ("slope", "intercept"),
    "repeat_scatter": ("slope", "intercept"),
    "residual_scatter": ("slope", "intercept"),
    "source_level": ("slope", "intercept"),
    "path_loss": ("slope", "intercept"),
    "sensor": ("slope", "intercept"),
    "calibration_scatter": ("slope", "intercept"),
    "source_linearity": ("slope", "intercept"),
    "mismatch": ("slope", "intercept"),
    "meter_gain": ("slope",),
    "meter_offset": ("intercept",),
}


@dataclass
class Term:
    key: str
    type: str
    slope_mv_per_db: float  # standard uncertainty contributed to the slope
    intercept_db: float  # standard uncertainty contributed to the intercept
    included: bool = True
    dof: float = INFINITE  # degrees of freedom (Type B: infinite unless stated)
    common: bool = False  # the same error at every frequency of the run (correlated across frequency)
    basis: str | None = None  # what it rests on (for cancelling in a comparison); None: never shared

    def u(self, quantity: str) -> float:
        return self.slope_mv_per_db if quantity == "slope" else self.intercept_db


def _nu(val: float) -> float | None:
    """Degrees of freedom for JSON: None stands for infinite."""
    return None if not math.isfinite(val) else val


@dataclass
class Budget:
    terms: list[Term] = field(default_factory=list)
    lack_of_fit: dict[str, Any] | None = None
    repeats: dict[str, Any] | None = None

    def _used(self, quantity: str, *, independent_only: bool = False) -> list[Term]:
        return [t for t in self.terms if t.included and t.u(quantity) and not (independent_only and t.common)]

    def uc(self, quantity: str, *, independent_only: bool = False) -> float:
        return combine(*(t.u(quantity) for t in self._used(quantity, independent_only=independent_only)))

    def nu_eff(self, quantity: str) -> float:
        used = self._used(quantity)
        return welch_satterthwaite([t.u(quantity) for t in used], [t.dof for t in used])

    def k(self, quantity: str) -> float:
        return coverage_factor(self.nu_eff(quantity))

    def expanded(self, quantity: str) -> float:
        return expand(self.uc(quantity), self.k(quantity))

    @property
    def slope_u_mv_per_db(self) -> float:
        return self.uc("slope")

    @property
    def intercept_u_db(self) -> float:
        return self.uc("intercept")

    def type_a_u(self, quantity: str) -> float:
        return combine(*(t.u(quantity) for t in self._used(quantity) if t.type == "A"))

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "coverage_probability": COVERAGE,
            "terms": [
                {
                    "key": t.key,
                    "type": t.type,
                    "slope_u_mv_per_db": t.slope_mv_per_db,
                    "intercept_u_db": t.intercept_db,
                    "included": t.included,
                    "dof": _nu(t.dof),
                    "common": t.common,
                    "basis": t.basis,
                }
                for t in self.terms
            ],
        }
        for quantity, unit in (("slope", "mv_per_db"), ("intercept", "db")):
            out[f"{quantity}_uc_{unit}"] = self.uc(quantity)
            out[f"{quantity}_nu_eff"] = _nu(self.nu_eff(quantity))
            out[f"{quantity}_k"] = self.k(quantity)
            out[f"{quantity}_U_{unit}"] = self.expanded(quantity)
            # the part that does not cancel when this frequency is compared with another of the same run
            out[f"{quantity}_uc_between_frequencies_{unit}"] = self.uc(quantity, independent_only=True)
        out["lack_of_fit"] = self.lack_of_fit
        out["repeats"] = self.repeats
        return out


def fit_coefficients(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least squares makes a and b linear in the y_i: b = sum c_i y_i, a = sum d_i y_i."""
    mx = x.mean()
    c = (x - mx) / float(((x - mx) ** 2).sum())
    return c, 1.0 / len(x) - mx * c


def propagate_through_fit(
    x: np.ndarray, u_y: np.ndarray, intercept_v: float, slope_v_per_db: float
) -> tuple[float, float]:
    """Standard uncertainties of slope b (V/dB) and intercept x0 = -a/b (dB) from independent u(y_i):
    dx0/dy_i = -(d_i + x0 c_i)/b (GUM 5.1.2)."""
    c, d = fit_coefficients(x)
    x0 = -intercept_v / slope_v_per_db
    u_b = math.sqrt(float(((c * u_y) ** 2).sum()))
    u_x0 = math.sqrt(float((((d + x0 * c) / slope_v_per_db * u_y) ** 2).sum()))
    return u_b, u_x0


def level_sensitivity(
    x: np.ndarray,
    weights: np.ndarray,
    intercept_v: float,
    slope_v_per_db: float,
    local_v_per_db: np.ndarray | None = None,
) -> tuple[float, float]:
    """How the slope (V/dB) and intercept (dB) move per dB of a level error e that reaches the point at
    x_i as w_i e (w = 1 everywhere: a plain offset). The DUT then sees x_i + w_i e, so y_i moves by
    V'(x_i) w_i e: the part's local slope (`local_v_per_db`), or the fitted b for a straight part. Through
    a curved or rippled response an offset moves the slope too, by the least-squares slope of V'."""
    c, d = fit_coefficients(x)
    x0 = -intercept_v / slope_v_per_db
    dv = np.full(len(x), slope_v_per_db) if local_v_per_db is None else np.asarray(local_v_per_db, dtype=float)
    return float((c * dv * weights).sum()), float(-((d + x0 * c) * dv * weights).sum() / slope_v_per_db)


def line_u_at(x: np.ndarray, u_y: np.ndarray, at: np.ndarray) -> np.ndarray:
    """Standard uncertainty of the fitted line's value a + b x at each `at`, from independent u(y_i)."""
    c, d = fit_coefficients(x)
    sens = d[None, :] + np.asarray(at, dtype=float)[:, None] * c[None, :]
    return np.sqrt(((sens * u_y[None, :]) ** 2).sum(axis=1))


def describe_terms(accuracy: dict[str, float]) -> list[dict[str, Any]]:
    """What each term is, with the plan's stated half-width where it is one key: printed with every report."""
    out = []
    for key, (kind, plan_key, what) in TERMS.items():
        entry: dict[str, Any] = {"key": key, "type": kind, "what": what}
        if plan_key is not None and plan_key in accuracy:
            entry["plan_key"] = f"analysis.{plan_key}"
            entry["half_width"] = accuracy.get(plan_key, 0.0)
            entry["distribution"] = "rectangular"
        out.append(entry)
    return out
