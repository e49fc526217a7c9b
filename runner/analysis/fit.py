"""Characterisation numbers from stored points: fit, conformance, dynamic range, uncertainties.

Pure: it takes point rows and returns results. Per group (one frequency): the least-squares line
V = a + b*P over the plan's fit range, slope b (mV/dB), intercept -a/b (dBm, where the line
reaches 0 V), the conformance error (V - a - b*P)/b (dB) of every point, and the contiguous range
around the fit range where |error| stays within the limit (one range per limit asked for). The
other laws (analysis/laws.py) fit the same line in their own input quantity (mW, V rms) and
report its parameters in natural units; their error is the implied minus the applied level too.
Uncertainties follow JCGM 100:2008
(analysis/uncertainty.py, docs/uncertainty.md): Type A from the readings' and the repeats' scatter,
Type B from what the plan states about the bench, k from the t distribution for 95.45 %.
Repeated sweeps are first collapsed to one mean per level (analysis/repeats.py).
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from nightbench.analysis.groupbudget import apply_log_budget
from nightbench.analysis.laws import conformance_db as law_conformance_db
from nightbench.analysis.laws import get_law, natural_budget
from nightbench.analysis.repeats import collapse
from nightbench.analysis.stated import Stated
from nightbench.analysis.uncertainty import Budget, type_a_of_mean
from nightbench.store.fields import BY_NAME, FIELDS, PUBLIC_KEYS, row_values


@dataclass
class LineFit:
    intercept_v: float  # a
    slope_v_per_db: float  # b
    u_intercept_v: float  # standard uncertainty of a
    u_slope_v_per_db: float  # standard uncertainty of b
    cov_ab: float
    residual_sd_v: float
    n: int

    @property
    def intercept_dbm(self) -> float:
        return -self.intercept_v / self.slope_v_per_db

    @property
    def u_intercept_dbm(self) -> float:
        """Standard uncertainty of x0 = -a/b by first-order propagation with the a-b covariance
        (JCGM 100:2008, eq. 13)."""
        a, b = self.intercept_v, self.slope_v_per_db
        da, db = -1.0 / b, a / b**2
        var = da**2 * self.u_intercept_v**2 + db**2 * self.u_slope_v_per_db**2 + 2 * da * db * self.cov_ab
        return math.sqrt(max(var, 0.0))


def fit_line(x: ArrayLike, y: ArrayLike) -> LineFit:
    """Ordinary least squares y = a + b x with the textbook standard errors."""
    xs, ys = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    n = len(xs)
    if n < 3:
        raise ValueError(f"a line fit with uncertainties needs at least 3 points, got {n}")
    mx = xs.mean()
    sxx = float(((xs - mx) ** 2).sum())
    if sxx == 0:
        raise ValueError("all fit points are at one level")
    b = float(((xs - mx) * (ys - ys.mean())).sum() / sxx)
    a = float(ys.mean() - b * mx)
    resid = ys - (a + b * xs)
    s2 = float((resid**2).sum() / (n - 2))
    u_b = math.sqrt(s2 / sxx)
    u_a = math.sqrt(s2 * (1.0 / n + mx**2 / sxx))
    cov = -mx * s2 / sxx
    return LineFit(a, b, u_a, u_b, cov, math.sqrt(s2), n)


def conformance_db(fit: LineFit, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return (y - (fit.intercept_v + fit.slope_v_per_db * x)) / fit.slope_v_per_db


def range_within(
    levels: np.ndarray, errors: np.ndarray, fit_dbm: tuple[float, float], limit_db: float
) -> tuple[float | None, float | None]:
    """Contiguous span around the fit range where |error| <= limit; ends interpolated, 0.1 dB."""
    order = np.argsort(levels)
    p, e = levels[order], np.abs(errors[order])
    e = np.where(np.isfinite(e), e, np.inf)  # no implied level (NaN): outside every limit
    centre = 0.5 * (fit_dbm[0] + fit_dbm[1])
    start = int(np.argmin(np.abs(p - centre)))
    if e[start] > limit_db:
        return None, None

    def walk(step: int) -> float:
        i = start
        while 0 <= i + step < len(p) and e[i + step] <= limit_db:
            i += step
        j = i + step
        if not (0 <= j < len(p)):
            return float(p[i])
        frac = (limit_db - e[i]) / (e[j] - e[i])
        return float(p[i] + frac * (p[j] - p[i]))

    return round(walk(-1), 1), round(walk(+1), 1)


def exclusion(row: Mapping[str, Any]) -> str | None:
    """Why a stored point cannot be used (None if it can): overload first, then unsettled."""
    if row.get("overload"):
        return "overload"
    if not row.get("settled"):
        return "unsettled"
    if row.get("value_v") is None:
        return "no value"
    return None


@dataclass
class GroupResult:
    """One group's results: an attribute (or property) for every declared field (store/fields.py),
    plus what the details, the tables and the plots need besides."""

    frequency_hz: float
    temperature_c: float | None
    fit_dbm: list[float]
    error_limit_db: float
    points: int
    unsettled_points: int  # did not settle within settle.timeout_s (overloads counted apart)
    overload_points: int = 0
    slope_mv_per_db: float | None = None
    slope_u_mv_per_db: float | None = None
    intercept_dbm: float | None = None
    intercept_u_db: float | None = None
    range_low_dbm: float | None = None
    range_high_dbm: float | None = None
    dynamic_range_db: float | None = None
    max_abs_error_db: float | None = None
    note: str | None = None  # why the group could not be fitted
    line: LineFit | None = None
    budget: Budget | None = None
    range_low_at_sweep_end: bool = False  # the range end is the last point swept, not a crossing
    range_high_at_sweep_end: bool = False
    curve: list[dict[str, Any]] = field(default_factory=list)  # every point: level, value, error, status
    law: str = "log"
    responsivity_v_per_mw: float | None = None  # square law: V = offset + responsivity * P_mW
    responsivity_u_v_per_mw: float | None = None
    gain_v_per_v: float | None = None  # linear law: V = offset + gain * v_rms
    gain_u_v_per_v: float | None = None
    offset_v: float | None = None  # the square and linear laws' output with no input
    offset_u_v: float | None = None
    ranges: list[dict[str, Any]] = field(default_factory=list)  # one per error limit, the first as above
    law_budget: dict[str, Any] | None = None  # the square and linear laws' JCGM 100 budget
    slope_k: float | None = None  # coverage factors (t distribution, 95.45 %) and effective degrees
    slope_nu_eff: float | None = None  # of freedom of the slope's and the intercept's U (None: infinite)
    intercept_k: float | None = None
    intercept_nu_eff: float | None = None
    range_low_u_db: float | None = None  # expanded uncertainty of each range end (None at a sweep end)
    range_high_u_db: float | None = None
    unit_id: str | None = None  # the unit of a run with several (plan `units`), else None
    point_u_db: list[float] = field(default_factory=list)  # U of each usable point's error, in level order

    @property
    def residual_sd_v(self) -> float | None:
        return None if self.line is None else self.line.residual_sd_v

    @property
    def uncertainty_json(self) -> str | None:
        if self.budget is None:
            return None if self.law_budget is None else json.dumps(self.law_budget)
        return json.dumps(self.budget.as_dict())

    def value(self, name: str) -> Any:
        """A declared field's value by name."""
        return getattr(self, BY_NAME[name].name)

    def at_sweep_end(self, name: str) -> bool:
        """Whether a range end (range_low_dbm or range_high_dbm) is the end of the sweep, not a crossing."""
        return {"range_low_dbm": self.range_low_at_sweep_end, "range_high_dbm": self.range_high_at_sweep_end}.get(
            name, False
        )

    @property
    def errors_db(self) -> list[tuple[float, float]]:
        return [(c["power_dbm"], c["error_db"]) for c in self.curve if c["error_db"] is not None]

    @property
    def excluded(self) -> list[dict[str, Any]]:
        return [
            {"power_dbm": c["power_dbm"], "reason": c["status"]}
            for c in self.curve
            if c["status"] not in ("in_fit", "outside_fit")
        ]

    def public(self) -> dict[str, Any]:
        """The `report --json` group: exactly the public fields (docs/design.md)."""
        return {k: self.value(k) for k in PUBLIC_KEYS}

    def stored(self) -> dict[str, Any]:
        """One row of the fits table, by column (store/fields.py FIT_COLUMNS)."""
        return row_values({f.name: self.value(f.name) for f in FIELDS}, stored=True)

    def detail(self) -> dict[str, Any]:
        """Everything else a reader or a plot needs: the line, the budget, every point and why."""
        return {
            "frequency_hz": self.frequency_hz,
            "temperature_c": self.temperature_c,
            "unit_id": self.unit_id,
            "note": self.note,
            "line": None
            if self.line is None
            else {
                "law": self.law,
                "x_unit": get_law(self.law).x_unit,
                "intercept_v": self.line.intercept_v,
                "slope_v_per_db": self.line.slope_v_per_db,
                "residual_sd_v": self.line.residual_sd_v,
                "n": self.line.n,
            },
            "law": self.law,
            "uncertainty": self.law_budget if self.budget is None else self.budget.as_dict(),
            "overload_points": self.overload_points,
            "range_low_at_sweep_end": self.range_low_at_sweep_end,
            "range_high_at_sweep_end": self.range_high_at_sweep_end,
            "excluded": self.excluded,
            "curve": self.curve,
        }


