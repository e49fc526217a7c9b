"""Turn a stored run into the report: the DESIGN.md JSON shape and a terminal table."""

from __future__ import annotations

import json
from typing import Any

from runner.analysis import analyse_run
from runner.store import Store


def build_report(store: Store, run_id: int) -> dict[str, Any]:
    run = store.run(run_id)
    plan = json.loads(run["plan_json"])
    fit_dbm = tuple(plan["analysis"]["fit_dbm"])
    limit = plan["analysis"]["error_limit_db"]
    rows = [dict(r) for r in store.points(run_id)]
    groups = analyse_run(rows, fit_dbm, limit)  # type: ignore[arg-type]
    return {"run_id": run_id, "name": run["name"], "state": run["state"], "dut_id": run["dut_id"],
            "groups": [g.public() for g in groups]}


def _num(value: float | None, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def render_table(report: dict[str, Any]) -> str:
    lines = [f"run {report['run_id']} {report['name']} ({report['state']})"
             + (f", DUT {report['dut_id']}" if report.get("dut_id") else ""),
             f"{'freq MHz':>10} {'slope mV/dB':>16} {'intercept dBm':>17} {'range dBm':>17} "
             f"{'DR dB':>6} {'max|err| dB':>11} {'points':>7} {'unsettled':>9}"]
    for g in report["groups"]:
        slope = f"{_num(g['slope_mv_per_db'], '.3f')} ±{_num(g['slope_u_mv_per_db'], '.3f')}"
        icpt = f"{_num(g['intercept_dbm'], '.2f')} ±{_num(g['intercept_u_db'], '.2f')}"
        rng = f"{_num(g['range_low_dbm'], '.1f')} .. {_num(g['range_high_dbm'], '.1f')}"
        lines.append(f"{g['frequency_hz'] / 1e6:10.3f} {slope:>16} {icpt:>17} {rng:>17} "
                     f"{_num(g['dynamic_range_db'], '.1f'):>6} {_num(g['max_abs_error_db'], '.3f'):>11} "
                     f"{g['points']:7d} {g['unsettled_points']:9d}")
    if report["groups"]:
        g = report["groups"][0]
        lines.append(f"fit over {g['fit_dbm'][0]:g} .. {g['fit_dbm'][1]:g} dBm; range where |error| <= "
                     f"{g['error_limit_db']:g} dB; ± is the expanded uncertainty (k = 2, Type A from the fit)")
    return "\n".join(lines)
