"""A run's setup as an auditor needs it to repeat the night: the run record and the plan's settings.

The run record (measure/record.py) is what each instrument said about itself when the run last
started: identity, driver, resource, calibration-due date and read-back state. Beside it, from
the run's own plan snapshot (never the file on disk), the path or calibration used and the names
of the files it refers to, the settle rule, and the measure settings with the repeats.
"""

from __future__ import annotations

import json
from typing import Any

from nightbench.store.db import Store


def run_setup(store: Store, run_id: int) -> dict[str, Any]:
    """{"instruments": [...], "path", "settle", "measure", "files"}; reads only."""
    plan = json.loads(store.run(run_id)["plan_json"])
    return {
        "instruments": store.instruments(run_id),
        "path": plan.get("path") or {},
        "settle": plan.get("settle") or {},
        "measure": plan.get("measure") or {},
        "files": sorted(store.run_files(run_id)),
    }
