"""Plain-text tables of a report and of a comparison, for the terminal.

The columns are the declared result fields that have a header (store/fields.py): their labels,
units and number formats come from there, so a field added there shows up here, in the Markdown
summary and in the CSV without touching this module. Widths follow the content.
"""

from __future__ import annotations

from collections.abc import Sequence

from nightbench.analysis.compare import Comparison, u_key
from nightbench.analysis.fit import GroupResult
from nightbench.analysis.report import Report
from nightbench.store.fields import BY_NAME, TABLE_FIELDS, Field, table_fields

FREQUENCY = BY_NAME["frequency_hz"]
# The group keys beside the frequency: a run with units or chamber temperatures has one group per
# (unit, frequency, temperature), and a row or a budget line labelled by frequency alone would not
# say which. Shown only where some group has a value, so a plain run's tables are unchanged.
KEY_HEADERS = {"unit_id": "unit", "temperature_c": "temp C"}


def key_fields(report: Report) -> list[Field]:
    """The group keys (unit, temperature) that some group of this report has."""
    return [BY_NAME[n] for n in KEY_HEADERS if any(g.value(n) is not None for g in report.groups)]


def key_cells(keys: Sequence[Field], g: GroupResult) -> list[str]:
    return [shown(f, g) for f in keys]


def group_label(g: GroupResult, keys: Sequence[Field] = ()) -> str:
    """'U-3 100 MHz 85.0 C': which group a line is about (the frequency alone in a plain run)."""
    parts = [f"{shown(FREQUENCY, g)} MHz"]
    for f in keys:
        value = shown(f, g)
        if f.name == "unit_id":
            parts.insert(0, value)
        else:
            parts.append(f"{value} C")
    return " ".join(parts)


