"""Characterisation numbers from stored points: fit, conformance, dynamic range, uncertainties.

Reads the store only. Per group (one frequency): the least-squares line V = a + b*P over the
plan's fit range, slope b (mV/dB), intercept -a/b (dBm, where the line reaches 0 V), the
conformance error (V - a - b*P)/b (dB) of every point, and the contiguous range around the fit
range where |error| stays within the limit. Uncertainties are JCGM 100:2008 Type A from the fit,
expanded with k = 2.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any, Sequence

import numpy as np

K_EXPANSION = 2.0


@dataclass
class LineFit:
    intercept_v: float       # a
    slope_v_per_db: float    # b
    u_intercept_v: float     # standard uncertainty of a
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


def fit_line(x: Sequence[float], y: Sequence[float]) -> LineFit:
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


def range_within(levels: np.ndarray, errors: np.ndarray, fit_dbm: tuple[float, float],
                 limit_db: float) -> tuple[float | None, float | None]:
    """Contiguous span around the fit range where |error| <= limit; ends interpolated, 0.1 dB."""
    order = np.argsort(levels)
    p, e = levels[order], np.abs(errors[order])
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


@dataclass
class GroupResult:
    frequency_hz: float
    temperature_c: float | None
    slope_mv_per_db: float | None
    slope_u_mv_per_db: float | None
    intercept_dbm: float | None
    intercept_u_db: float | None
    fit_dbm: list[float]
    error_limit_db: float
    range_low_dbm: float | None
    range_high_dbm: float | None
    dynamic_range_db: float | None
    max_abs_error_db: float | None
    points: int
    unsettled_points: int
    overload_points: int = 0
    note: str | None = None
    errors_db: list[tuple[float, float]] = field(default_factory=list)

    def public(self) -> dict[str, Any]:
        """The report --json shape from DESIGN.md."""
        data = asdict(self)
        for key in ("overload_points", "note", "errors_db"):
            data.pop(key)
        return data


def analyse_group(frequency_hz: float, rows: list[dict[str, Any]], fit_dbm: tuple[float, float],
                  limit_db: float) -> GroupResult:
    """Fit one group of stored points (dicts with power_dbm, value_v, settled, overload)."""
    usable = [r for r in rows if r["settled"] and not r["overload"] and r["value_v"] is not None]
    unsettled = sum(1 for r in rows if not r["settled"])
    overload = sum(1 for r in rows if r["overload"])
    base = dict(frequency_hz=frequency_hz, temperature_c=None, fit_dbm=list(fit_dbm), error_limit_db=limit_db,
                points=len(rows), unsettled_points=unsettled, overload_points=overload)
    levels = np.array([r["power_dbm"] for r in usable], dtype=float)
    values = np.array([r["value_v"] for r in usable], dtype=float)
    in_fit = (levels >= fit_dbm[0] - 1e-9) & (levels <= fit_dbm[1] + 1e-9)
    try:
        fit = fit_line(levels[in_fit], values[in_fit])
    except ValueError as exc:
        return GroupResult(slope_mv_per_db=None, slope_u_mv_per_db=None, intercept_dbm=None, intercept_u_db=None,
                           range_low_dbm=None, range_high_dbm=None, dynamic_range_db=None,
                           max_abs_error_db=None, note=str(exc), **base)
    errors = conformance_db(fit, levels, values)
    low, high = range_within(levels, errors, fit_dbm, limit_db)
    return GroupResult(
        slope_mv_per_db=fit.slope_v_per_db * 1e3,
        slope_u_mv_per_db=K_EXPANSION * fit.u_slope_v_per_db * 1e3,
        intercept_dbm=fit.intercept_dbm,
        intercept_u_db=K_EXPANSION * fit.u_intercept_dbm,
        range_low_dbm=low, range_high_dbm=high,
        dynamic_range_db=None if low is None or high is None else round(high - low, 1),
        max_abs_error_db=float(np.max(np.abs(errors[in_fit]))),
        errors_db=[(float(p), float(e)) for p, e in zip(levels, errors)],
        **base)


def analyse_run(points: list[dict[str, Any]], fit_dbm: tuple[float, float], limit_db: float) -> list[GroupResult]:
    groups: dict[float, list[dict[str, Any]]] = {}
    for row in points:
        groups.setdefault(row["frequency_hz"], []).append(row)
    return [analyse_group(f, rows, fit_dbm, limit_db) for f, rows in sorted(groups.items())]