def analyse_group(
    frequency_hz: float,
    rows: Sequence[Mapping[str, Any]],
    fit_dbm: tuple[float, float],
    limit_db: float | Sequence[float],
    accuracy: Stated | dict[str, float] | None = None,
    temperature_c: float | None = None,
    *,
    law: str = "log",
) -> GroupResult:
    """Fit one group of stored points (mappings with power_dbm, value_v, settled, overload and,
    for the reading-scatter term, stdev_v and samples) with a law; `limit_db` may be several
    limits, the first being the group's `error_limit_db`."""
    rows, repeats = collapse(rows)
    limits = (float(limit_db),) if isinstance(limit_db, int | float) else tuple(float(x) for x in limit_db)
    the_law = get_law(law)
    rows = sorted(rows, key=lambda r: r["power_dbm"])
    reasons = [exclusion(r) for r in rows]
    usable = [r for r, why in zip(rows, reasons) if why is None]
    group = GroupResult(
        frequency_hz=frequency_hz,
        temperature_c=temperature_c,
        fit_dbm=list(fit_dbm),
        error_limit_db=limits[0],
        points=len(rows),
        unsettled_points=reasons.count("unsettled"),
        overload_points=reasons.count("overload"),
        law=law,
    )
    levels = np.array([r["power_dbm"] for r in usable], dtype=float)
    values = np.array([r["value_v"] for r in usable], dtype=float)
    in_fit = (levels >= fit_dbm[0] - 1e-9) & (levels <= fit_dbm[1] + 1e-9)

    def curve(errors: np.ndarray | None) -> list[dict[str, Any]]:
        out, k = [], 0
        for r, why in zip(rows, reasons):
            entry = {"power_dbm": r["power_dbm"], "value_v": r["value_v"], "error_db": None, "status": why}
            if why is None:
                entry["status"] = "in_fit" if in_fit[k] else "outside_fit"
                if errors is not None and math.isfinite(errors[k]):
                    entry["error_db"] = float(errors[k])
                k += 1
            entry["idx"] = r.get("idx")
            if "members" in r:  # a level's repeated points (analysis/repeats.py): (idx, value_v) each
                entry["members"] = r["members"]
            out.append(entry)
        return out

    x = the_law.x(levels)
    try:
        fit = fit_line(x[in_fit], values[in_fit])
    except ValueError as exc:
        group.note, group.curve = str(exc), curve(None)
        return group
    if law == "log":
        errors = conformance_db(fit, levels, values)
    else:
        errors = law_conformance_db(the_law, fit.intercept_v, fit.slope_v_per_db, levels, values)
    for limit in limits:
        low, high = range_within(levels, errors, fit_dbm, limit)
        group.ranges.append(
            {
                "error_limit_db": limit,
                "range_low_dbm": low,
                "range_high_dbm": high,
                "dynamic_range_db": None if low is None or high is None else round(high - low, 1),
            }
        )
    low, high = group.ranges[0]["range_low_dbm"], group.ranges[0]["range_high_dbm"]
    group.range_low_dbm, group.range_high_dbm = low, high
    group.dynamic_range_db = group.ranges[0]["dynamic_range_db"]
    finite = np.abs(errors[in_fit])
    finite = finite[np.isfinite(finite)]
    group.max_abs_error_db = float(np.max(finite)) if len(finite) else None
    group.line = fit
    group.range_low_at_sweep_end = low is not None and low == round(float(levels.min()), 1)
    group.range_high_at_sweep_end = high is not None and high == round(float(levels.max()), 1)
    group.curve = curve(errors)
    _uncertainties(group, fit, usable, (levels, x, in_fit, errors), accuracy, repeats)
    return group


