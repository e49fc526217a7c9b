"""`units.png`: each quantity per unit (one panel each), U as error bars, the acceptance limits drawn.

Drawn from the report (analysis/lot.py's units) with matplotlib's object API on the Agg canvas,
like output/plots.py; imported only by `report --out`.
"""

from __future__ import annotations

from pathlib import Path

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from nightbench.analysis.lot import QUANTITIES
from nightbench.analysis.report import Report

TITLES = {
    "slope_mv_per_db": "slope (mV/dB)",
    "intercept_dbm": "intercept (dBm)",
    "dynamic_range_db": "dynamic range (dB)",
}
MARKERS = ("o", "s", "^", "v", "D", "P")


def write_unit_plots(report: Report, out: Path) -> list[Path]:
    """units-runN.png for a run with units; [] for one without."""
    section = report.units_and_lot()
    ids = [u["id"] for u in report.plan.get("units") or []]
    if not section or not ids:
        return []
    units = {u["id"]: u for u in section["units"]}
    limits = section["acceptance"]["limits"]
    fig = Figure(figsize=(max(6.0, 0.6 * len(ids) + 3), 3.2 * len(QUANTITIES)), layout="constrained")
    axes = fig.subplots(len(QUANTITIES), 1, sharex=True, squeeze=False)[:, 0]
    for ax, name in zip(axes, QUANTITIES):
        series: dict[tuple[float, float | None], list[tuple[int, float, float | None]]] = {}
        for x, uid in enumerate(ids):
            for q in units[uid]["quantities"]:
                if q["name"] == name and q["value"] is not None:
                    series.setdefault((q["frequency_hz"], q["temperature_c"]), []).append((x, q["value"], q["u"]))
        for i, ((f, t), pts) in enumerate(sorted(series.items(), key=lambda kv: (kv[0][0], kv[0][1] or 0.0))):
            xs = [p[0] + 0.08 * (i - (len(series) - 1) / 2) for p in pts]
            label = f"{f / 1e6:g} MHz" + (f", {t:g} C" if t is not None else "")
            ax.errorbar(
                xs,
                [p[1] for p in pts],
                yerr=[p[2] or 0.0 for p in pts],
                fmt=MARKERS[i % len(MARKERS)],
                capsize=3,
                label=label,
            )
        for bound, style in zip(limits.get(name, [None, None]), ("--", ":")):
            if bound is not None:
                ax.axhline(bound, color="red", linestyle=style, linewidth=1)
        ax.set_ylabel(TITLES[name])
        ax.grid(True, alpha=0.3)
        if series:
            ax.legend(fontsize="small")
    axes[-1].set_xticks(range(len(ids)), ids, rotation=45)
    axes[-1].set_xlim(-0.5, len(ids) - 0.5)
    axes[-1].set_xlabel("unit (limits dashed: low, dotted: high; bars: U)")
    fig.suptitle(f"run {report.run_id} {report.name}: units")
    path = out / f"units-run{report.run_id}.png"
    FigureCanvasAgg(fig)
    fig.savefig(path, dpi=110)
    return [path]
