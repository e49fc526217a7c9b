"""PNG plots of one report, or two side by side: transfer curve, conformance error, slope/intercept.

They follow the report's analysis: the fitted law's curve (a straight line in dB only for the
log law), its error, and for the square and linear laws their own parameters (responsivity or
gain, and offset) in place of slope and intercept.

Drawn from the report object alone (never the store), with matplotlib's object API on the Agg
canvas: no pyplot, no GUI backend, so it works on a headless bench PC and in CI. matplotlib is
imported here, and this module only by `report --out`.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from nightbench.analysis.fit import GroupResult
from nightbench.analysis.laws import get_law
from nightbench.analysis.report import Report
from nightbench.store.fields import BY_NAME

MARKERS = ("o", "^")
LINESTYLES = ("-", "--")
DPI = 110


def _label(report: Report, group: GroupResult, several: bool) -> str:
    text = f"{group.frequency_hz / 1e6:g} MHz"
    return f"run {report.run_id} {text}" if several else text


def _title(reports: list[Report]) -> str:
    parts = [f"run {r.run_id} {r.name}" + (f" (DUT {r.dut_id})" if r.dut_id else "") for r in reports]
    return " vs ".join(parts)


def _colours(n: int) -> list[Any]:
    from matplotlib import colormaps

    cmap = colormaps["viridis"]
    return [cmap(0.85 * i / max(n - 1, 1)) for i in range(n)]


def _save(fig: Figure, path: Path) -> Path:
    FigureCanvasAgg(fig)
    fig.savefig(path, dpi=DPI)
    return path


def _groups(reports: list[Report]) -> Iterator[tuple[int, Any, GroupResult, str]]:
    """(run index, colour, group, legend label) for every group of every report."""
    several = len(reports) > 1
    for r_i, report in enumerate(reports):
        for colour, g in zip(_colours(len(report.groups)), report.groups):
            yield r_i, colour, g, _label(report, g, several)


def _level_axes(ax: Any, reports: list[Report], ylabel: str, title: str) -> None:
    """The shared frame of plots against DUT level: fit range shaded, labels, grid, legend."""
    low, high = reports[0].settings.fit_dbm
    ax.axvspan(low, high, color="0.92", zorder=0, label=f"fit range {low:g} .. {high:g} dBm")
    ax.set_xlabel("input level at the DUT (dBm)")
    ax.set_ylabel(ylabel)
    ax.set_title(f"{title}\n{_title(reports)}", fontsize="medium")
    ax.grid(True, lw=0.4, alpha=0.6)
    count = sum(len(r.groups) for r in reports)
    ax.legend(fontsize="small", ncol=1 if count <= 6 else 2, loc="best")


def transfer_plot(reports: list[Report], path: Path) -> Path:
    """Output voltage against DUT level: measured points, the fitted line, points left out (x)."""
    fig = Figure(figsize=(8, 5.5), layout="constrained")
    ax = fig.add_subplot()
    left_out_label = "left out (did not settle)"
    for r_i, colour, g, label in _groups(reports):
        used = [c for c in g.curve if c["status"] in ("in_fit", "outside_fit")]
        left_out = [c for c in g.curve if c["status"] not in ("in_fit", "outside_fit") and c["value_v"] is not None]
        ax.plot(
            [c["power_dbm"] for c in used],
            [c["value_v"] for c in used],
            MARKERS[r_i],
            ms=3.5,
            color=colour,
            label=label,
        )
        if left_out:
            ax.plot(
                [c["power_dbm"] for c in left_out],
                [c["value_v"] for c in left_out],
                "x",
                ms=7,
                mew=1.5,
                color="tab:red",
                zorder=5,
                label=left_out_label,
            )
            left_out_label = "_nolegend_"
        line = g.line
        if line is not None:
            levels = [c["power_dbm"] for c in g.curve]
            dbm = np.linspace(min(levels), max(levels), 200)
            fitted = line.intercept_v + line.slope_v_per_db * get_law(g.law).x(dbm)
            ax.plot(dbm, fitted, LINESTYLES[r_i], lw=0.9, color=colour)
    law = reports[0].settings.law
    _level_axes(ax, reports, "detector output (V)", f"Transfer curve and fitted {law} law")
    return _save(fig, path)


def conformance_plot(reports: list[Report], path: Path) -> Path:
    """Log-conformance error against DUT level with the ±limit band and the range ends."""
    fig = Figure(figsize=(8, 5.5), layout="constrained")
    ax = fig.add_subplot()
    limit = reports[0].settings.error_limit_db
    for r_i, colour, g, label in _groups(reports):
        used = [c for c in g.curve if c["error_db"] is not None]
        ax.plot(
            [c["power_dbm"] for c in used],
            [c["error_db"] for c in used],
            LINESTYLES[r_i],
            marker=MARKERS[r_i],
            ms=2.5,
            lw=0.9,
            color=colour,
            label=label,
        )
        for end in (g.range_low_dbm, g.range_high_dbm):
            if end is not None:
                ax.axvline(end, color=colour, lw=0.6, ls=":")
    ax.axhspan(-limit, limit, color="tab:green", alpha=0.12, zorder=0, label=f"±{limit:g} dB limit")
    ax.set_ylim(-3 * limit, 3 * limit)
    _level_axes(
        ax,
        reports,
        f"conformance error to the {reports[0].settings.law} law (dB)",
        "Implied minus applied level (dotted: ends of the dynamic range)",
    )
    return _save(fig, path)


# the two parameters plotted against frequency for each law: (field, its uncertainty, axis label)
PARAMETERS = {
    "log": (("slope_mv_per_db", "slope (mV/dB)"), ("intercept_dbm", "intercept (dBm)")),
    "square": (("responsivity_v_per_mw", "responsivity (V/mW)"), ("offset_v", "offset (V)")),
    "linear": (("gain_v_per_v", "gain (V/V)"), ("offset_v", "offset (V)")),
}


def slope_intercept_plot(reports: list[Report], path: Path) -> Path:
    """The law's two parameters against frequency (slope and intercept for the log law), with error
    bars of the expanded uncertainty (k = 2)."""
    fig = Figure(figsize=(8, 6), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    (first, first_label), (second, second_label) = PARAMETERS[reports[0].settings.law]
    for r_i, report in enumerate(reports):
        fitted = [g for g in report.groups if g.value(first) is not None]
        mhz = [g.frequency_hz / 1e6 for g in fitted]
        name = f"run {report.run_id}" + (f" ({report.dut_id})" if report.dut_id else "")
        for ax, quantity in ((top, first), (bottom, second)):
            ax.errorbar(
                mhz,
                [g.value(quantity) for g in fitted],
                yerr=[g.value(BY_NAME[quantity].with_u or quantity) for g in fitted],
                fmt=MARKERS[r_i] + LINESTYLES[r_i],
                capsize=3,
                ms=4,
                label=name,
            )
    top.set_ylabel(first_label)
    bottom.set_ylabel(second_label)
    bottom.set_xlabel("frequency (MHz)")
    for ax in (top, bottom):
        ax.grid(True, lw=0.4, alpha=0.6)
        ax.legend(fontsize="small")
    top.set_title(
        f"{first_label.split(' (')[0].capitalize()} and {second_label.split(' (')[0]}, error bars U (k = 2)"
        f"\n{_title(reports)}",
        fontsize="medium",
    )
    return _save(fig, path)


def write_plots(reports: list[Report], out: Path) -> list[Path]:
    return [
        transfer_plot(reports, out / "transfer.png"),
        conformance_plot(reports, out / "conformance.png"),
        slope_intercept_plot(reports, out / "slope-intercept.png"),
    ]
