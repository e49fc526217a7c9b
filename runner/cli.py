"""The `nightbench` command line: a thin layer over the library.

Heavy modules (pyvisa, numpy, pydantic) are imported inside the commands that need them, so
`--help`, `runs` and `check` stay quick. Every NightbenchError becomes one plain message on
stderr and its exit code (2 for bad input); no traceback reaches a user for bad input or an
unreachable instrument.
"""

from __future__ import annotations

import functools
import json
import sys
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import click

from nightbench.drivers.errors import NightbenchError

if TYPE_CHECKING:
    from nightbench.store.db import Store

DB_HELP = "database file (default: $NIGHTBENCH_DB, else ./nightbench.db)"


def _fail(message: str, code: int) -> None:
    click.echo(f"nightbench: {message}", err=True)
    sys.exit(code)


def friendly(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Map project errors to a message and exit code."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return fn(*args, **kwargs)
        except NightbenchError as exc:
            _fail(str(exc), exc.exit_code)

    return wrapper


def _db(path: str | None) -> str:
    from nightbench.store.db import default_db_path

    return path or default_db_path()


def _read_store(path: str | None) -> Store:
    """The database for a command that only reads: opened read-only, so nothing is written, and a
    missing file is an InputError (exit 2), since a mistyped --db must not leave an empty database.
    A postgresql:// URL opens the shared store (store/pg.py), read-only, with the same read API."""
    from nightbench.store.db import Store
    from nightbench.store.pg import PgStore, is_pg_url

    return PgStore(path) if path and is_pg_url(path) else Store.open_readonly(_db(path))


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="nightbench")
def main() -> None:
    """Characterise power detectors unattended: plan -> bench -> SQLite -> report."""


@main.command()
@click.argument("plan", type=click.Path(dir_okay=True))
@friendly
def check(plan: str) -> None:
    """Validate PLAN; touches no instrument and writes nothing."""
    from nightbench.measure.sweep import expand
    from nightbench.plan.load import load_plan
    from nightbench.plan.path import source_for

    loaded = load_plan(plan)
    p = loaded.plan
    points = expand(loaded)
    freqs = p.sweep.axis_values("frequency_hz")
    levels = p.sweep.axis_values("power_dbm")
    model = loaded.path
    click.echo(f"{plan}: valid plan '{p.name}', {len(points)} points over {len(freqs)} frequencies")
    for line in model.describe():
        click.echo(f"  path {line}")
    for f in freqs:
        loss = model.loss(f)
        parts = model.parts(f)
        detail = " + ".join(f"{label} {part:.3f}{' (extrapolated)' if ext else ''}" for label, part, ext in parts)
        click.echo(
            f"  {f / 1e6:10.3f} MHz  path loss {loss:7.3f} dB  source {source_for(model, f, min(levels)):7.2f} .. "
            f"{source_for(model, f, max(levels)):7.2f} dBm" + (f"  [{detail}]" if len(parts) > 1 or parts[0][2] else "")
        )
    temps = p.temperatures()
    if temps and p.soak:
        from nightbench.plan.checks import least_soak_s

        click.echo(
            f"  chamber: {len(temps)} temperatures in this order: {', '.join(f'{t:g}' for t in temps)} degC "
            f"(reference {p.reference_c():g} degC, end at {p.soak.end_c:g} degC)"
        )
        click.echo(
            f"  soaks take at least {least_soak_s(p) / 60:.1f} min ({len(temps)} x stable_s {p.soak.stable_s:g} s), "
            f"plus the chamber's transitions; a soak not stable within timeout_s {p.soak.timeout_s:g} s fails the run"
        )


def _execute(loaded: Any, db: str, run_id: int | None) -> None:
    """Run (or resume) and exit with the contract's code."""
    from nightbench.measure.signals import EXIT_CODES, StopFlag
    from nightbench.runs import execute, new_run
    from nightbench.store.db import Store
    from nightbench.store.states import RunState

    store = Store(db)
    if run_id is None:
        run_id = new_run(store, loaded)
    stop = StopFlag().install()
    state, error = execute(loaded, store, run_id, stop)
    done = len(store.done_indices(run_id))
    total = store.run(run_id)["points_total"]
    click.echo(f"run {run_id} {state}: {done} of {total} points in {db}")
    if state == RunState.COMPLETED:
        return
    click.echo(f"nightbench: run {run_id} {state}: {error}", err=True)
    sys.exit(EXIT_CODES.get(stop.reason or "", 1) if state == RunState.INTERRUPTED else 1)


