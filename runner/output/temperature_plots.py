"""The plots a design review expects of a detector over temperature (report --out, runs with a chamber):

- per frequency, the error of every temperature against the reference-temperature line, vs input
  level, with the +/- error-limit lines: how far the output moves from the one line a system
  calibrates against, and where it stays within the limit;
- intercept and slope vs temperature, one line per frequency: the drift whose least-squares
  slopes are the report's temperature coefficients.

Drawn from the report alone with matplotlib's object API on the Agg canvas (no GUI), like plots.py.
"""

from __future__ import annotations

from pathlib import Path

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from nightbench.analysis.report import Report
from nightbench.analysis.temperature import errors_by_temperature, series

DPI = 110


def _save(fig: Figure, path: Path) -> Path:
    FigureCanvasAgg(fig)
    fig.savefig(path, dpi=DPI)
    return path


def write_temperature_plots(report: Report, out: Path) -> list[Path]:
    """The PNG files for one report; none for a run without temperatures."""
    over = report.over_temperature()
    if over is None:
        return []
    reference_c = float(over["reference_c"])
    limit = report.settings.error_limit_db
    files = []
    for unit, frequency in series(report.groups):
        curves = errors_by_temperature(report.groups, reference_c, frequency, unit)
        who = "" if unit is None else f"{unit} "
        tag = "" if unit is None else f"-{unit}"
        if not curves:
            continue
        fig = Figure(figsize=(8, 5))
        ax = fig.add_subplot()
        for temperature, (levels, errors) in curves.items():
            order = levels.argsort()
            style = "-" if temperature == reference_c else "--"
            ax.plot(levels[order], errors[order], style, marker=".", label=f"{temperature:g} °C")
        for sign in (1, -1):
            ax.axhline(sign * limit, color="grey", linewidth=0.8)
        ax.axvspan(*report.settings.fit_dbm, color="grey", alpha=0.08, label="fit range")
        ax.set_ylim(-3 * limit, 3 * limit)
        ax.set_xlabel("input level at the DUT (dBm)")
        ax.set_ylabel(f"error vs the {reference_c:g} °C line (dB)")
        ax.set_title(f"run {report.run_id} {report.name}: {who}{frequency / 1e6:g} MHz, limit ±{limit:g} dB")
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize="small")
        files.append(_save(fig, out / f"run{report.run_id}-error-vs-reference{tag}-{frequency / 1e6:g}MHz.png"))
    fig = Figure(figsize=(8, 7))
    top, bottom = fig.subplots(2, 1, sharex=True)
    for unit, frequency in series(report.groups):
        fitted = [
            g
            for g in report.groups
            if g.frequency_hz == frequency and getattr(g, "unit_id", None) == unit and g.temperature_c is not None
        ]
        fitted.sort(key=lambda g: float(g.temperature_c or 0.0))
        fitted = [g for g in fitted if g.intercept_dbm is not None and g.slope_mv_per_db is not None]
        temps = [g.temperature_c for g in fitted]
        label = ("" if unit is None else f"{unit} ") + f"{frequency / 1e6:g} MHz"
        top.plot(temps, [g.intercept_dbm for g in fitted], marker="o", label=label)
        bottom.plot(temps, [g.slope_mv_per_db for g in fitted], marker="o", label=label)
    top.set_ylabel("intercept (dBm)")
    bottom.set_ylabel("slope (mV/dB)")
    bottom.set_xlabel("temperature (°C, chamber setpoint)")
    top.set_title(f"run {report.run_id} {report.name}: drift over temperature")
    for ax in (top, bottom):
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize="small")
    files.append(_save(fig, out / f"run{report.run_id}-drift-vs-temperature.png"))
    return files
