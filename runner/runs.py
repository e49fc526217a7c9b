"""Starting and executing runs: the glue the CLI, the demo and the service share."""

from __future__ import annotations

from runner.engine import Engine
from runner.plan import LoadedPlan, parse_plan
from runner.progress import progress_printer
from runner.signals import StopFlag
from runner.store import Store
from runner.sweep import expand


def new_run(store: Store, loaded: LoadedPlan) -> int:
    """Record a run with its plan snapshot (text and parsed) before anything is contacted."""
    p = loaded.plan
    return store.create_run(name=p.name, plan_file=loaded.file, plan_text=loaded.text,
                            plan_json=p.model_dump(mode="json"), dut_id=p.dut.id, points_total=len(expand(p)),
                            files=loaded.files)


def snapshot_plan(store: Store, run_id: int) -> LoadedPlan:
    """The plan exactly as the run stored it: its text and its referenced files, never the disk."""
    row = store.run(run_id)
    return parse_plan(row["plan_text"], f"run {run_id} plan snapshot", files=store.run_files(run_id))


def execute(loaded: LoadedPlan, store: Store, run_id: int, stop: StopFlag) -> tuple[str, str | None]:
    """Run the missing points of a run in the foreground, with a progress bar on a terminal."""
    with progress_printer(loaded.plan.name, run_id) as progress:
        return Engine(loaded, store, run_id, stop, progress).run()