@main.command()
@click.argument("plan", type=click.Path(dir_okay=True))
@click.option("--db", help=DB_HELP)
@friendly
def run(plan: str, db: str | None) -> None:
    """Run PLAN now, in the foreground."""
    from nightbench.plan.load import load_plan

    loaded = load_plan(plan)  # bad input stops here: nothing written, nothing contacted
    _execute(loaded, _db(db), None)


@main.command()
@click.argument("run_id", type=int)
@click.option("--db", help=DB_HELP)
@friendly
def resume(run_id: int, db: str | None) -> None:
    """Continue RUN from its first missing point (after an interruption, a fault or a kill).

    The source is made safe (RF off) before anything else, the plan comes from the run's own
    snapshot (never the file on disk), and points already stored are never measured again."""
    from nightbench.runs import check_resumable, snapshot_plan
    from nightbench.store.db import Store

    store = Store(_db(db), create=False)
    check_resumable(store, run_id)
    loaded = snapshot_plan(store, run_id)
    store.close()
    _execute(loaded, _db(db), run_id)


@main.command()
@click.option("--db", help=DB_HELP)
@click.option("--json", "as_json", is_flag=True, help="machine-readable list")
@friendly
def runs(db: str | None, as_json: bool) -> None:
    """List runs (reads only: a mistyped --db is refused, not created)."""
    from nightbench.pushcli import push_marks

    store = _read_store(db)
    rows, marks = store.runs(), push_marks(store)  # marks: where a local run was pushed (shared store)
    if as_json:
        click.echo(json.dumps(rows, indent=1))
        return
    if not rows:
        click.echo("no runs yet")
    for r in rows:
        click.echo(
            f"{r['id']:5d}  {r['name']:<28} {r['state']:<12} {r['points_done']:>6}/{r['points_total']:<6} "
            f"{r['started_at'] or '-':<24} {r['finished_at'] or '-'}{marks.get(r['id'], '')}"
        )


@main.command(context_settings={"ignore_unknown_options": True, "allow_extra_args": True, "help_option_names": []})
@click.pass_context
def sim(ctx: click.Context) -> None:
    """Serve the simulated bench until SIGTERM/SIGINT; prints one JSON line of resources.

    Options: --source-port N, --meter-port N (0 = any free), --config FILE (TOML), --log FILE,
    --fault KIND@INSTRUMENT[:key=value,...] (repeatable), --seed N; `nightbench sim --help` for more.
    """
    from nightbench.simulators.server import main as sim_main

    sys.exit(sim_main(ctx.args, prog="nightbench sim"))


@main.command()
@click.option("--db", help=DB_HELP)
@click.option(
    "--temperature", is_flag=True, help="the over-temperature variant: a simulated chamber, three temperatures"
)
@click.option("--units", is_flag=True, help="a pilot lot of eight boards behind a simulated switch, judged by limits")
@friendly
def demo(db: str | None, temperature: bool, units: bool) -> None:
    """Start the simulated bench, run the demo plan on it, print the report."""
    from nightbench.demo import run_demo

    sys.exit(run_demo(_db(db), temperature=temperature, units=units))


# -- the overnight service (docs/service.md) -------------------------------------------------


@main.command()
@click.argument("plan", type=click.Path(dir_okay=True))
@click.option(
    "--at",
    "when",
    metavar="WHEN",
    help="earliest start: ISO 8601 local date-time (2026-03-04T22:30), or HH:MM = the next such time",
)
@click.option("--db", help=DB_HELP)
@friendly
def submit(plan: str, when: str | None, db: str | None) -> None:
    """Queue PLAN for `serve`: validated now, stored with the files it refers to, so later edits
    of the files do not change the job."""
    from nightbench.plan.load import load_plan
    from nightbench.service.queue import JobQueue
    from nightbench.service.when import parse_when
    from nightbench.store.db import Store

    not_before = parse_when(when) if when else None
    loaded = load_plan(plan)  # bad input stops here: nothing written
    job_id, shown = JobQueue(Store(_db(db))).submit(loaded, not_before)
    click.echo(f"job {job_id} queued: plan '{loaded.plan.name}', not before {shown}")


