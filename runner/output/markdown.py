"""The Markdown summary written by `report --out`: the numbers, the budget, the plots, the files."""

from __future__ import annotations

from typing import Any

from nightbench.analysis.report import num, range_text, render_budget, render_excluded

RESULT_HEADER = ("| frequency (MHz) | slope (mV/dB) | intercept (dBm) | range (dBm) | dynamic range (dB) "
                 "| max abs error in fit range (dB) | points | unsettled |\n"
                 "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |")


def _results(report: dict[str, Any]) -> list[str]:
    out = [RESULT_HEADER]
    for g, d in zip(report["groups"], report["details"]):
        out.append(f"| {g['frequency_hz'] / 1e6:g} | {num(g['slope_mv_per_db'], '.3f')} ± "
                   f"{num(g['slope_u_mv_per_db'], '.3f')} | {num(g['intercept_dbm'], '.2f')} ± "
                   f"{num(g['intercept_u_db'], '.2f')} | {range_text(g, d)} | {num(g['dynamic_range_db'], '.1f')} "
                   f"| {num(g['max_abs_error_db'], '.3f')} | {g['points']} | {g['unsettled_points']} |")
    return out


def _run_section(report: dict[str, Any]) -> list[str]:
    a = report["analysis"]
    return [f"## Run {report['run_id']}: {report['name']}", "",
            f"- DUT: {report.get('dut_id') or 'not given'}; state: {report['state']}; "
            f"started {report.get('started_at') or '-'}, finished {report.get('finished_at') or '-'}",
            f"- straight line fitted over {a['fit_dbm'][0]:g} .. {a['fit_dbm'][1]:g} dBm at the DUT; dynamic "
            f"range = contiguous span with |error| <= {a['error_limit_db']:g} dB, ends interpolated to 0.1 dB "
            "('<=' or '>=': the sweep ended first)",
            f"- ± is the expanded uncertainty U = k u_c with k = {a['k']:g}: {a['method']}", "",
            *_results(report), "", "```", *render_budget(report), "", *render_excluded(report), "```", ""]


def markdown_summary(reports: list[dict[str, Any]], comparison_text: str | None, files: list[str]) -> str:
    title = " vs ".join(f"run {r['run_id']} ({r['name']})" for r in reports)
    lines = [f"# Detector characterisation: {title}", ""]
    if comparison_text is not None:
        lines += ["## B minus A", "", "```", comparison_text, "```", ""]
    for report in reports:
        lines += _run_section(report)
    lines += ["## Plots", ""]
    lines += [f"![{name}]({name})" for name in files if name.endswith(".png")]
    lines += ["", "## Files", ""] + [f"- `{name}`" for name in files] + [""]
    return "\n".join(lines)
