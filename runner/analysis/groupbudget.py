"""A log-law group's budget put to use: U, k and nu_eff of slope and intercept, and the uncertainty of
every point's conformance error and of the range ends.

A conformance error is a reading measured against the group's own line, so level offsets and the
meter's gain move both alike and cancel: its uncertainty is Type A only, the reading's and the
line's at that level. A range end is an absolute level (dBm), so it carries the Type B level terms
too, on top of the error's uncertainty divided by how fast the error grows there.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from nightbench.analysis.budget import build_budget, level_u_db
from nightbench.analysis.gum import INFINITE, combine, coverage_factor, coverage_factors, welch_satterthwaite
from nightbench.analysis.lackfit import lack_of_fit
from nightbench.analysis.repeats import hysteresis_db
from nightbench.analysis.stated import Stated
from nightbench.analysis.uncertainty import Budget, line_u_at


def _used_u_y(budget: Budget, u_fit: list[float | None], residual_sd_v: float, repeats: dict | None) -> np.ndarray:
    """The u(y_i) of the fit points that the included Type A term rests on."""
    included = {t.key for t in budget.terms if t.included and t.type == "A"}
    if "repeat_scatter" in included and repeats is not None:
        return repeats["pooled_sd_v"] / np.sqrt(np.asarray(repeats["counts"], dtype=float))
    if "reading_scatter" in included:
        return np.asarray(u_fit, dtype=float)
    return np.full(len(u_fit), residual_sd_v)


def apply_log_budget(
    group: Any,
    fit: Any,
    levels: np.ndarray,
    values: np.ndarray,
    in_fit: np.ndarray,
    u_all: Sequence[float | None],
    dof_all: Sequence[float],
    counts: Sequence[int],
    errors: np.ndarray,
    stated: Stated | dict[str, float] | None,
    repeats: dict[str, Any] | None,
) -> Budget:
    """Set the group's slope, intercept, their U, k and nu_eff, and return the budget."""
    u_fit = [u for u, ok in zip(u_all, in_fit) if ok]
    dof_fit = [d for d, ok in zip(dof_all, in_fit) if ok]
    if repeats is not None:
        repeats = {**repeats, "counts": [c for c, ok in zip(counts, in_fit) if ok]}
    x = levels[in_fit]
    budget = build_budget(
        slope_v_per_db=fit.slope_v_per_db,
        intercept_v=fit.intercept_v,
        residual_sd_v=fit.residual_sd_v,
        x=x,
        u_y=u_fit,
        dof_y=dof_fit,
        stated=stated,
        frequency_hz=group.frequency_hz,
        repeats=repeats,
        values=values[in_fit],
    )
    b = fit.slope_v_per_db
    resid_v = errors[in_fit] * b
    known = None if any(u is None for u in u_fit) else np.asarray(u_fit, dtype=float)
    budget.lack_of_fit = lack_of_fit(errors[in_fit], resid_v, known)
    if repeats is not None:
        budget.repeats = {
            "repeats": repeats["repeats"],
            "pooled_sd_v": repeats["pooled_sd_v"],
            "dof": repeats["dof"],
            "hysteresis": hysteresis_db(repeats, b, group.fit_dbm),
        }
    group.slope_mv_per_db = b * 1e3
    group.intercept_dbm = fit.intercept_dbm
    group.slope_u_mv_per_db = budget.expanded("slope")
    group.intercept_u_db = budget.expanded("intercept")
    group.slope_k, group.intercept_k = budget.k("slope"), budget.k("intercept")
    group.slope_nu_eff = _finite_or_none(budget.nu_eff("slope"))
    group.intercept_nu_eff = _finite_or_none(budget.nu_eff("intercept"))
    _point_uncertainties(group, budget, x, _used_u_y(budget, u_fit, fit.residual_sd_v, repeats), levels, u_all, dof_all)
    return budget


def _finite_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None


def _point_uncertainties(
    group: Any,
    budget: Budget,
    x: np.ndarray,
    u_line_y: np.ndarray,
    levels: np.ndarray,
    u_all: Sequence[float | None],
    dof_all: Sequence[float],
) -> None:
    """U of each usable point's error (group.point_u_db, in the order of `levels`) and of the range ends."""
    b = abs(group.slope_mv_per_db) / 1e3
    a_dof = min((t.dof for t in budget.terms if t.included and t.type == "A"), default=INFINITE)
    line = line_u_at(x, u_line_y, levels)
    own = np.array([u or 0.0 for u in u_all], dtype=float)
    u_e = np.hypot(own, line) / b
    # Welch-Satterthwaite of each point's two parts (G.2b), then k for all points in one call
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = own**4 / np.asarray(dof_all, dtype=float) + (line**4 / a_dof if math.isfinite(a_dof) else 0.0)
        nu = np.where(denom > 0, (own**2 + line**2) ** 2 / denom, np.inf)
    group.point_u_db = [float(v) for v in coverage_factors(nu) * u_e]
    level_u = level_u_db(budget)
    for end in ("range_low_dbm", "range_high_dbm"):
        setattr(group, end.replace("_dbm", "_u_db"), _end_u(group, end, levels, u_e, level_u, a_dof))


def _end_u(group: Any, end: str, levels: np.ndarray, u_e: np.ndarray, level_u: float, a_dof: float) -> float | None:
    """U of a range end: the error's u where |error| crosses the limit, over the rate |error| grows
    there (dB per dB), combined with the Type B level terms; None where the end is the sweep's end."""
    at = getattr(group, end)
    if at is None or group.at_sweep_end(end):
        return None
    errors = {c["power_dbm"]: c["error_db"] for c in group.curve if c["error_db"] is not None}
    order = np.argsort(levels)
    p = levels[order]
    u = np.asarray(u_e)[order]
    j = int(np.searchsorted(p, at))
    if j <= 0 or j >= len(p):
        return None
    e_i, e_j = errors.get(float(p[j - 1])), errors.get(float(p[j]))
    if e_i is None or e_j is None or p[j] == p[j - 1]:
        return None
    rate = abs(abs(e_j) - abs(e_i)) / float(p[j] - p[j - 1])
    if rate == 0.0:
        return None
    frac = (at - p[j - 1]) / (p[j] - p[j - 1])
    u_a = float(u[j - 1] + frac * (u[j] - u[j - 1])) / rate
    nu = welch_satterthwaite([u_a, level_u], [a_dof, INFINITE])
    return coverage_factor(nu) * combine(u_a, level_u)