@main.command(name="queue")
@click.option("--db", help=DB_HELP)
@click.option("--json", "as_json", is_flag=True, help="machine-readable list")
@friendly
def queue_cmd(db: str | None, as_json: bool) -> None:
    """List jobs (and whether a service is serving this database); reads only."""
    from nightbench.service.queue import JobQueue

    queue = JobQueue(_read_store(db))
    rows = queue.jobs()
    if as_json:
        click.echo(json.dumps(rows, indent=1))
        return
    status = queue.service_status()
    if status is None:
        click.echo("service: never started on this database")
    else:
        where = f"pid {status['pid']} on {status['host']}, heartbeat {status['heartbeat_at']}"
        click.echo(f"service: {'serving' if status['alive'] else 'not running'} ({where})")
    from nightbench.pushcli import show_push_status

    show_push_status(queue.store)
    if not rows:
        click.echo("no jobs yet")
    for r in rows:
        run = f"run {r['run_id']}" if r["run_id"] else "-"
        click.echo(
            f"{r['id']:5d}  {r['name']:<28} {r['state']:<12} {r['not_before']:<26} {run:<10} "
            f"{r['points_done']:>6}/{r['points_total']:<6}{'  ' + r['error'] if r['error'] else ''}"
        )


@main.command()
@click.argument("job_id", metavar="JOB", type=int)
@click.option("--db", help=DB_HELP)
@click.option(
    "--wait",
    "wait_s",
    type=click.FloatRange(0, 3600),
    default=15.0,
    show_default=True,
    help="seconds to wait for a running job to stop",
)
@friendly
def cancel(job_id: int, db: str | None, wait_s: float) -> None:
    """Remove a waiting JOB from the queue, or stop a running one safely (after the current
    reading, RF off; its run stays interrupted and `resume` can continue it)."""
    import time

    from nightbench.service.queue import JobQueue
    from nightbench.store.db import Store
    from nightbench.store.states import JobState

    queue = JobQueue(Store(_db(db), create=False))  # writes the request, but never creates a database
    if queue.cancel(job_id) == JobState.CANCELLED:
        run_id = queue.job(job_id).run_id
        click.echo(
            f"job {job_id} cancelled: it will not run"
            + (f" again (run {run_id} stays interrupted; `nightbench resume {run_id}` continues it)" if run_id else "")
        )
        return
    status = queue.service_status()
    if not (status and status["alive"]):
        click.echo(
            f"job {job_id} will be cancelled: no service is running; the next `nightbench serve` "
            "switches its source off first and leaves its run interrupted"
        )
        return
    end = time.monotonic() + wait_s
    while (job := queue.job(job_id)).state == JobState.RUNNING and time.monotonic() < end:
        time.sleep(0.1)
    if job.state == JobState.RUNNING:
        _fail(f"job {job_id} asked to stop; the service has not confirmed within {wait_s:g} s", 1)
    click.echo(
        f"job {job_id} {job.state}"
        + (
            f" (run {job.run_id} interrupted, RF off)"
            if job.state == JobState.CANCELLED
            else " before the cancel took effect"
        )
    )


@main.command()
@click.option("--db", help=DB_HELP)
@click.option(
    "--poll",
    "poll_s",
    type=click.FloatRange(0.05, 60),
    default=1.0,
    show_default=True,
    help="seconds between looks at the queue when idle",
)
@click.option("--push-to", "push_to", metavar="URL", help="push each run to this shared store when it ends")
@click.option("--push-retry", "push_retry_s", type=click.FloatRange(0.1, 600), default=5.0, help="seconds to retry")
@friendly
def serve(db: str | None, poll_s: float, push_to: str | None, push_retry_s: float) -> None:
    """Run due jobs one at a time until SIGTERM/SIGINT; one service per database.

    On start, runs left running by a process that is gone get RF off first, then resume. A
    signal stops the run after the current reading, RF off, and exits 0; exit 2 if another
    service already serves the database.
    """
    from nightbench.service.serve import Service

    sys.exit(Service(_db(db), poll_s=poll_s, push_to=push_to, push_retry_s=push_retry_s).serve())


# commands in their own modules (cli.py stays under the size limit); they use friendly, _db and
# _read_store from here
from nightbench.calcli import calibrate  # noqa: E402
from nightbench.pushcli import push  # noqa: E402
from nightbench.reportcli import export, report  # noqa: E402

for _command in (push, report, export, calibrate):
    main.add_command(_command)
