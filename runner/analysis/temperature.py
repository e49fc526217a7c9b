"""Error over temperature, referenced to one line: the `over_temperature` section of a report.

A design review judges a detector over temperature against ONE line, the fit at the reference
temperature (analysis.reference_c, or `report --reference-c`): how far the output at -40 or
+85 degC moves from it, in dB of input, and over what input range that stays within the error
limit. The drift of the line itself is given as temperature coefficients of slope and intercept,
least-squares slopes over all temperatures. Pure: it reads the report's groups, nothing else.

The contract (docs/temperature.md): error vs reference = (V - V_ref(P)) / slope_ref; range = the
contiguous span around the fit-range centre where |error| <= error_limit_db; temperature
coefficients = least-squares slopes of slope (mV/dB) and intercept (dBm) against temperature.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Protocol

import numpy as np

from nightbench.analysis.fit import LineFit, range_within


class TemperatureGroup(Protocol):
    """What this module needs of a report group (analysis.fit.GroupResult has it)."""

    frequency_hz: float
    temperature_c: float | None
    slope_mv_per_db: float | None
    intercept_dbm: float | None
    line: LineFit | None
    curve: list[dict[str, Any]]


def least_squares_slope(x: Sequence[float], y: Sequence[float]) -> float | None:
    """The slope of the least-squares line through (x, y); None with fewer than two distinct x."""
    xs, ys = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if len(xs) < 2:
        return None
    sxx = float(((xs - xs.mean()) ** 2).sum())
    if sxx == 0:
        return None
    return float(((xs - xs.mean()) * (ys - ys.mean())).sum() / sxx)


def error_vs_reference(reference: LineFit, levels: np.ndarray, values: np.ndarray) -> np.ndarray:
    """(V - V_ref(P)) / slope_ref: the input-level error, dB, of readings judged by the reference line."""
    return (values - (reference.intercept_v + reference.slope_v_per_db * levels)) / reference.slope_v_per_db


def _usable(group: TemperatureGroup) -> tuple[np.ndarray, np.ndarray]:
    """The group's levels and readings that the fit could use (settled, not overloaded)."""
    rows = [c for c in group.curve if c.get("status") in ("in_fit", "outside_fit") and c.get("value_v") is not None]
    return (
        np.array([c["power_dbm"] for c in rows], dtype=float),
        np.array([c["value_v"] for c in rows], dtype=float),
    )


def over_temperature(
    groups: Sequence[TemperatureGroup],
    reference_c: float | None,
    error_limit_db: float,
    fit_dbm: tuple[float, float],
) -> dict[str, Any] | None:
    """The `over_temperature` JSON object, or None for a run without temperatures.

    `reference_c` None means the plan's default (25 if swept, else the first temperature: the
    caller passes Plan.reference_c() or `--reference-c`). A frequency whose reference group has no
    line gets None for its errors and ranges, and still its temperature coefficients.
    """
    temps = [g.temperature_c for g in groups if g.temperature_c is not None]
    if not temps:
        return None
    if reference_c is None:
        reference_c = 25.0 if 25.0 in temps else temps[0]
    out: dict[str, Any] = {"reference_c": reference_c, "groups": [], "drift": []}
    for unit, frequency in series(groups):
        at_f = _at(groups, unit, frequency)
        ref = _reference_line(at_f, reference_c)
        for g in at_f:
            out["groups"].append(_unit_first(unit, _group_entry(g, ref, error_limit_db, fit_dbm)))
        fitted = [g for g in at_f if g.slope_mv_per_db is not None and g.intercept_dbm is not None]
        t = [float(g.temperature_c or 0.0) for g in fitted]
        drift = {
            "frequency_hz": frequency,
            "slope_tc_mv_per_db_per_c": least_squares_slope(t, [float(g.slope_mv_per_db or 0.0) for g in fitted]),
            "intercept_tc_db_per_c": least_squares_slope(t, [float(g.intercept_dbm or 0.0) for g in fitted]),
        }
        out["drift"].append(_unit_first(unit, drift))
    return out


def series(groups: Sequence[TemperatureGroup]) -> list[tuple[str | None, float]]:
    """(unit, frequency) of each series over temperature: each unit is its own part, so a lot's
    units are never judged against one another's reference line. Unit None: a single-unit run."""
    keys = {(getattr(g, "unit_id", None), g.frequency_hz) for g in groups}
    return sorted(keys, key=lambda k: (k[0] or "", k[1]))


def _at(groups: Sequence[TemperatureGroup], unit: str | None, frequency: float) -> list[TemperatureGroup]:
    """One unit's groups at one frequency that have a temperature, coldest first."""
    return sorted(
        (
            g
            for g in groups
            if g.frequency_hz == frequency and getattr(g, "unit_id", None) == unit and g.temperature_c is not None
        ),
        key=lambda g: float(g.temperature_c or 0.0),
    )


def _unit_first(unit: str | None, entry: dict[str, Any]) -> dict[str, Any]:
    """The entry, led by `unit_id` for a run with units (a single-unit run's JSON is unchanged)."""
    return entry if unit is None else {"unit_id": unit, **entry}


def _reference_line(groups: Sequence[TemperatureGroup], reference_c: float) -> LineFit | None:
    """The reference group's line, where it is a log-law line (V linear in dBm: the only law whose
    error against a line in dBm is what this section means)."""
    for g in groups:
        if g.temperature_c == reference_c and getattr(g, "law", "log") == "log":
            return g.line
    return None


def _group_entry(
    group: TemperatureGroup, ref: LineFit | None, error_limit_db: float, fit_dbm: tuple[float, float]
) -> dict[str, Any]:
    entry: dict[str, Any] = {
        "frequency_hz": group.frequency_hz,
        "temperature_c": group.temperature_c,
        "max_abs_error_vs_reference_db": None,
        "range_low_dbm": None,
        "range_high_dbm": None,
        "dynamic_range_db": None,
    }
    levels, values = _usable(group)
    if ref is None or len(levels) == 0:
        return entry
    errors = error_vs_reference(ref, levels, values)
    in_fit = (levels >= fit_dbm[0] - 1e-9) & (levels <= fit_dbm[1] + 1e-9)
    if in_fit.any():
        entry["max_abs_error_vs_reference_db"] = float(np.max(np.abs(errors[in_fit])))
    low, high = range_within(levels, errors, fit_dbm, error_limit_db)
    entry["range_low_dbm"], entry["range_high_dbm"] = low, high
    entry["dynamic_range_db"] = None if low is None or high is None else round(high - low, 1)
    return entry


def errors_by_temperature(
    groups: Sequence[TemperatureGroup], reference_c: float, frequency_hz: float, unit_id: str | None = None
) -> dict[float, tuple[np.ndarray, np.ndarray]]:
    """{temperature: (levels, error vs the reference line)} of one unit at one frequency: what the plots draw."""
    at_f = _at(groups, unit_id, frequency_hz)
    ref = _reference_line(at_f, reference_c)
    if ref is None:
        return {}
    out = {}
    for g in at_f:
        levels, values = _usable(g)
        out[float(g.temperature_c or 0.0)] = (levels, error_vs_reference(ref, levels, values))
    return out
