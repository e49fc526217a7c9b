"""One row per point, as CSV or JSON (the export columns of docs/design.md first).

CSV is only the table (header row first, so any reader takes it); JSON adds the run's metadata
and its stored plan, so an export alone says what was measured, on what, and how. The last
column, `error_db`, is each point's conformance error in the run's analysis (its latest saved,
else its plan's; `report --out` passes the analysis it shows), analysed afresh, so a run not yet
analysed has it too.
"""

from __future__ import annotations

import csv
import json
from typing import TextIO

from nightbench.analysis.report import Report, build_report
from nightbench.store.db import Store

COLUMNS = [
    "frequency_hz",
    "power_dbm",
    "source_dbm",
    "value_v",
    "stdev_v",
    "samples",
    "settle_s",
    "settled",
    "overload",
    "settle_readings",
    "idx",
    "measured_at",
    "temperature_c",  # the chamber setpoint, and the chamber's and a DUT sensor's readings (runs with a chamber)
    "chamber_c",
    "dut_c",
    "error_db",
]
# the run's metadata in a JSON export; the plan comes both parsed (as validated) and as the exact text
RUN_METADATA = (
    "name",
    "state",
    "dut_id",
    "points_total",
    "created_at",
    "started_at",
    "finished_at",
    "error",
    "host",
    "source_idn",
    "meter_idn",
    "plan_file",
)


def point_errors(report: Report) -> dict[int, float | None]:
    """idx -> conformance error (dB) of every point of the report's run (None: left out or no level implied)."""
    return {int(c["idx"]): c["error_db"] for g in report.groups for c in g.curve if c.get("idx") is not None}


def write_export(store: Store, run_id: int, fmt: str, out: TextIO, report: Report | None = None) -> None:
    run = store.run(run_id)
    report = report if report is not None else build_report(store, run_id)
    errors = point_errors(report)
    points = store.points(run_id)
    have = set(points[0].keys()) if points else set()  # an older file read as it is lacks the newer columns
    rows = [
        {**{c: r[c] if c in have else None for c in COLUMNS[:-1]}, "error_db": errors.get(r["idx"])} for r in points
    ]
    if fmt == "csv":
        writer = csv.DictWriter(out, fieldnames=COLUMNS, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
        return
    meta = {k: run[k] for k in RUN_METADATA}
    json.dump(
        {
            "run_id": run_id,
            **meta,
            "plan": json.loads(run["plan_json"]),
            "plan_text": run["plan_text"],
            "points": rows,
            "analysis": report.settings.to_json(),
        },
        out,
        indent=1,
    )
    out.write("\n")
