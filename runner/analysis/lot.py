"""Several units: each unit's verdicts against `limits.accept` and the lot's statistics.

Per quantity, frequency and temperature the lot summary gives n, mean, the sample standard
deviation (n - 1), min, max and the process capability against the acceptance limits (common
practice): Cp = (USL - LSL) / (6 s) and Cpk = min(USL - mean, mean - LSL) / (3 s); with one
limit Cp is null and Cpk uses that side. `units` lists the units worst first (fail,
indeterminate, pass; then in plan order). docs/units.md.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Mapping, Sequence
from typing import Any

from nightbench.analysis.accept import RANK, decide, dynamic_range_u, worst
from nightbench.analysis.fit import GroupResult

# name -> (the group's value field, its U field; None: from the range ends)
QUANTITIES: dict[str, tuple[str, str | None]] = {
    "slope_mv_per_db": ("slope_mv_per_db", "slope_u_mv_per_db"),
    "intercept_dbm": ("intercept_dbm", "intercept_u_db"),
    "dynamic_range_db": ("dynamic_range_db", None),
}
DR_METHOD = "U of the dynamic range: root sum of squares of the range ends' U (taken as uncorrelated)"


def value_and_u(group: GroupResult, name: str) -> tuple[float | None, float | None]:
    field, u_field = QUANTITIES[name]
    value = getattr(group, field)
    if u_field is not None:
        return value, getattr(group, u_field)
    return value, dynamic_range_u(getattr(group, "range_low_u_db", None), getattr(group, "range_high_u_db", None))


def capability(
    values: Sequence[float], low: float | None, high: float | None
) -> tuple[float | None, float | None, float | None]:
    """(s, Cp, Cpk) of values against [low, high]; None where undefined (n < 2, s = 0, no limit)."""
    if len(values) < 2:
        return None, None, None
    s = statistics.stdev(values)
    if s == 0 or (low is None and high is None):
        return s, None, None
    mean = statistics.fmean(values)
    cp = (high - low) / (6 * s) if low is not None and high is not None else None
    sides = [
        x
        for x in ((high - mean) if high is not None else None, (mean - low) if low is not None else None)
        if x is not None
    ]
    return s, cp, min(sides) / (3 * s)


def lot_summary(
    units: Sequence[Mapping[str, Any]], limits: Mapping[str, tuple[float | None, float | None]]
) -> list[dict[str, Any]]:
    """One row per quantity, frequency and temperature over the units' quantities."""
    cells: dict[tuple[str, float, float | None], list[float]] = {}
    for unit in units:
        for q in unit["quantities"]:
            key = (q["name"], q["frequency_hz"], q["temperature_c"])
            bucket = cells.setdefault(key, [])
            if q["value"] is not None and math.isfinite(q["value"]):
                bucket.append(q["value"])
    order = list(QUANTITIES)
    rows = []
    for (name, f, t), values in sorted(
        cells.items(), key=lambda kv: (order.index(kv[0][0]), kv[0][1], kv[0][2] or 0.0)
    ):
        low, high = limits.get(name, (None, None))
        s, cp, cpk = capability(values, low, high)
        rows.append(
            {
                "name": name,
                "frequency_hz": f,
                "temperature_c": t,
                "n": len(values),
                "mean": statistics.fmean(values) if values else None,
                "std": s,
                "min": min(values) if values else None,
                "max": max(values) if values else None,
                "cp": cp,
                "cpk": cpk,
                "low": low,
                "high": high,
            }
        )
    return rows


def unit_results(
    groups: Sequence[GroupResult],
    unit_ids: Sequence[str],
    limits: Mapping[str, tuple[float | None, float | None]],
    rule: str,
    *,
    single_id: str | None = None,
) -> list[dict[str, Any]]:
    """Each unit's quantities and verdicts, worst first. Without units (`unit_ids` empty) the run's
    DUT is the one unit, named `single_id`."""
    ids = list(unit_ids) or [single_id or "dut"]
    out: list[dict[str, Any]] = []
    for uid in ids:
        mine = [g for g in groups if (g.unit_id == uid if unit_ids else True)]
        quantities: list[dict[str, Any]] = []
        for g in mine:
            for name in QUANTITIES:
                value, u = value_and_u(g, name)
                low, high = limits.get(name, (None, None))
                verdict: str | None = None
                used: str | None = None
                if name in limits:
                    verdict, used = decide(value, u, low, high, rule)
                quantities.append(
                    {
                        "name": name,
                        "frequency_hz": g.frequency_hz,
                        "temperature_c": g.temperature_c,
                        "value": value,
                        "u": u,
                        "low": low,
                        "high": high,
                        "verdict": verdict,
                        "rule": used,
                    }
                )
        overall = worst(q["verdict"] for q in quantities) if limits else None
        out.append({"id": uid, "verdict": overall, "quantities": quantities})
    # worst first; sorted() is stable, so units of one verdict keep the plan's order
    return sorted(out, key=lambda unit: -RANK.get(unit["verdict"] or "pass", 0))


def units_and_lot(plan: Mapping[str, Any], groups: Sequence[GroupResult], dut_id: str | None) -> dict[str, Any]:
    """The `units`, `lot` and `acceptance` keys of `report --json`; {} for a plan with neither
    `units` nor `limits.accept` (its JSON stays as it was)."""
    accept = (plan.get("limits") or {}).get("accept")
    unit_ids = [u["id"] for u in plan.get("units") or []]
    if not unit_ids and not accept:
        return {}
    limits = {
        name: (bounds[0], bounds[1]) for name in QUANTITIES if accept and (bounds := accept.get(name)) is not None
    }
    rule = (accept or {}).get("rule", "guarded")
    units = unit_results(groups, unit_ids, limits, rule, single_id=dut_id)
    return {
        "units": units,
        "lot": lot_summary(units, limits),
        "acceptance": {
            "rule": rule if accept else None,
            "limits": {k: list(v) for k, v in limits.items()},
            "method": "JCGM 106:2012: simple acceptance, or guarded (acceptance zone shrunk by U on each side); "
            + DR_METHOD,
        },
    }
