"""`report --out DIR`: PNG plots, a Markdown summary and CSV files, for one run or two."""

from __future__ import annotations

import csv
from pathlib import Path

from nightbench.analysis.report import Report
from nightbench.drivers.errors import InputError
from nightbench.output.export import write_export
from nightbench.store.db import Store
from nightbench.store.fields import CSV_COLUMNS, FIELDS, row_values

# results.csv: the run, then the declared fields meant for a spreadsheet (store/fields.py)
RESULT_COLUMNS = ("run_id", *CSV_COLUMNS)


def check_out_dir(out: str) -> Path:
    """A path that exists as a file is bad input: refused before anything is written."""
    path = Path(out)
    if path.exists() and not path.is_dir():
        raise InputError("--out must be a directory, and this is a file", file=out)
    return path


def prepare_dir(out: str) -> Path:
    """Create DIR (and parents)."""
    path = check_out_dir(out)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the output directory: {exc.strerror}", file=out) from exc
    return path


def write_results_csv(reports: list[Report], path: Path) -> Path:
    """One row per group of every report."""
    fields = [f for f in FIELDS if f.csv]
    with path.open("w", encoding="utf-8", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=RESULT_COLUMNS, lineterminator="\n")
        writer.writeheader()
        for report in reports:
            for g in report.groups:
                writer.writerow(
                    {"run_id": report.run_id, **row_values({f.name: g.value(f.name) for f in fields}, fields)}
                )
    return path


def write_outputs(store: Store, reports: list[Report], comparison_text: str | None, out: Path) -> list[Path]:
    """Everything a design review wants in one folder; returns the files written."""
    from nightbench.output.markdown import markdown_summary
    from nightbench.output.plots import write_plots
    from nightbench.output.temperature_plots import write_temperature_plots
    from nightbench.output.unit_plots import write_unit_plots

    files = write_plots(reports, out)
    for report in reports:
        files += write_temperature_plots(report, out)  # runs with a chamber only
        files += write_unit_plots(report, out)  # runs with units only
    files.append(write_results_csv(reports, out / "results.csv"))
    for report in reports:
        path = out / f"points-run{report.run_id}.csv"
        with path.open("w", encoding="utf-8", newline="") as fh:
            write_export(store, report.run_id, "csv", fh, report)
        files.append(path)
    summary = out / "summary.md"
    summary.write_text(markdown_summary(reports, comparison_text, [f.name for f in files]), encoding="utf-8")
    return [*files, summary]
