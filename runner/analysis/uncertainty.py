"""Uncertainty budget of a group's slope and intercept, the JCGM 100:2008 (GUM) way.

Each term is a standard uncertainty already multiplied by its sensitivity coefficient (GUM 5.1.3),
in the units of the result: mV/dB for the slope, dB for the intercept. Terms are uncorrelated
and combined as a root sum of squares (GUM 5.1.2), then expanded with k = 2 (GUM 6.2.1).

Type A (GUM 4.2): the straight-line fit knows the random scatter twice, once from the residuals
about the line and once from the spread of the samples averaged at each point (s/sqrt(n), GUM
4.2.3). They are two estimates of the same effect, not two effects, so only the larger enters
the combination; both are shown. Type B (GUM 4.3.7): what the plan states about the bench, as
half-widths a of rectangular distributions, u = a/sqrt(3).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

K_EXPANSION = 2.0

# key -> (type, plan key or None, what the term is): the words the report prints
TERMS: dict[str, tuple[str, str | None, str]] = {
    "fit": (
        "A",
        None,
        "scatter of the points about the fitted line (residual standard deviation, n - 2 degrees "
        "of freedom), propagated by least squares; includes any curvature of the law in the fit range",
    ),
    "reading_scatter": (
        "A",
        None,
        "spread of the samples averaged at each point (s/sqrt(n) of the point's mean), "
        "propagated through the fit; the same random effect as 'fit', so only the larger "
        "of the two is combined",
    ),
    "source_level": (
        "B",
        "source_level_accuracy_db",
        "the source's absolute level accuracy (rectangular): an offset common to every level "
        "of a group, so it moves the intercept and not the slope",
    ),
    "path_loss": (
        "B",
        "path_loss_accuracy_db",
        "the calibration of the path loss to the DUT input (rectangular): an offset in DUT-plane "
        "level, so it moves the intercept and not the slope",
    ),
    "meter_gain": (
        "B",
        "meter_gain_accuracy_pct",
        "the meter's gain accuracy, % of reading (rectangular): scales every voltage and so the "
        "slope by the same fraction; the intercept (where the line reaches 0 V) does not move",
    ),
    "meter_offset": (
        "B",
        "meter_offset_accuracy_v",
        "the meter's offset accuracy, V (rectangular): shifts every voltage, so the intercept by "
        "offset/slope; the slope does not move",
    ),
}

# which results each term can move (the others get a structural zero, printed as '-')
AFFECTS = {
    "fit": ("slope", "intercept"),
    "reading_scatter": ("slope", "intercept"),
    "source_level": ("intercept",),
    "path_loss": ("intercept",),
    "meter_gain": ("slope",),
    "meter_offset": ("intercept",),
}


def type_a_of_mean(stdev: float, n: int) -> float:
    """Experimental standard deviation of the mean of n samples, GUM 4.2.3: s/sqrt(n)."""
    return stdev / math.sqrt(n)


def rectangular(half_width: float) -> float:
    """Standard uncertainty of a rectangular distribution of half-width a, GUM 4.3.7: a/sqrt(3)."""
    return half_width / math.sqrt(3.0)


def combine(*contributions: float) -> float:
    """Combined standard uncertainty of uncorrelated contributions, GUM 5.1.2 (root sum of squares)."""
    return math.sqrt(sum(c * c for c in contributions))


def expand(u: float, k: float = K_EXPANSION) -> float:
    """Expanded uncertainty U = k u, GUM 6.2.1."""
    return k * u


@dataclass
class Term:
    key: str
    type: str
    slope_mv_per_db: float  # standard uncertainty contributed to the slope
    intercept_db: float  # standard uncertainty contributed to the intercept
    included: bool = True


@dataclass
class Budget:
    terms: list[Term] = field(default_factory=list)
    k: float = K_EXPANSION

    @property
    def slope_u_mv_per_db(self) -> float:
        return combine(*(t.slope_mv_per_db for t in self.terms if t.included))

    @property
    def intercept_u_db(self) -> float:
        return combine(*(t.intercept_db for t in self.terms if t.included))

    def as_dict(self) -> dict[str, Any]:
        return {
            "k": self.k,
            "terms": [
                {
                    "key": t.key,
                    "type": t.type,
                    "slope_u_mv_per_db": t.slope_mv_per_db,
                    "intercept_u_db": t.intercept_db,
                    "included": t.included,
                }
                for t in self.terms
            ],
            "slope_uc_mv_per_db": self.slope_u_mv_per_db,
            "intercept_uc_db": self.intercept_u_db,
            "slope_U_mv_per_db": expand(self.slope_u_mv_per_db, self.k),
            "intercept_U_db": expand(self.intercept_u_db, self.k),
        }


def propagate_through_fit(
    x: np.ndarray, u_y: np.ndarray, intercept_v: float, slope_v_per_db: float
) -> tuple[float, float]:
    """Standard uncertainties of slope b (V/dB) and intercept x0 = -a/b (dB) from independent u(y_i).

    Least squares makes a and b linear in the y_i: b = sum c_i y_i with c_i = (x_i - mean x)/Sxx,
    a = sum d_i y_i with d_i = 1/n - mean(x) c_i; so dx0/dy_i = -(d_i + x0 c_i)/b (GUM 5.1.2).
    """
    n = len(x)
    mx = x.mean()
    c = (x - mx) / float(((x - mx) ** 2).sum())
    d = 1.0 / n - mx * c
    x0 = -intercept_v / slope_v_per_db
    u_b = math.sqrt(float(((c * u_y) ** 2).sum()))
    u_x0 = math.sqrt(float((((d + x0 * c) / slope_v_per_db * u_y) ** 2).sum()))
    return u_b, u_x0


def build_budget(
    *,
    slope_v_per_db: float,
    intercept_v: float,
    u_slope_fit: float,
    u_intercept_fit_db: float,
    residual_sd_v: float,
    x: ArrayLike,
    u_y: Sequence[float | None],
    accuracy: dict[str, float],
) -> Budget:
    """The budget of one fitted group; `accuracy` holds the plan's Type B half-widths by plan key."""
    b_mv = abs(slope_v_per_db) * 1e3
    terms = [Term("fit", "A", u_slope_fit * 1e3, u_intercept_fit_db)]
    known = [u for u in u_y if u is not None]
    if len(known) == len(u_y) and known:
        xs, uy = np.asarray(x, dtype=float), np.asarray(known, dtype=float)
        u_b, u_x0 = propagate_through_fit(xs, uy, intercept_v, slope_v_per_db)
        scatter = Term("reading_scatter", "A", u_b * 1e3, u_x0)
        # choose by the underlying spread: residual sd against the rms standard error of the means
        use_scatter = math.sqrt(float((uy**2).mean())) > residual_sd_v
        terms[0].included = not use_scatter
        scatter.included = use_scatter
        terms.append(scatter)
    terms.append(Term("source_level", "B", 0.0, rectangular(accuracy.get("source_level_accuracy_db", 0.0))))
    terms.append(Term("path_loss", "B", 0.0, rectangular(accuracy.get("path_loss_accuracy_db", 0.0))))
    gain = accuracy.get("meter_gain_accuracy_pct", 0.0) / 100.0
    terms.append(Term("meter_gain", "B", b_mv * rectangular(gain), 0.0))
    offset_v = rectangular(accuracy.get("meter_offset_accuracy_v", 0.0))
    terms.append(Term("meter_offset", "B", 0.0, offset_v / abs(slope_v_per_db)))
    return Budget(terms)


def describe_terms(accuracy: dict[str, float]) -> list[dict[str, Any]]:
    """What each term is, with the plan's stated half-width: printed with every report."""
    out = []
    for key, (kind, plan_key, what) in TERMS.items():
        entry: dict[str, Any] = {"key": key, "type": kind, "what": what}
        if plan_key is not None:
            entry["plan_key"] = f"analysis.{plan_key}"
            entry["half_width"] = accuracy.get(plan_key, 0.0)
            entry["distribution"] = "rectangular"
        out.append(entry)
    return out
