"""The Markdown summary written by `report --out`: the numbers, the budget, the plots, the files.

The results table has the same columns as the terminal table (the declared fields with a header,
store/fields.py), with the units in brackets.
"""

from __future__ import annotations

from nightbench.analysis.report import Report
from nightbench.output.record import setup_lines
from nightbench.output.table import (
    KEY_HEADERS,
    cell,
    extra_ranges,
    key_cells,
    key_fields,
    render_budget,
    render_excluded,
    settings_line,
)
from nightbench.output.units import markdown_units
from nightbench.store.fields import Field, table_fields


def _md(text: str) -> str:
    return text.replace("|", "\\|")  # a bar inside a cell would end it


def _header(f: Field) -> str:
    return f"{f.header} ({f.table_unit})" if f.table_unit else f"{f.header}"


def _results(report: Report) -> list[str]:
    fields = table_fields(report.settings.law)
    keys = key_fields(report)
    heads = [KEY_HEADERS[f.name] for f in keys] + [_header(f) for f in fields]
    out = ["| " + " | ".join(_md(h) for h in heads) + " |", "|" + " ---: |" * len(heads)]
    out += [
        "| " + " | ".join(_md(c) for c in key_cells(keys, g) + [cell(f, g) for f in fields]) + " |"
        for g in report.groups
    ]
    return out


def _run_section(report: Report) -> list[str]:
    s = report.settings
    return [
        f"## Run {report.run_id}: {report.name}",
        "",
        f"- DUT: {report.dut_id or 'not given'}; state: {report.state}; "
        f"started {report.started_at or '-'}, finished {report.finished_at or '-'}",
        f"- {settings_line(report)}; the error is the level the output implies through the fitted law "
        "minus the level applied; dynamic range = contiguous span around the fit range within the limit, "
        "ends interpolated to 0.1 dB",
        f"- ± is the expanded uncertainty U = k u_c: {s.to_json()['method']}",
        "",
        *_results(report),
        "",
        "```",
        *extra_ranges(report),
        *render_budget(report),
        "",
        *render_excluded(report),
        "```",
        "",
        *markdown_units(report),  # runs with units or limits.accept (output/units.py)
        *setup_lines(report),  # the instruments and settings (output/record.py); the budget stays above
    ]


def markdown_summary(reports: list[Report], comparison_text: str | None, files: list[str]) -> str:
    title = " vs ".join(f"run {r.run_id} ({r.name})" for r in reports)
    lines = [f"# Detector characterisation: {title}", ""]
    if comparison_text is not None:
        lines += ["## B minus A", "", "```", comparison_text, "```", ""]
    for report in reports:
        lines += _run_section(report)
    lines += ["## Plots", ""]
    lines += [f"![{name}]({name})" for name in files if name.endswith(".png")]
    lines += ["", "## Files", ""] + [f"- `{name}`" for name in files] + [""]
    return "\n".join(lines)
