"""Turn SIGINT/SIGTERM into a flag the engine checks between readings: the one place that installs
signal handlers (the CLI's `run`/`resume`, the demo and `serve` all come through `install`).

No exception is thrown into the middle of an instrument exchange: the engine stops after the
reading in progress, switches RF off over a link that is still in step, and records why.
"""

from __future__ import annotations

import signal
import threading
from types import FrameType

EXIT_CODES = {"SIGINT": 130, "SIGTERM": 143}


class StopFlag:
    """Set once, with the reason of the first setter. A child flag (`child()`) is also set when
    its parent is, but not the other way round: `serve` holds the signal-driven parent and gives
    each run a child, so a signal stops the run and the service while a cancel stops only the run."""

    def __init__(self) -> None:
        self._event = threading.Event()
        self._lock = threading.RLock()  # re-entrant: a signal handler may run while the main thread holds it
        self._children: list[StopFlag] = []
        self.reason: str | None = None

    def set(self, reason: str = "stop requested") -> None:
        with self._lock:
            if self.reason is None:
                self.reason = reason
            self._event.set()
            children = list(self._children)
        for child in children:
            child.set(reason)

    def is_set(self) -> bool:
        return self._event.is_set()

    def wait(self, seconds: float) -> bool:
        return self._event.wait(seconds)

    def child(self) -> StopFlag:
        """A new flag that this one sets too; already set if this one is. `release` it when done."""
        flag = StopFlag()
        with self._lock:
            self._children.append(flag)
            reason = self.reason if self._event.is_set() else None
        if reason is not None:
            flag.set(reason)
        return flag

    def release(self, child: StopFlag) -> None:
        """Stop passing this flag on to `child` (its run is over)."""
        with self._lock:
            self._children.remove(child)

    def install(self) -> StopFlag:
        """Route SIGINT and SIGTERM to this flag (main thread only); the reason is the signal's name."""

        def handler(signum: int, frame: FrameType | None) -> None:
            self.set(signal.Signals(signum).name)

        signal.signal(signal.SIGINT, handler)
        signal.signal(signal.SIGTERM, handler)
        return self