def _uncertainties(
    group: GroupResult,
    fit: LineFit,
    usable: list[Mapping[str, Any]],
    arrays: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
    accuracy: Stated | dict[str, float] | None,
    repeats: dict[str, Any] | None,
) -> None:
    """The budget (analysis/groupbudget.py for the log law, laws.py for the others) and each point's U."""
    levels, x, in_fit, errors = arrays
    u_all = [_u_mean(r) for r in usable]
    if group.law != "log":
        dofs = [float(r.get("dof") or (r.get("samples") or 1) - 1) for r, ok in zip(usable, in_fit) if ok]
        u_fit = [u for u, ok in zip(u_all, in_fit) if ok]
        _natural(group, fit, x[in_fit], u_fit, Stated.of(accuracy).accuracy, dofs)
        return
    dof_all = [float(r.get("dof") or (r.get("samples") or 1) - 1) for r in usable]
    counts = [int(r.get("repeats") or 1) for r in usable]
    values = np.array([r["value_v"] for r in usable], dtype=float)
    group.budget = apply_log_budget(
        group, fit, levels, values, in_fit, u_all, dof_all, counts, errors, accuracy, repeats
    )
    usable_entries = [c for c in group.curve if c["status"] in ("in_fit", "outside_fit")]
    for entry, big in zip(usable_entries, group.point_u_db):
        entry["error_u_db"] = big if entry["error_db"] is not None else None


