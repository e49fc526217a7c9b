"""PNG plots of one report, or two side by side: transfer curve, conformance error, slope/intercept.

Drawn from the report object alone (never the store), with matplotlib's object API on the Agg
canvas: no pyplot, no GUI backend, so it works on a headless bench PC and in CI. matplotlib is
imported here, and this module only by `report --out`.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from nightbench.analysis.fit import GroupResult
from nightbench.analysis.report import Report

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
        used = [c for c in g.curve if c["error_db"] is not None]
        left_out = [c for c in g.curve if c["error_db"] is None and c["value_v"] is not None]
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
            xs = [min(levels), max(levels)]
            ax.plot(xs, [line.intercept_v + line.slope_v_per_db * x for x in xs], LINESTYLES[r_i], lw=0.9, color=colour)
    _level_axes(ax, reports, "detector output (V)", "Transfer curve and straight-line fit")
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
    _level_axes(ax, reports, "log-conformance error (dB)", "Conformance error (dotted: ends of the dynamic range)")
    return _save(fig, path)


def slope_intercept_plot(reports: list[Report], path: Path) -> Path:
    """Slope and intercept against frequency, with error bars of the expanded uncertainty (k = 2)."""
    fig = Figure(figsize=(8, 6), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    for r_i, report in enumerate(reports):
        fitted = [g for g in report.groups if g.slope_mv_per_db is not None]
        mhz = [g.frequency_hz / 1e6 for g in fitted]
        name = f"run {report.run_id}" + (f" ({report.dut_id})" if report.dut_id else "")
        top.errorbar(
            mhz,
            [g.slope_mv_per_db for g in fitted],
            yerr=[g.slope_u_mv_per_db for g in fitted],
            fmt=MARKERS[r_i] + LINESTYLES[r_i],
            capsize=3,
            ms=4,
            label=name,
        )
        bottom.errorbar(
            mhz,
            [g.intercept_dbm for g in fitted],
            yerr=[g.intercept_u_db for g in fitted],
            fmt=MARKERS[r_i] + LINESTYLES[r_i],
            capsize=3,
            ms=4,
            label=name,
        )
    top.set_ylabel("slope (mV/dB)")
    bottom.set_ylabel("intercept (dBm)")
    bottom.set_xlabel("frequency (MHz)")
    for ax in (top, bottom):
        ax.grid(True, lw=0.4, alpha=0.6)
        ax.legend(fontsize="small")
    top.set_title(f"Slope and intercept, error bars U (k = 2)\n{_title(reports)}", fontsize="medium")
    return _save(fig, path)


def write_plots(reports: list[Report], out: Path) -> list[Path]:
    return [
        transfer_plot(reports, out / "transfer.png"),
        conformance_plot(reports, out / "conformance.png"),
        slope_intercept_plot(reports, out / "slope-intercept.png"),
    ]
