"""One row per point, as CSV or JSON (DESIGN.md export columns first)."""

from __future__ import annotations

import csv
import json
from typing import TextIO

from runner.store import Store

COLUMNS = ["frequency_hz", "power_dbm", "source_dbm", "value_v", "stdev_v", "samples", "settle_s", "settled",
           "overload", "settle_readings", "idx", "measured_at"]


def write_export(store: Store, run_id: int, fmt: str, out: TextIO) -> None:
    run = store.run(run_id)
    rows = [{c: r[c] for c in COLUMNS} for r in store.points(run_id)]
    if fmt == "csv":
        writer = csv.DictWriter(out, fieldnames=COLUMNS, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
        return
    json.dump({"run_id": run_id, "name": run["name"], "state": run["state"], "dut_id": run["dut_id"],
               "source_idn": run["source_idn"], "meter_idn": run["meter_idn"],
               "plan": json.loads(run["plan_json"]), "points": rows}, out, indent=1)
    out.write("\n")
