"""Turn a stored run into the report: the DESIGN.md JSON shape, its details, and a terminal table.

`groups` keeps exactly the DESIGN.md keys (other programs rely on them); what a reader needs
besides (the uncertainty budget and what each term is, every point's conformance error, the
points left out and why) sits in the top-level `analysis` and `details` keys.
"""

from __future__ import annotations

import json
from typing import Any

from nightbench.analysis.fit import GroupResult, analyse_run
from nightbench.analysis.uncertainty import AFFECTS, K_EXPANSION, TERMS, describe_terms
from nightbench.store.db import Store

ACCURACY_KEYS = tuple(plan_key for _, plan_key, _ in TERMS.values() if plan_key)
METHOD = ("JCGM 100:2008 (GUM): Type A from the fit and the reading scatter (the larger), Type B from "
          "the plan's analysis.*_accuracy_* half-widths as rectangular distributions (a/sqrt(3)), "
          "combined as a root sum of squares, expanded with k = 2")


def plan_accuracy(analysis: dict[str, Any]) -> dict[str, float]:
    """The plan's Type B half-widths; runs stored before these keys existed read as 0 (not stated)."""
    return {k: float(analysis.get(k) or 0.0) for k in ACCURACY_KEYS}


def build_report(store: Store, run_id: int, *, save: bool = True) -> dict[str, Any]:
    """Analyse a stored run; with `save`, also replace its rows in the fits table."""
    run = store.run(run_id)
    analysis = json.loads(run["plan_json"])["analysis"]
    fit_dbm = (float(analysis["fit_dbm"][0]), float(analysis["fit_dbm"][1]))
    limit = float(analysis["error_limit_db"])
    accuracy = plan_accuracy(analysis)
    groups = analyse_run([dict(r) for r in store.points(run_id)], fit_dbm, limit, accuracy)
    if save:
        store.save_fits(run_id, [fit_row(g) for g in groups])
    return {"run_id": run_id, "name": run["name"], "state": run["state"], "dut_id": run["dut_id"],
            "started_at": run["started_at"], "finished_at": run["finished_at"],
            "groups": [g.public() for g in groups],
            "analysis": {"fit_dbm": list(fit_dbm), "error_limit_db": limit, "k": K_EXPANSION, "method": METHOD,
                         "uncertainty_terms": describe_terms(accuracy)},
            "details": [g.detail() for g in groups]}


def fit_row(g: GroupResult) -> dict[str, Any]:
    """One row of the fits table (store.FIT_COLUMNS)."""
    row = g.public()
    row.update(fit_low_dbm=g.fit_dbm[0], fit_high_dbm=g.fit_dbm[1], overload_points=g.overload_points,
               residual_sd_v=None if g.line is None else g.line.residual_sd_v, note=g.note,
               uncertainty_json=None if g.budget is None else json.dumps(g.budget.as_dict()))
    return row