def _natural(
    group: GroupResult, fit: LineFit, x: np.ndarray, u_y: list[float | None], accuracy: dict, dofs: list[float]
) -> None:
    """The square and linear laws' natural parameters and their budget (analysis/laws.py)."""
    law = get_law(group.law)
    assert law.param is not None
    nat = natural_budget(
        law,
        slope=fit.slope_v_per_db,
        intercept_v=fit.intercept_v,
        u_slope_fit=fit.u_slope_v_per_db,
        u_intercept_fit=fit.u_intercept_v,
        x=x,
        u_y=u_y,
        residual_sd_v=fit.residual_sd_v,
        accuracy=accuracy,
        dof_y=dofs,
    )
    setattr(group, law.param, fit.slope_v_per_db)
    setattr(group, law.param.replace("_v_per", "_u_v_per"), nat["param_U"])
    group.offset_v, group.offset_u_v = fit.intercept_v, nat["offset_U_v"]
    group.law_budget = nat


def _u_mean(row: Mapping[str, Any]) -> float | None:
    stdev, n = row.get("stdev_v"), row.get("samples") or 0
    return None if stdev is None or n < 2 else type_a_of_mean(stdev, n)


def analyse_run(
    points: Sequence[Mapping[str, Any]],
    fit_dbm: tuple[float, float],
    limit_db: float | Sequence[float],
    accuracy: Stated | dict[str, float] | None = None,
    *,
    law: str = "log",
) -> list[GroupResult]:
    """One result per group: each frequency (and, once points carry them, each temperature and unit)."""
    groups: dict[tuple[float, float | None, str | None], list[Mapping[str, Any]]] = {}
    for row in points:
        groups.setdefault((row["frequency_hz"], row.get("temperature_c"), row.get("unit_id")), []).append(row)
    results = []
    for (f, t, unit), rows in sorted(groups.items(), key=lambda kv: (kv[0][0], kv[0][1] or 0.0, kv[0][2] or "")):
        group = analyse_group(f, rows, fit_dbm, limit_db, accuracy, temperature_c=t, law=law)
        group.unit_id = unit
        results.append(group)
    return results
