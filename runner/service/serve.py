"""`nightbench serve`: run due jobs one at a time until told to stop; one service per database.

On start it takes the database's service lock (a second `serve` refuses, exit 2), makes the
source of every abandoned run safe and queues those runs again (service/recovery.py), then runs
jobs in order: resumptions first, then by not-before, then by submission. SIGTERM/SIGINT stop the
run after the reading in progress, with RF off, leaving it `interrupted` for the next `serve` to
resume; the service then exits 0 (a signal is how a service is told to stop). Each event is one
line on stderr (service/log.py).
"""

from __future__ import annotations

import fcntl
import os
import socket
import threading
import time
from typing import Any

from nightbench.drivers.errors import InputError, NightbenchError
from nightbench.measure.signals import StopFlag
from nightbench.service.log import log
from nightbench.service.queue import Job, JobQueue, points_text
from nightbench.store.db import Store
from nightbench.store.errors import StoreError
from nightbench.store.pg import is_pg_url, mask_url
from nightbench.store.states import JobState, RunState

CANCELLED = "cancel"  # the stop reason a `nightbench cancel` gives the engine
WATCH_POLL_S = 0.2  # how often a running job looks for a cancel
HEARTBEAT_S = 2.0  # how often the service and its run write their heartbeat


class ServiceLock:
    """An exclusive lock on a file beside the database, held while `serve` runs. The kernel drops
    it when the process ends in any way (SIGKILL and power loss included), so there is never a
    stale lock to clean up; the file itself stays (removing it would race with the next taker)."""

    def __init__(self, db: str) -> None:
        self.db = db
        self.path = f"{db}.serve-lock"
        self.fd: int | None = None

    def acquire(self) -> ServiceLock:
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise InputError(f"cannot create the service lock {self.path}: {exc.strerror}", file=self.db) from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.read(fd, 200).decode(errors="replace").strip() or "another process"
            os.close(fd)
            raise InputError(
                f"another `nightbench serve` ({holder}) is already serving this database; "
                "one service per bench, so this one does not start",
                file=self.db,
            ) from None
        os.ftruncate(fd, 0)
        os.write(fd, f"pid {os.getpid()} on {socket.gethostname()}\n".encode())
        self.fd = fd
        return self

    def release(self) -> None:
        if self.fd is not None:
            os.close(self.fd)
            self.fd = None


class Watch(threading.Thread):
    """Beside a running job: turns a `cancel` into the engine's stop flag (the engine then stops
    after the current reading, RF off) and keeps the service's and the run's heartbeats fresh.
    Its own connection, so it never waits on the engine's. If the database fails it otherwise, a
    run nobody can cancel must not go on unwatched: the run is stopped (RF off, resumable)."""

    def __init__(self, db: str, job_id: int, run_id: int, stop: StopFlag) -> None:
        super().__init__(name=f"watch-job-{job_id}", daemon=True)
        self.db, self.job_id, self.run_id, self.stop = db, job_id, run_id, stop
        self.done = threading.Event()

    def run(self) -> None:
        store: Store | None = None
        try:
            store = Store(self.db, create=False)
            self._watch(JobQueue(store))
        except NightbenchError as exc:
            log("watch", level="error", job=self.job_id, error=str(exc))
            self.stop.set(f"the service could not watch the job ({exc})")
        finally:
            if store is not None:
                store.close()

    def _watch(self, queue: JobQueue) -> None:
        last_beat = time.monotonic()
        while not self.done.wait(WATCH_POLL_S):
            try:
                if queue.cancel_requested(self.job_id):
                    self.stop.set(CANCELLED)
                if time.monotonic() - last_beat >= HEARTBEAT_S:
                    queue.heartbeat(self.run_id)
                    last_beat = time.monotonic()
            except StoreError as exc:
                if not exc.busy:
                    raise
                # another connection held the write lock past the timeout: look again next round
                log("watch", level="warning", job=self.job_id, error=str(exc))

    def __enter__(self) -> Watch:
        self.start()
        return self

    def __exit__(self, *exc: Any) -> None:
        self.done.set()
        self.join()


