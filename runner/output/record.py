"""summary.md's setup section: the instruments as the run found and left them, and the settings
an auditor needs to repeat the night (analysis/setup.py gathers them; docs/run-record.md)."""

from __future__ import annotations

from typing import Any

from nightbench.analysis.report import Report


def _md(text: str) -> str:
    return text.replace("|", "\\|")  # a bar inside a cell would end it


def compact(value: Any) -> str:
    """A plan section or a read-back state in one line, unset (None) entries left out."""
    if isinstance(value, dict):
        parts = [(k, compact(v)) for k, v in value.items() if v is not None]
        return ", ".join(f"{k}: {{{v}}}" if isinstance(value[k], dict) else f"{k}: {v}" for k, v in parts)
    if isinstance(value, list):
        return "[" + ", ".join(compact(v) if not isinstance(v, dict) else "{" + compact(v) + "}" for v in value) + "]"
    if isinstance(value, bool):
        return "yes" if value else "no"
    return f"{value:g}" if isinstance(value, float) else str(value)


def setup_lines(report: Report) -> list[str]:
    """The section's lines; a run stored before the run record says so instead of a table."""
    setup = report.setup
    out = ["### Setup (the run record)", ""]
    instruments = setup.get("instruments") or []
    if instruments:
        out += [
            "| role | identity | driver | resource | calibration due | state read back at the start |",
            "| --- | --- | --- | --- | --- | --- |",
        ]
        for i in instruments:
            due = i["calibration_due"] or "not given"
            out.append(
                "| "
                + " | ".join(
                    _md(str(x))
                    for x in (i["role"], i["identity"] or "-", i["driver"], i["resource"], due, compact(i["state"]))
                )
                + " |"
            )
        out += ["", f"- recorded at {instruments[0]['recorded_at']} (the run's latest start)"]
    else:
        out.append("- no run record: the run was stored before instruments were recorded")
    measure = dict(setup.get("measure") or {})
    repeats = measure.get("repeats", 1)
    files = setup.get("files") or []
    out += [
        f"- path: {_md(compact(setup.get('path') or {}))}"
        + (f"; files from the run's snapshot: {', '.join(f'`{f}`' for f in files)}" if files else ""),
        f"- settle: {_md(compact(setup.get('settle') or {}))}",
        f"- measure: {_md(compact(measure))}"
        + (f" ({repeats} passes over the levels, alternately up and down)" if repeats and repeats > 1 else ""),
        "",
    ]
    return out
