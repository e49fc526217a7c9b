"""One row per point, as CSV or JSON (the export columns of docs/design.md first).

CSV is only the table (header row first, so any reader takes it); JSON adds the run's metadata
and its stored plan, so an export alone says what was measured, on what, and how.
"""

from __future__ import annotations

import csv
import json
from typing import TextIO

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


def write_export(store: Store, run_id: int, fmt: str, out: TextIO) -> None:
    run = store.run(run_id)
    rows = [{c: r[c] for c in COLUMNS} for r in store.points(run_id)]
    if fmt == "csv":
        writer = csv.DictWriter(out, fieldnames=COLUMNS, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
        return
    meta = {k: run[k] for k in RUN_METADATA}
    json.dump(
        {"run_id": run_id, **meta, "plan": json.loads(run["plan_json"]), "plan_text": run["plan_text"], "points": rows},
        out,
        indent=1,
    )
    out.write("\n")