class Service:
    def __init__(self, db: str, poll_s: float = 1.0, push_to: str | None = None, push_retry_s: float = 5.0) -> None:
        self.db = db
        self.poll_s = poll_s
        if push_to is not None and not is_pg_url(push_to):  # before the lock: bad input changes nothing
            raise InputError(f"--push-to takes a postgresql:// URL, not {mask_url(push_to)!r}")
        self.push_to = push_to  # the shared store each run is pushed to when it ends (service/pushing.py)
        self.push_retry_s = push_retry_s
        self.pusher: Any = None
        self.stop = StopFlag()  # set by SIGTERM/SIGINT; each job's run gets a child of it
        self._waiting_for: int | None = None
        self._last_beat = time.monotonic()

    def serve(self) -> int:
        lock = ServiceLock(self.db).acquire()  # before anything is read, written or contacted
        self.stop.install()
        store = Store(self.db)
        queue = JobQueue(store)
        queue.service_started()
        log("start", pid=os.getpid(), host=socket.gethostname(), db=os.path.abspath(self.db))
        try:
            from nightbench.service.recovery import recover

            recover(store, queue, log)
            if self.push_to:
                from nightbench.service.pushing import Pusher

                self.pusher = Pusher(self.db, self.push_to, first_retry_s=self.push_retry_s)
                self.pusher.start()
            while not self.stop.is_set():
                job = queue.next_due(time.time())
                if job is None:
                    self._idle(queue)
                    continue
                self._waiting_for = None
                self._run_job(store, queue, job)
        finally:
            if self.pusher is not None:
                self.pusher.stop()
            queue.service_stopped()
            store.close()
            lock.release()
            log("stop", reason=self.stop.reason or "error")
        return 0

    def _idle(self, queue: JobQueue) -> None:
        later = queue.next_later()
        wait = self.poll_s
        if later is not None:
            job, at = later
            wait = max(0.0, min(wait, at - time.time()))
            if job.id != self._waiting_for:
                log("wait", job=job.id, plan=job.plan_name, not_before=job.not_before)
                self._waiting_for = job.id
        if time.monotonic() - self._last_beat >= HEARTBEAT_S:
            queue.heartbeat()
            self._last_beat = time.monotonic()
        self.stop.wait(wait)

    def _run_job(self, store: Store, queue: JobQueue, job: Job) -> None:
        from nightbench.measure.engine import Engine
        from nightbench.plan.due import check_calibration_due
        from nightbench.runs import new_run, snapshot_plan, store_fits

        try:
            loaded = snapshot_plan(store, job.run_id) if job.run_id else queue.plan(job)
            if not job.run_id:  # a job starting: its instruments' calibration dates, as of today
                check_calibration_due(loaded)
            run_id = job.run_id or new_run(store, loaded)
        except InputError as exc:  # a snapshot this version cannot read: the job fails, the night goes on
            queue.finish(job.id, JobState.FAILED, str(exc))
            log("job-end", level="error", job=job.id, state=JobState.FAILED, error=str(exc))
            return
        queue.start(job.id, run_id)
        log(
            "job-resume" if job.run_id else "job-start",
            job=job.id,
            run=run_id,
            plan=job.plan_name,
            points=points_text(store, run_id),
        )
        run_stop = self.stop.child()  # a signal stops the run and the service; a cancel only the run
        try:
            with Watch(self.db, job.id, run_id, run_stop):
                state, error = Engine(loaded, store, run_id, run_stop).run()
        finally:
            self.stop.release(run_stop)
        if state == RunState.COMPLETED:
            store_fits(store, run_id)
        job_state = JobState(state)
        if state == RunState.INTERRUPTED and run_stop.reason == CANCELLED:
            job_state, error = JobState.CANCELLED, f"cancelled while running; run {run_id} stays interrupted"
        queue.finish(job.id, job_state, error)
        if self.pusher is not None:
            self.pusher.kick()
        log(
            "job-end",
            level="error" if job_state == JobState.FAILED else "info",
            job=job.id,
            run=run_id,
            state=job_state,
            points=points_text(store, run_id),
            error=error,
        )
