"""`serve --push-to`: each run is pushed to the shared store when it ends, from a thread of its own.

The night never waits for the network: the service only wakes this thread (`kick`) after a job,
and an unreachable server (or any other failure) is logged and tried again after a back-off that
doubles up to a ceiling; a success resets it. Every try is noted in the local file's
`push_status` (what `nightbench queue` shows), and what is pushed is whatever is finished and not
yet there (store/push.py), so runs that ended while the server was down follow with no manual step.
"""

from __future__ import annotations

import threading
import time

from nightbench.drivers.errors import NightbenchError
from nightbench.service.log import log
from nightbench.store.pg import mask_url
from nightbench.store.push import default_bench, note_status, pending, push

MAX_RETRY_S = 600.0  # the back-off stops doubling here: a server down all night is tried every 10 min


class Pusher(threading.Thread):
    def __init__(self, db: str, url: str, *, bench: str | None = None, first_retry_s: float = 5.0) -> None:
        super().__init__(name="push", daemon=True)
        self.db, self.url, self.first_retry_s = db, url, first_retry_s
        self.bench = bench or default_bench(db)
        self.target = mask_url(url)
        self.wake = threading.Event()
        self.stopping = threading.Event()

    def kick(self) -> None:
        """A run ended: push now (a retry that is waiting is brought forward)."""
        self.wake.set()

    def stop(self) -> None:
        self.stopping.set()
        self.wake.set()
        self.join(timeout=30)

    def run(self) -> None:
        delay = self.first_retry_s
        wait: float | None = 0.0  # push what is waiting at start-up
        while True:
            self.wake.wait(wait)
            self.wake.clear()
            if self.stopping.is_set():
                return
            if self._try(delay):
                delay, wait = self.first_retry_s, None
            else:
                wait, delay = delay, min(delay * 2, MAX_RETRY_S)

    def _try(self, retry_in_s: float) -> bool:
        try:
            done = push(self.db, self.url, bench=self.bench)
        except NightbenchError as exc:
            log("push-failed", level="warning", to=self.target, error=str(exc), retry_in_s=f"{retry_in_s:g}")
            try:
                retry_at = time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(time.time() + retry_in_s))
                note_status(self.db, self.target, self.bench, str(exc), retry_at, pending(self.db, self.target))
            except NightbenchError as note_exc:
                log("push-failed", level="warning", to=self.target, error=str(note_exc))
            return False
        log("push", to=self.target, bench=self.bench, runs=len(done.runs), points=done.points)
        try:
            note_status(self.db, self.target, self.bench, None, None, 0)
        except NightbenchError as exc:
            log("push-failed", level="warning", to=self.target, error=str(exc))
        return True
