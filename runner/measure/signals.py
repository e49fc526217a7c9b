"""Turn SIGINT/SIGTERM into a flag the engine checks between readings.

No exception is thrown into the middle of an instrument exchange: the engine stops after the
reading in progress, switches RF off over a link that is still in step, and records why.
"""

from __future__ import annotations

import signal
import threading
from types import FrameType

EXIT_CODES = {"SIGINT": 130, "SIGTERM": 143}


class StopFlag:
    def __init__(self) -> None:
        self._event = threading.Event()
        self.reason: str | None = None

    def set(self, reason: str = "stop requested") -> None:
        if self.reason is None:
            self.reason = reason
        self._event.set()

    def is_set(self) -> bool:
        return self._event.is_set()

    def wait(self, seconds: float) -> bool:
        return self._event.wait(seconds)

    def install(self) -> StopFlag:
        """Route SIGINT and SIGTERM to this flag (main thread only)."""
        def handler(signum: int, frame: FrameType | None) -> None:
            self.set(signal.Signals(signum).name)

        signal.signal(signal.SIGINT, handler)
        signal.signal(signal.SIGTERM, handler)
        return self
