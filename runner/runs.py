"""Starting and executing runs: the glue the CLI, the demo and the service share."""

from __future__ import annotations

from nightbench.drivers.errors import InputError
from nightbench.measure.engine import Engine
from nightbench.measure.signals import StopFlag
from nightbench.measure.sweep import expand
from nightbench.output.progress import progress_printer
from nightbench.plan.load import LoadedPlan, parse_plan
from nightbench.service.liveness import owner_gone
from nightbench.store.db import Store
from nightbench.store.states import RunState


def new_run(store: Store, loaded: LoadedPlan) -> int:
    """Record a run with its plan snapshot (text and parsed) before anything is contacted."""
    p = loaded.plan
    return store.create_run(
        name=p.name,
        plan_file=loaded.file,
        plan_text=loaded.text,
        plan_json=p.model_dump(mode="json"),
        dut_id=p.dut.id,
        points_total=len(expand(loaded)),
        files=loaded.files,
    )


def snapshot_plan(store: Store, run_id: int) -> LoadedPlan:
    """The plan exactly as the run stored it: its text and its referenced files, never the disk."""
    row = store.run(run_id)
    return parse_plan(row["plan_text"], f"run {run_id} plan snapshot", files=store.run_files(run_id))


def check_resumable(store: Store, run_id: int) -> None:
    """Refuse (InputError) a run that is completed, or still running in a live process, or whose
    snapshot no longer describes the points it has."""
    row = store.run(run_id)
    if row["state"] == RunState.COMPLETED:
        raise InputError(f"run {run_id} is already completed")
    if row["state"] == RunState.RUNNING and not owner_gone(row["pid"], row["host"], row["heartbeat_at"]):
        raise InputError(f"run {run_id} is still running (process {row['pid']} on {row['host']})")
    loaded = snapshot_plan(store, run_id)
    expected = len(expand(loaded))
    if expected != row["points_total"]:
        raise InputError(
            f"run {run_id}: its plan snapshot expands to {expected} points, "
            f"but the run was created with {row['points_total']}; refusing to resume"
        )


def execute(loaded: LoadedPlan, store: Store, run_id: int, stop: StopFlag) -> tuple[str, str | None]:
    """Run the missing points of a run in the foreground, with a progress bar on a terminal."""
    with progress_printer(loaded.plan.name, run_id) as progress:
        soak_progress = progress.soak if progress is not None else None
        state, error = Engine(loaded, store, run_id, stop, progress, soak_progress).run()
    if state == RunState.COMPLETED:
        store_fits(store, run_id)
    return state, error


def store_fits(store: Store, run_id: int) -> None:
    """Fit results go into the database when a run completes (the one place they are written:
    `report` only reads), so queries across runs see every completed run. The points are already durable and the
    run's state recorded, so a failure here must not turn a good night into a failed run (nor stop
    the service): it becomes an event, and `report` (which analyses the same way) shows the error."""
    from nightbench.analysis.report import build_report, save_fits

    try:
        save_fits(store, build_report(store, run_id))
    except Exception as exc:  # noqa: BLE001 - see the docstring
        store.event(run_id, "analysis", f"fit results not stored: {type(exc).__name__}: {exc}")
