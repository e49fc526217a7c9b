"""The units and the lot, for people: the terminal section, the Markdown section, `--unit`.

The numbers come from analysis/lot.py (the same `units` and `lot` as `report --json`); this module
only lays them out: the units worst first with each quantity that did not pass, then the lot
table per quantity, frequency and temperature.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

from nightbench.analysis.report import Report
from nightbench.drivers.errors import InputError

NAMES = {"slope_mv_per_db": "slope mV/dB", "intercept_dbm": "intercept dBm", "dynamic_range_db": "DR dB"}
LOT_HEADER = ("quantity", "MHz", "C", "n", "mean", "std", "min", "max", "low", "high", "Cp", "Cpk")


def _n(value: float | None, fmt: str = ".3f") -> str:
    return "-" if value is None else format(value, fmt)


def _where(q: dict[str, Any]) -> str:
    t = q["temperature_c"]
    return f"{q['frequency_hz'] / 1e6:g} MHz" + (f", {t:g} C" if t is not None else "")


def _unit_rows(section: dict[str, Any]) -> list[tuple[str, str, str]]:
    """(id, verdict, what did not pass) per unit, worst first."""
    rows = []
    for unit in section["units"]:
        notes = [
            f"{NAMES[q['name']]} {_n(q['value'])} ±{_n(q['u'])} in [{_n(q['low'], 'g')}, {_n(q['high'], 'g')}] "
            f"at {_where(q)}: {q['verdict']}"
            for q in unit["quantities"]
            if q["verdict"] not in (None, "pass")
        ]
        rows.append((unit["id"], unit["verdict"] or "-", "; ".join(notes)))
    return rows


def _lot_rows(section: dict[str, Any]) -> list[tuple[str, ...]]:
    return [
        (
            NAMES[r["name"]],
            f"{r['frequency_hz'] / 1e6:g}",
            _n(r["temperature_c"], "g"),
            str(r["n"]),
            _n(r["mean"]),
            _n(r["std"]),
            _n(r["min"]),
            _n(r["max"]),
            _n(r["low"], "g"),
            _n(r["high"], "g"),
            _n(r["cp"], ".2f"),
            _n(r["cpk"], ".2f"),
        )
        for r in section["lot"]
    ]


def _rule_line(section: dict[str, Any]) -> str:
    acc = section["acceptance"]
    if acc["rule"] is None:
        return "no limits.accept: no verdicts"
    return f"decision rule {acc['rule']} ({acc['method']})"


def render_units(report: Report) -> list[str]:
    """The terminal section (empty for a run without units or limits.accept)."""
    section = report.units_and_lot()
    if not section:
        return []
    from nightbench.output.table import align

    lines = ["", f"units, worst first; {_rule_line(section)}"]
    lines += align([("unit", "verdict", "not passed"), *_unit_rows(section)])
    lines += ["", "lot (Cp = (high - low) / 6s, Cpk = min(high - mean, mean - low) / 3s)"]
    lines += align([LOT_HEADER, *_lot_rows(section)])
    return lines


def markdown_units(report: Report) -> list[str]:
    """The summary.md section (empty for a run without units or limits.accept)."""
    section = report.units_and_lot()
    if not section:
        return []

    def row(cells: tuple[str, ...]) -> str:
        return "| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |"

    out = ["### Units, worst first", "", f"- {_rule_line(section)}", ""]
    out += [row(("unit", "verdict", "not passed")), "| --- | --- | --- |", *(row(r) for r in _unit_rows(section))]
    out += ["", "### Lot", "", "Cp = (high - low) / 6s, Cpk = min(high - mean, mean - low) / 3s (s: n - 1).", ""]
    out += [row(LOT_HEADER), "|" + " ---: |" * len(LOT_HEADER), *(row(r) for r in _lot_rows(section)), ""]
    return out


def check_unit(run: Mapping[str, Any], unit_id: str) -> None:
    """`--unit ID` names one of the run's units (from its `runs` row), else InputError (exit 2)."""
    ids = [u["id"] for u in json.loads(run["plan_json"]).get("units") or []]
    if unit_id not in ids:
        known = ", ".join(ids) if ids else "none (the run has no units)"
        raise InputError(f"--unit {unit_id}: run {run['id']} has no such unit (its units: {known})")


def check_unit_option(store: Any, run_ids: Sequence[int], unit_id: str | None, save: bool) -> None:
    """`--unit ID` names one of each run's units (InputError, exit 2, before any analysis); not with
    --save, which stores the whole run's analysis."""
    if unit_id is None:
        return
    if save:
        raise InputError("--unit shows one unit; --save stores the whole run's analysis: use them apart")
    for run_id in run_ids:
        check_unit(store.run(run_id), unit_id)


def only_unit(report: Report, unit_id: str | None) -> Report:
    """The report of one unit: its groups, and the plan's units narrowed to it (`report --unit`);
    the report as it is without a unit."""
    if unit_id is None:
        return report
    plan = {**report.plan, "units": [u for u in report.plan.get("units") or [] if u["id"] == unit_id]}
    return replace(report, groups=[g for g in report.groups if g.unit_id == unit_id], plan=plan)
