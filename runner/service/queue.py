"""The overnight queue: jobs in the store, each a plan snapshot waiting for `serve`.

A job keeps the plan's text and the texts of the files it refers to as they were at `submit`, so
editing the plan file later changes nothing about what runs overnight. A job's state follows its
run (queued -> running -> completed / interrupted / failed), plus `cancelled`. The `service` row
is the heartbeat of the one `serve` of this database. The jobs and service tables are this
module's own, so, like the store's methods, it turns sqlite3's exceptions into a StoreError
naming the file (`busy` when another process holds the database).
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import sqlite3
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING, Any

from nightbench.drivers.errors import InputError
from nightbench.service.liveness import owner_gone
from nightbench.store.db import Store, now_iso
from nightbench.store.errors import StoreError, is_busy
from nightbench.store.states import JOB_FINISHED, JOB_PENDING, JobState, RunState, ServiceState, sql_in

if TYPE_CHECKING:  # the plan model (pydantic) is imported only where a plan is read: `queue` stays quick
    from nightbench.plan.load import LoadedPlan


@dataclass(frozen=True)
class Job:
    id: int
    plan_name: str
    plan_file: str | None
    state: JobState
    not_before: str
    run_id: int | None
    cancel_requested: bool


class JobQueue:
    def __init__(self, store: Store) -> None:
        self.store = store
        self.conn = store.conn

    @contextlib.contextmanager
    def _sql(self, doing: str) -> Iterator[None]:
        try:
            yield
        except sqlite3.Error as exc:
            raise StoreError(f"{doing}: {exc}", file=self.store.path, busy=is_busy(exc)) from exc

    # -- submit, list ---------------------------------------------------------------------
    def submit(self, loaded: LoadedPlan, not_before: datetime | None = None) -> tuple[int, str]:
        """Queue a validated plan; (job id, not-before as local ISO text). Default: due now."""
        from nightbench.measure.sweep import expand

        at = (not_before or datetime.now()).astimezone()
        shown = at.isoformat(timespec="seconds")
        with self._sql("queueing a job"), self.store.transaction():
            cur = self.conn.execute(
                "INSERT INTO jobs (plan_name, plan_file, plan_text, files_json, points_total, not_before,"
                " not_before_ts, submitted_at, state) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    loaded.plan.name,
                    os.path.abspath(loaded.file),
                    loaded.text,
                    json.dumps(loaded.files),
                    len(expand(loaded)),
                    shown,
                    at.timestamp(),
                    now_iso(),
                    JobState.QUEUED,
                ),
            )
        return _new_id(cur), shown

    def adopt(self, run_id: int) -> int:
        """A job for a run that was started outside the queue (a killed `nightbench run`), so the
        service resumes it like its own."""
        row = self.store.run(run_id)
        files = self.store.run_files(run_id)
        at = datetime.now().astimezone()
        with self._sql(f"queueing run {run_id} again"), self.store.transaction():
            cur = self.conn.execute(
                "INSERT INTO jobs (plan_name, plan_file, plan_text, files_json, points_total, not_before,"
                " not_before_ts, submitted_at, state, run_id) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    row["name"],
                    row["plan_file"],
                    row["plan_text"],
                    json.dumps(files),
                    row["points_total"],
                    at.isoformat(timespec="seconds"),
                    at.timestamp(),
                    now_iso(),
                    JobState.INTERRUPTED,
                    run_id,
                ),
            )
        return _new_id(cur)

    def job(self, job_id: int) -> Job:
        with self._sql(f"reading job {job_id}"):
            row = self.conn.execute("SELECT * FROM jobs WHERE id=?", (job_id,)).fetchone()
        if row is None:
            raise InputError(f"there is no job {job_id}", file=self.store.path)
        return _job(row)

    def jobs(self) -> list[dict[str, Any]]:
        """Every job, oldest first, with its run's progress (`queue --json`); none in a file from
        before the queue existed (opened read-only, so not brought up to date)."""
        if self.store.absent("jobs"):
            return []
        with self._sql("listing the jobs"):
            rows = self.conn.execute(
                "SELECT j.*, COALESCE(c.points_done, 0) AS points_done FROM jobs j"
                " LEFT JOIN run_counts c ON c.run_id = j.run_id ORDER BY j.id"
            ).fetchall()
        return [
            {
                "id": r["id"],
                "name": r["plan_name"],
                "state": r["state"],
                "not_before": r["not_before"],
                "submitted_at": r["submitted_at"],
                "run_id": r["run_id"],
                "points_done": r["points_done"],
                "points_total": r["points_total"],
                "error": r["error"],
            }
            for r in rows
        ]

    def job_of_run(self, run_id: int) -> Job | None:
        with self._sql(f"looking for the job of run {run_id}"):
            row = self.conn.execute("SELECT * FROM jobs WHERE run_id=? ORDER BY id DESC", (run_id,)).fetchone()
        return _job(row) if row else None

    def plan(self, job: Job) -> LoadedPlan:
        """The job's plan exactly as submitted: its text and files, never the disk."""
        from nightbench.plan.load import parse_plan

        with self._sql(f"reading the plan of job {job.id}"):
            row = self.conn.execute("SELECT plan_text, files_json FROM jobs WHERE id=?", (job.id,)).fetchone()
        return parse_plan(
            row["plan_text"], job.plan_file or f"job {job.id} plan snapshot", files=json.loads(row["files_json"])
        )

    # -- what serve does ------------------------------------------------------------------
    def next_due(self, now_ts: float) -> Job | None:
        """The job to run now: resumptions first (finish what was started), then by not-before,
        then by submission."""
        with self._sql("looking for the next job"):
            row = self.conn.execute(
                f"SELECT * FROM jobs WHERE state IN {sql_in(JOB_PENDING)} AND not_before_ts <= ?"
                " ORDER BY state = ?, not_before_ts, id LIMIT 1",
                (now_ts, JobState.QUEUED),
            ).fetchone()
        return _job(row) if row else None

    def next_later(self) -> tuple[Job, float] | None:
        """The pending job that comes due first, and when (epoch seconds)."""
        with self._sql("looking for the next job"):
            row = self.conn.execute(
                f"SELECT * FROM jobs WHERE state IN {sql_in(JOB_PENDING)} ORDER BY not_before_ts, id LIMIT 1"
            ).fetchone()
        return (_job(row), row["not_before_ts"]) if row else None

    def start(self, job_id: int, run_id: int) -> None:
        with self._sql(f"starting job {job_id}"):
            self.conn.execute(
                "UPDATE jobs SET state=?, run_id=?, error=NULL WHERE id=?", (JobState.RUNNING, run_id, job_id)
            )

    def finish(self, job_id: int, state: str, error: str | None = None) -> None:
        with self._sql(f"storing the end of job {job_id}"):
            self.conn.execute("UPDATE jobs SET state=?, error=? WHERE id=?", (JobState(state), error, job_id))

    def settle_orphans(self) -> list[Job]:
        """Jobs left `running` by a service that is gone take their run's state (recovery has already
        dealt with the run itself); returns them as they are now."""
        with self._sql("looking for jobs a service left running"):
            rows = self.conn.execute("SELECT * FROM jobs WHERE state=?", (JobState.RUNNING,)).fetchall()
        changed = []
        for row in rows:
            run_state = RunState(self.store.run(row["run_id"])["state"]) if row["run_id"] else RunState.QUEUED
            state = JobState.INTERRUPTED if run_state == RunState.RUNNING else JobState(run_state)
            if row["cancel_requested"] and state not in JOB_FINISHED:
                state = JobState.CANCELLED
            self.finish(row["id"], state, row["error"])
            changed.append(self.job(row["id"]))
        return changed

    def cancel(self, job_id: int) -> str:
        """'cancelled' for a job that was waiting (it will not run), 'stopping' for one that is
        running (its service stops it after the current reading)."""
        with self._sql(f"cancelling job {job_id}"), self.store.transaction():
            job = self.job(job_id)
            if job.state in JOB_FINISHED:
                raise InputError(f"job {job_id} is already {job.state}; there is nothing to cancel")
            if job.state == JobState.RUNNING:
                self.conn.execute("UPDATE jobs SET cancel_requested=1 WHERE id=?", (job_id,))
                return "stopping"
            self.conn.execute("UPDATE jobs SET state=?, cancel_requested=1 WHERE id=?", (JobState.CANCELLED, job_id))
            return JobState.CANCELLED

    def cancel_requested(self, job_id: int) -> bool:
        """Polled often beside a running job: reads one column, not the job's plan snapshot."""
        with self._sql(f"reading job {job_id}"):
            row = self.conn.execute("SELECT cancel_requested FROM jobs WHERE id=?", (job_id,)).fetchone()
        if row is None:  # jobs are never deleted: a missing one is a caller's mistake, not "no"
            raise InputError(f"there is no job {job_id}", file=self.store.path)
        return bool(row[0])

    # -- the service's heartbeat ----------------------------------------------------------
    def service_started(self) -> None:
        now = now_iso()
        with self._sql("registering the service"):
            self.conn.execute(
                "INSERT OR REPLACE INTO service (id, pid, host, state, started_at, heartbeat_at)"
                " VALUES (1, ?, ?, ?, ?, ?)",
                (os.getpid(), socket.gethostname(), ServiceState.SERVING, now, now),
            )

    def heartbeat(self, run_id: int | None = None) -> None:
        now = now_iso()
        with self._sql("storing the heartbeat"), self.store.transaction():
            self.conn.execute("UPDATE service SET heartbeat_at=? WHERE id=1", (now,))
            if run_id is not None:
                self.conn.execute("UPDATE runs SET heartbeat_at=? WHERE id=?", (now, run_id))

    def service_stopped(self) -> None:
        with self._sql("storing the service's stop"):
            self.conn.execute(
                "UPDATE service SET state=?, heartbeat_at=? WHERE id=1", (ServiceState.STOPPED, now_iso())
            )

    def service_status(self) -> dict[str, Any] | None:
        """The last service of this database: pid, host, state, started_at, heartbeat_at, and
        `alive` (serving, and its process is still there); None if none ever served it."""
        if self.store.absent("service"):
            return None
        with self._sql("reading the service's heartbeat"):
            row = self.conn.execute("SELECT * FROM service WHERE id=1").fetchone()
        if row is None:
            return None
        status = dict(row)
        status["alive"] = row["state"] == ServiceState.SERVING and not owner_gone(
            row["pid"], row["host"], row["heartbeat_at"]
        )
        return status


def points_text(store: Store, run_id: int) -> str:
    """'done/total' points of a run, for log lines."""
    return f"{len(store.done_indices(run_id))}/{store.run(run_id)['points_total']}"


def _job(row: Any) -> Job:
    return Job(
        row["id"],
        row["plan_name"],
        row["plan_file"],
        JobState(row["state"]),
        row["not_before"],
        row["run_id"],
        bool(row["cancel_requested"]),
    )


def _new_id(cur: sqlite3.Cursor) -> int:
    """The id of the row an INSERT just made (sqlite3 sets lastrowid after every INSERT)."""
    if cur.lastrowid is None:
        raise AssertionError("an INSERT left no row id")
    return cur.lastrowid