def num(value: float | None, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def range_text(group: dict[str, Any], detail: dict[str, Any]) -> str:
    """'-76.3 .. -1.7'; a '<=' or '>=' marks an end that is the end of the sweep, not a crossing."""
    low = ("<=" if detail.get("range_low_at_sweep_end") else "") + num(group["range_low_dbm"], ".1f")
    high = (">=" if detail.get("range_high_at_sweep_end") else "") + num(group["range_high_dbm"], ".1f")
    return f"{low} .. {high}"


def render_table(report: dict[str, Any]) -> str:
    lines = [f"run {report['run_id']} {report['name']} ({report['state']})"
             + (f", DUT {report['dut_id']}" if report.get("dut_id") else ""),
             f"{'freq MHz':>10} {'slope mV/dB':>16} {'intercept dBm':>17} {'range dBm':>19} "
             f"{'DR dB':>6} {'max|err| dB':>11} {'points':>7} {'unsettled':>9}"]
    for g, d in zip(report["groups"], report["details"]):
        slope = f"{num(g['slope_mv_per_db'], '.3f')} ±{num(g['slope_u_mv_per_db'], '.3f')}"
        icpt = f"{num(g['intercept_dbm'], '.2f')} ±{num(g['intercept_u_db'], '.2f')}"
        lines.append(f"{g['frequency_hz'] / 1e6:10.3f} {slope:>16} {icpt:>17} {range_text(g, d):>19} "
                     f"{num(g['dynamic_range_db'], '.1f'):>6} {num(g['max_abs_error_db'], '.3f'):>11} "
                     f"{g['points']:7d} {g['unsettled_points']:9d}")
        if d.get("note"):
            lines.append(f"{'':10} not fitted: {d['note']}")
    if not report["groups"]:
        lines.append(f"{'':10} no points stored for this run")
    a = report["analysis"]
    lines.append(f"fit over {a['fit_dbm'][0]:g} .. {a['fit_dbm'][1]:g} dBm; range where |error| <= "
                 f"{a['error_limit_db']:g} dB ('<=', '>=': the sweep ends first); "
                 f"± is the expanded uncertainty U (k = {a['k']:g})")
    lines += ["", *render_budget(report), "", *render_excluded(report)]
    return "\n".join(lines)


def render_budget(report: dict[str, Any]) -> list[str]:
    """Two small tables (slope, intercept): one row per group, one column per term."""
    keys = list(TERMS)
    out = []
    for quantity, unit, fmt in (("slope", "mV/dB", ".4f"), ("intercept", "dB", ".3f")):
        field = "slope_u_mv_per_db" if quantity == "slope" else "intercept_u_db"
        out.append(f"{quantity} budget: standard uncertainties in {unit} (* = combined)")
        widths = [max(len(k), 7) + 1 for k in keys]
        out.append(f"{'freq MHz':>10} " + " ".join(f"{k:>{w}}" for k, w in zip(keys, widths))
                   + f" {'u_c':>8} {'U (k=2)':>8}")
        for d in report["details"]:
            u = d["uncertainty"]
            if u is None:
                continue
            terms = {t["key"]: t for t in u["terms"]}
            cells = [f"{_cell(terms.get(k), field, fmt, quantity in AFFECTS[k]):>{w}}" for k, w in zip(keys, widths)]
            uc = u["slope_uc_mv_per_db"] if quantity == "slope" else u["intercept_uc_db"]
            big = u["slope_U_mv_per_db"] if quantity == "slope" else u["intercept_U_db"]
            out.append(f"{d['frequency_hz'] / 1e6:10.3f} " + " ".join(cells) + f" {uc:8{fmt}} {big:8{fmt}}")
    out.append("terms:")
    for t in report["analysis"]["uncertainty_terms"]:
        stated = ""
        if "plan_key" in t:
            stated = (f", ±{t['half_width']:g} from {t['plan_key']}" if t["half_width"]
                      else f", not stated ({t['plan_key']} = 0)")
        out.append(f"  {t['key']} (Type {t['type']}{stated}): {t['what']}")
    return out


def _cell(term: dict[str, Any] | None, field: str, fmt: str, affects: bool) -> str:
    if term is None:
        return "n/a "    # e.g. no reading scatter when a point has a single sample
    if not affects:
        return "- "
    return num(term[field], fmt) + ("*" if term["included"] else " ")


def render_excluded(report: dict[str, Any], shown: int = 12) -> list[str]:
    """Points left out of the analysis and why, per group."""
    out = ["points left out of the fit and the range:"]
    for d in report["details"]:
        by_reason: dict[str, list[float]] = {}
        for e in d["excluded"]:
            by_reason.setdefault(e["reason"], []).append(e["power_dbm"])
        for reason, levels in by_reason.items():
            listed = ", ".join(f"{p:g}" for p in levels[:shown]) + (f" and {len(levels) - shown} more"
                                                                     if len(levels) > shown else "")
            out.append(f"  {d['frequency_hz'] / 1e6:.3f} MHz: {len(levels)} {reason} at {listed} dBm")
    if len(out) == 1:
        out[0] += " none"
    return out
