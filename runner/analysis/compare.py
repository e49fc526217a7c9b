"""Two runs side by side (the same part twice, or two boards): B minus A per matching group.

The uncertainty of a difference combines both runs' expanded uncertainties as independent
(`*_diff_u_*`, right for two benches). On one bench with the same cables, the Type B terms are
shared and largely cancel in a difference, so the Type A part alone (`*_diff_u_type_a_*`) is the
fairer test of whether two boards differ; both are given, and the reader knows the bench.
"""

from __future__ import annotations

import math
from typing import Any

from nightbench.analysis.report import num, range_text

DIFFERENCES = (("slope_mv_per_db", "slope_diff_mv_per_db"), ("intercept_dbm", "intercept_diff_db"),
               ("range_low_dbm", "range_low_diff_db"), ("range_high_dbm", "range_high_diff_db"),
               ("dynamic_range_db", "dynamic_range_diff_db"), ("max_abs_error_db", "max_abs_error_diff_db"))


def group_key(group: dict[str, Any]) -> tuple[float, float | None]:
    return round(group["frequency_hz"], 3), group["temperature_c"]


def _minus(b: float | None, a: float | None) -> float | None:
    return None if a is None or b is None else b - a


def _rss(*values: float | None) -> float | None:
    return None if any(v is None for v in values) else math.sqrt(sum(v * v for v in values))  # type: ignore[operator]


def type_a_expanded(detail: dict[str, Any], field: str) -> float | None:
    """Expanded uncertainty from the included Type A term alone (field: slope_u_mv_per_db or intercept_u_db)."""
    u = detail.get("uncertainty")
    if u is None:
        return None
    a_terms = [t[field] for t in u["terms"] if t["type"] == "A" and t["included"]]
    return u["k"] * math.sqrt(sum(x * x for x in a_terms))


def compare_reports(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    """The comparison object: both reports, the differences B - A, and groups found in one run only."""
    in_b = {group_key(g): (g, d) for g, d in zip(b["groups"], b["details"])}
    rows, only_a = [], []
    for ga, da in zip(a["groups"], a["details"]):
        match = in_b.pop(group_key(ga), None)
        if match is None:
            only_a.append(ga["frequency_hz"])
            continue
        gb, db = match
        row: dict[str, Any] = {"frequency_hz": ga["frequency_hz"], "temperature_c": ga["temperature_c"]}
        for src, dst in DIFFERENCES:
            row[dst] = _minus(gb[src], ga[src])
        row["slope_diff_u_mv_per_db"] = _rss(ga["slope_u_mv_per_db"], gb["slope_u_mv_per_db"])
        row["intercept_diff_u_db"] = _rss(ga["intercept_u_db"], gb["intercept_u_db"])
        row["slope_diff_u_type_a_mv_per_db"] = _rss(type_a_expanded(da, "slope_u_mv_per_db"),
                                                    type_a_expanded(db, "slope_u_mv_per_db"))
        row["intercept_diff_u_type_a_db"] = _rss(type_a_expanded(da, "intercept_u_db"),
                                                 type_a_expanded(db, "intercept_u_db"))
        rows.append(row)
    return {"run_ids": [a["run_id"], b["run_id"]], "runs": [a, b], "differences": rows,
            "only_in_a_hz": only_a, "only_in_b_hz": [g["frequency_hz"] for g, _ in in_b.values()]}


def _label(report: dict[str, Any]) -> str:
    return f"run {report['run_id']} {report['name']}" + (f" (DUT {report['dut_id']})" if report.get("dut_id") else "")


def _exceeds(diff: float | None, u: float | None) -> str:
    return "!" if diff is not None and u is not None and abs(diff) > u else " "


def render_comparison(cmp: dict[str, Any]) -> str:
    a, b = cmp["runs"]
    by_key = {group_key(g): (g, d) for g, d in zip(b["groups"], b["details"])}
    lines = [f"A = {_label(a)}", f"B = {_label(b)}",
             f"{'freq MHz':>10} {'slope A':>8} {'slope B':>8} {'B-A mV/dB':>17}  {'icpt A':>7} {'icpt B':>7} "
             f"{'B-A dB':>14}  {'range A dBm':>17} {'range B dBm':>17} {'DR B-A':>7}"]
    a_by_key = {group_key(g): (g, d) for g, d in zip(a["groups"], a["details"])}
    for row in cmp["differences"]:
        key = (round(row["frequency_hz"], 3), row["temperature_c"])
        (ga, da), (gb, db) = a_by_key[key], by_key[key]
        ds = (f"{num(row['slope_diff_mv_per_db'], '+.3f')} ±{num(row['slope_diff_u_type_a_mv_per_db'], '.3f')}"
              + _exceeds(row["slope_diff_mv_per_db"], row["slope_diff_u_type_a_mv_per_db"]))
        di = (f"{num(row['intercept_diff_db'], '+.2f')} ±{num(row['intercept_diff_u_type_a_db'], '.2f')}"
              + _exceeds(row["intercept_diff_db"], row["intercept_diff_u_type_a_db"]))
        lines.append(f"{row['frequency_hz'] / 1e6:10.3f} {num(ga['slope_mv_per_db'], '.3f'):>8} "
                     f"{num(gb['slope_mv_per_db'], '.3f'):>8} {ds:>17}  {num(ga['intercept_dbm'], '.2f'):>7} "
                     f"{num(gb['intercept_dbm'], '.2f'):>7} {di:>14}  {range_text(ga, da):>17} "
                     f"{range_text(gb, db):>17} {num(row['dynamic_range_diff_db'], '+.1f'):>7}")
    lines.append("± is the Type A part of both runs' expanded uncertainties (k = 2), right on one bench where the "
                 "Type B terms are shared; '!' marks a difference larger than it. With all terms: "
                 "slope_diff_u_* and intercept_diff_u_* in --json.")
    for which, freqs in (("A", cmp["only_in_a_hz"]), ("B", cmp["only_in_b_hz"])):
        if freqs:
            lines.append(f"only in {which}: " + ", ".join(f"{f / 1e6:g} MHz" for f in freqs))
    return "\n".join(lines)
