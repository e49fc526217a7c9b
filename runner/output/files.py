"""`report --out DIR`: PNG plots, a Markdown summary and CSV files, for one run or two."""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

from nightbench.drivers.errors import InputError
from nightbench.output.export import write_export
from nightbench.store.db import Store

RESULT_COLUMNS = ("run_id", "frequency_hz", "temperature_c", "slope_mv_per_db", "slope_u_mv_per_db",
                  "intercept_dbm", "intercept_u_db", "range_low_dbm", "range_high_dbm", "dynamic_range_db",
                  "max_abs_error_db", "points", "unsettled_points", "overload_points")


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


def write_results_csv(reports: list[dict[str, Any]], path: Path) -> Path:
    with path.open("w", encoding="utf-8", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=RESULT_COLUMNS, lineterminator="\n")
        writer.writeheader()
        for report in reports:
            for g, d in zip(report["groups"], report["details"]):
                row = {k: g.get(k) for k in RESULT_COLUMNS}
                row.update(run_id=report["run_id"], overload_points=d["overload_points"])
                writer.writerow(row)
    return path


def write_outputs(store: Store, reports: list[dict[str, Any]], comparison_text: str | None, out: Path) -> list[Path]:
    """Everything a design review wants in one folder; returns the files written."""
    from nightbench.output.markdown import markdown_summary
    from nightbench.output.plots import write_plots

    files = write_plots(reports, out)
    files.append(write_results_csv(reports, out / "results.csv"))
    for report in reports:
        path = out / f"points-run{report['run_id']}.csv"
        with path.open("w", encoding="utf-8", newline="") as fh:
            write_export(store, report["run_id"], "csv", fh)
        files.append(path)
    summary = out / "summary.md"
    summary.write_text(markdown_summary(reports, comparison_text, [f.name for f in files]), encoding="utf-8")
    return [*files, summary]
