"""Build one log-law group's budget (analysis/uncertainty.py's terms) from its fit and the stated bench.

Type A from the readings' scatter (and the repeats' when there are some), Type B from analysis/stated.py;
every level error is propagated through the same least-squares coefficients (level_sensitivity),
so an offset common to a group moves the intercept one for one and the slope as far as the part's
local slope changes over the fit range (the readings' own gradient, when they are given), and a
level error that grows with the distance from the calibrated levels moves both.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from nightbench.analysis.gum import INFINITE, mismatch_u_db, rectangular, welch_satterthwaite
from nightbench.analysis.stated import Stated
from nightbench.analysis.uncertainty import Budget, Term, level_sensitivity, propagate_through_fit


def _type_a(
    x: np.ndarray,
    u_y: Sequence[float | None],
    dof_y: Sequence[float],
    residual_sd_v: float,
    fit: tuple[float, float],
    repeats: dict[str, Any] | None,
) -> list[Term]:
    intercept_v, b = fit
    terms: list[Term] = []
    known = [u for u in u_y if u is not None]
    if known and len(known) == len(u_y):
        uy = np.asarray(known, dtype=float)
        u_b, u_x0 = propagate_through_fit(x, uy, intercept_v, b)
        # Welch-Satterthwaite over the points: each point's s has n_i - 1 degrees of freedom
        c = (x - x.mean()) / float(((x - x.mean()) ** 2).sum())
        d = 1.0 / len(x) - x.mean() * c
        x0 = -intercept_v / b
        nu_b = welch_satterthwaite(list(c * uy), list(dof_y))
        nu_x0 = welch_satterthwaite(list((d + x0 * c) * uy), list(dof_y))
        terms.append(Term("reading_scatter", "A", u_b * 1e3, u_x0, dof=min(nu_b, nu_x0)))
    if repeats and repeats.get("pooled_sd_v") is not None:
        n_rep = np.asarray(repeats["counts"], dtype=float)
        u_b, u_x0 = propagate_through_fit(x, repeats["pooled_sd_v"] / np.sqrt(n_rep), intercept_v, b)
        terms.append(Term("repeat_scatter", "A", u_b * 1e3, u_x0, dof=float(repeats["dof"])))
    if len(terms) == 2:  # the same random effect estimated twice: the larger enters the combination
        smaller = min(terms, key=lambda t: t.intercept_db)
        smaller.included = False
    if not terms:
        # nothing random was measured: the residuals are all there is, an upper bound (they hold the ripple)
        u_b, u_x0 = propagate_through_fit(x, np.full(len(x), residual_sd_v), intercept_v, b)
        terms.append(Term("residual_scatter", "A", u_b * 1e3, u_x0, dof=float(len(x) - 2)))
    return terms


def _beyond_calibration(x: np.ndarray, low: float | None, high: float | None) -> np.ndarray:
    """Distance in tens of dB of each level beyond the calibrated levels (0 inside them)."""
    below = np.clip((low - x) if low is not None else 0.0 * x, 0.0, None)
    above = np.clip((x - high) if high is not None else 0.0 * x, 0.0, None)
    return (below + above) / 10.0


def build_budget(
    *,
    slope_v_per_db: float,
    intercept_v: float,
    residual_sd_v: float,
    x: np.ndarray,
    u_y: Sequence[float | None],
    dof_y: Sequence[float] | None = None,
    stated: Stated | dict[str, float] | None = None,
    frequency_hz: float = 0.0,
    repeats: dict[str, Any] | None = None,
    values: Sequence[float] | None = None,
) -> Budget:
    """The budget of one fitted group; `values` (the fit points' readings, in level order) give the
    part's local slope, through which a level offset also moves the fitted slope."""
    st = Stated.of(stated)
    acc, b = st.accuracy, slope_v_per_db
    b_mv = abs(b) * 1e3
    xs = np.asarray(x, dtype=float)
    dofs = list(dof_y) if dof_y is not None else [INFINITE] * len(u_y)
    terms = _type_a(xs, u_y, dofs, residual_sd_v, (intercept_v, b), repeats)

    local = np.gradient(np.asarray(values, dtype=float), xs) if values is not None and len(xs) >= 3 else None
    slope_per_db, icpt_per_db = level_sensitivity(xs, np.ones(len(xs)), intercept_v, b, local)
    if local is None:
        slope_per_db, icpt_per_db = 0.0, 1.0  # a straight part: an offset moves the intercept alone

    def offset_term(key: str, u_db: float, basis: str | None, *, common: bool = False, included: bool = True) -> Term:
        slope_u = abs(slope_per_db) * 1e3 * u_db
        return Term(key, "B", slope_u, abs(icpt_per_db) * u_db, included=included, common=common, basis=basis)

    cal = st.calibration
    src, path = acc.get("source_level_accuracy_db", 0.0), acc.get("path_loss_accuracy_db", 0.0)
    terms.append(offset_term("source_level", rectangular(src), st.basis("source", src), included=cal is None))
    terms.append(offset_term("path_loss", rectangular(path), st.basis("path", path), included=cal is None))
    if cal is not None:
        sensor = float(cal.sensor_accuracy_db)
        terms.append(offset_term("sensor", rectangular(sensor), st.basis("calibration", sensor), common=True))
        scatter = float(cal.scatter_db(frequency_hz))
        terms.append(offset_term("calibration_scatter", scatter, st.basis("calibration", ("scatter", frequency_hz))))
        weights = _beyond_calibration(xs, cal.lowest_dbm(frequency_hz), cal.highest_dbm(frequency_hz))
        lin = rectangular(acc.get("source_linearity_db", 0.0))
        ds, dx0 = level_sensitivity(xs, weights, intercept_v, b, local)
        basis = st.basis("source", ("linearity", lin))
        terms.append(Term("source_linearity", "B", abs(ds) * 1e3 * lin, abs(dx0) * lin, basis=basis))
    mismatch = mismatch_u_db(st.gamma_source, st.gamma_dut)
    terms.append(offset_term("mismatch", mismatch, None))  # the DUT's own reflection: never shared
    gain = acc.get("meter_gain_accuracy_pct", 0.0)
    terms.append(
        Term("meter_gain", "B", b_mv * rectangular(gain / 100.0), 0.0, common=True, basis=st.basis("meter", gain))
    )
    off = acc.get("meter_offset_accuracy_v", 0.0)
    # a voltage offset: the line moves up, the intercept by offset/slope, the slope not at all
    u_off = rectangular(off) / abs(b)
    terms.append(Term("meter_offset", "B", 0.0, u_off, common=True, basis=st.basis("meter", off)))
    return Budget(terms, repeats=repeats)


def level_u_db(budget: Budget) -> float:
    """The included Type B level terms (dB): what moves an absolute level such as a range end."""
    keys = ("source_level", "path_loss", "sensor", "calibration_scatter", "source_linearity", "mismatch")
    return math.sqrt(sum(t.intercept_db**2 for t in budget.terms if t.included and t.key in keys))
