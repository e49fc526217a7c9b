"""Runs left `running` by a process that is gone (a hard kill, a power cut): their source is made
safe before anything else happens on the bench, then the queue resumes them (invariant 2).

Only the source is opened here. With a chamber, the chamber is left for the resumed run, which
opens it after the source and soaks again before its first point (measure/engine.py): the
chamber may have drifted, or been switched off, while nobody watched.
"""

from __future__ import annotations

import os
import socket
import time
from collections.abc import Callable

from nightbench.drivers.errors import NightbenchError
from nightbench.plan.load import LoadedPlan
from nightbench.runs import snapshot_plan
from nightbench.service.liveness import owner_gone
from nightbench.service.queue import JobQueue, points_text
from nightbench.store.db import Store

Log = Callable[..., None]


def make_source_safe(loaded: LoadedPlan) -> None:
    """Open only the source and switch RF off: opening it does exactly that first (its configure()
    sends nothing but error-queue queries before OUTPut OFF), and nothing else is sent."""
    from nightbench.measure.roles import open_source

    source = open_source(loaded.plan.instruments.source)
    source.close()


def abandoned_runs(store: Store) -> list[int]:
    now = time.time()
    rows = store.conn.execute("SELECT id, pid, host, heartbeat_at FROM runs WHERE state='running' ORDER BY id")
    return [r["id"] for r in rows if owner_gone(r["pid"], r["host"], r["heartbeat_at"], now)]


def recover(store: Store, queue: JobQueue, log: Log) -> None:
    """Make every abandoned run's source safe and mark the run interrupted (failed if RF could not
    be switched off), give jobs left `running` their run's state, and queue abandoned runs that no
    job owns, so that the service resumes them from their first missing point."""
    me = f"serve pid {os.getpid()} on {socket.gethostname()}"
    for run_id in abandoned_runs(store):
        row = store.run(run_id)
        owner = f"pid {row['pid']} on {row['host']}"
        log("recover", run=run_id, owner=owner, points=points_text(store, run_id))
        try:
            make_source_safe(snapshot_plan(store, run_id))
        except NightbenchError as exc:
            error = f"its process ({owner}) was gone and RF could not be switched off: {exc}"
            store.finish_run(run_id, "failed", error)
            store.event(run_id, "failed", error)
            log("unsafe", level="error", run=run_id, error=str(exc))
            continue
        message = f"its process ({owner}) was gone; RF switched off by {me}"
        store.finish_run(run_id, "interrupted", message)
        store.event(run_id, "recovered", message)
        log("safe", run=run_id, rf="off")
        if queue.job_of_run(run_id) is None:
            log("adopt", run=run_id, job=queue.adopt(run_id))
    for job in queue.settle_orphans():
        log("orphan", job=job.id, run=job.run_id, state=job.state)