def num(value: float | None, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def header(f: Field) -> str:
    """'slope mV/dB': the label and the unit the tables show."""
    return f"{f.header} {f.table_unit}".strip()


def shown(f: Field, g: GroupResult, name: str | None = None, fmt: str | None = None) -> str:
    """One value of a group as the tables show it (scaled, formatted; '-' for none)."""
    value = g.value(name or f.name)
    if value is not None and f.scale != 1.0:
        value = value * f.scale
    return num(value, fmt or f.fmt)


def cell(f: Field, g: GroupResult) -> str:
    """A table cell: 'value ±U' for a field with an uncertainty, 'low .. high' for a span (a '<=' or
    '>=' marks an end that is the end of the sweep, not a crossing), else the value."""
    text = shown(f, g)
    if f.with_u:
        return f"{text} ±{shown(f, g, f.with_u)}"
    if f.to:
        low = ("<=" if g.at_sweep_end(f.name) else "") + text
        high = (">=" if g.at_sweep_end(f.to) else "") + shown(f, g, f.to)
        return f"{low} .. {high}"
    return text


def align(rows: Sequence[Sequence[str]]) -> list[str]:
    """Right-aligned columns as wide as their widest cell."""
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return ["  ".join(c.rjust(w) for c, w in zip(r, widths)) for r in rows]


def title(report: Report) -> str:
    return f"run {report.run_id} {report.name} ({report.state})" + (f", DUT {report.dut_id}" if report.dut_id else "")


LAW_WORDS = {
    "log": "straight line in dB (log law)",
    "square": "square law (output linear in input mW)",
    "linear": "linear law (output linear in input V rms, 50 ohm)",
}


def settings_line(report: Report) -> str:
    """What the analysis used, in words: law, fit range, limit, where the settings came from."""
    s = report.settings
    ref = f"; reference {s.reference_c:g} C" if s.reference_c is not None else ""
    return (
        f"{LAW_WORDS.get(s.law, s.law)} fitted over {s.fit_dbm[0]:g} .. {s.fit_dbm[1]:g} dBm; range where "
        f"|error| <= {s.error_limit_db:g} dB ('<=', '>=': the sweep ends first){ref}; settings: {s.source}; "
        "± is the expanded uncertainty U = k u_c, k from the t distribution for 95.45 %"
    )


def extra_ranges(report: Report) -> list[str]:
    """The ranges at every further --limit, one line per group: as data sheets give 0.5, 1 and 3 dB ranges."""
    if len(report.settings.limits) < 2:
        return []
    out = ["ranges at each error limit (dBm, dB):"]
    keys = key_fields(report)
    for g in report.groups:
        parts = [
            f"±{r['error_limit_db']:g} dB: {num(r['range_low_dbm'], '.1f')} .. {num(r['range_high_dbm'], '.1f')}"
            f" ({num(r['dynamic_range_db'], '.1f')} dB)"
            for r in g.ranges
        ]
        out.append(f"  {group_label(g, keys)}  " + "; ".join(parts or ["not fitted"]))
    return out


def render_table(report: Report) -> str:
    fields = table_fields(report.settings.law)
    keys = key_fields(report)
    rows = [[KEY_HEADERS[f.name] for f in keys] + [header(f) for f in fields]]
    rows += [key_cells(keys, g) + [cell(f, g) for f in fields] for g in report.groups]
    table = align(rows)
    width = max(len(r[0]) for r in rows)
    lines = [title(report), table[0]]
    for line, g in zip(table[1:], report.groups):
        lines.append(line)
        if g.note:
            lines.append(f"{'':{width}} not fitted: {g.note}")
    if not report.groups:
        lines.append(f"{'':{width}} no points stored for this run")
    lines.append(settings_line(report))
    lines += extra_ranges(report)
    lines += ["", *render_budget(report), "", *render_excluded(report)]
    return "\n".join(lines)


def render_budget(report: Report) -> list[str]:
    """The log law's budget tables (output/budget.py), the other laws' budget, and what each term is."""
    from nightbench.output.budget import render_budget_tables, render_terms

    return [*render_budget_tables(report), *render_law_budget(report), *render_terms(report)]


def render_law_budget(report: Report) -> list[str]:
    """The square and linear laws' budgets: one line per group, standard uncertainties per term."""
    out = []
    keys = key_fields(report)
    for g in report.groups:
        nat = g.law_budget
        if nat is None:
            continue
        parts = [
            f"{t['key']}{'*' if t['included'] else ''} {t['param_u']:.3g} / {t['offset_u'] * 1e3:.3g} mV"
            for t in nat["terms"]
        ]
        out.append(f"{group_label(g, keys)} {nat['parameter']} / offset: " + ", ".join(parts))
    if out:
        out.insert(0, "law budget: standard uncertainties of the law's parameter / of its offset (* = combined)")
        out.append("  input_level: the source level and path loss accuracies, as a scale on the parameter")
    return out


def render_excluded(report: Report, shown_levels: int = 12) -> list[str]:
    """Points left out of the analysis and why, per group."""
    out = ["points left out of the fit and the range:"]
    keys = key_fields(report)
    for g in report.groups:
        by_reason: dict[str, list[float]] = {}
        for e in g.excluded:
            by_reason.setdefault(e["reason"], []).append(e["power_dbm"])
        for reason, levels in by_reason.items():
            listed = ", ".join(f"{p:g}" for p in levels[:shown_levels])
            if len(levels) > shown_levels:
                listed += f" and {len(levels) - shown_levels} more"
            out.append(f"  {group_label(g, keys)}: {len(levels)} {reason} at {listed} dBm")
    if len(out) == 1:
        out[0] += " none"
    return out


# -- two runs ---------------------------------------------------------------------------------


def _label(report: Report) -> str:
    return f"run {report.run_id} {report.name}" + (f" (DUT {report.dut_id})" if report.dut_id else "")


def _diff_unit(f: Field) -> str:
    return "dB" if f.unit == "dBm" else f.unit  # a difference of two levels is a ratio


def _exceeds(diff: float | None, u: float | None) -> str:
    return "!" if diff is not None and u is not None and abs(diff) > u else " "


def render_comparison(cmp: Comparison) -> str:
    """Per matching group: A, B and B - A ± its Type A uncertainty for a field with one; both
    ranges; B - A for the other compared fields."""
    fields = [f for f in TABLE_FIELDS if f.diff]
    keys = [f for f in key_fields(cmp.a) if f in key_fields(cmp.b)]  # the pairs match on these too
    head = [KEY_HEADERS[f.name] for f in keys] + [header(FREQUENCY)]
    for f in fields:
        if f.with_u:
            head += [f"{f.header} A", f"{f.header} B", f"B-A {_diff_unit(f)}"]
        elif f.to:
            head += [f"{f.header} A {f.unit}", f"{f.header} B {f.unit}"]
        else:
            head.append(f"{f.header} B-A")
    rows = [head]
    for d in cmp.differences:
        row = key_cells(keys, d.a) + [shown(FREQUENCY, d.a)]
        for f in fields:
            assert f.diff is not None
            if f.with_u:
                diff, u = d.values[f.diff], d.values[u_key(f, kind="unshared")]
                row += [shown(f, d.a), shown(f, d.b), f"{num(diff, '+' + f.fmt)} ±{num(u, f.fmt)}" + _exceeds(diff, u)]
            elif f.to:
                row += [cell(f, d.a), cell(f, d.b)]
            else:
                row.append(num(d.values[f.diff], "+" + f.fmt))
        rows.append(row)
    lines = [f"A = {_label(cmp.a)}", f"B = {_label(cmp.b)}", *align(rows)]
    lines.append(
        "± is the expanded uncertainty of what differs between the runs (both runs' Type A, and the Type B "
        "terms they do not share: another source, meter, path or calibration, other stated values); '!' marks "
        "a difference larger than it. With every term of both: slope_diff_u_* and intercept_diff_u_* in --json."
    )
    for which, freqs in (("A", cmp.only_in_a_hz), ("B", cmp.only_in_b_hz)):
        if freqs:
            lines.append(f"only in {which}: " + ", ".join(f"{f / 1e6:g} MHz" for f in freqs))
    return "\n".join(lines)
