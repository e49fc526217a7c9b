"""Start the simulated bench as a child process and learn its resource strings."""

from __future__ import annotations

import json
import select
import subprocess
import sys
from typing import Any

from nightbench.drivers.errors import InstrumentError


class SimProcess:
    """`with SimProcess() as sim: sim.resources["source"]` - stopped (SIGTERM) on exit."""

    def __init__(self, *extra_args: str, startup_s: float = 15.0) -> None:
        self.args = [sys.executable, "-m", "nightbench.simulators.server", *extra_args]
        self.startup_s = startup_s
        self.proc: subprocess.Popen[str] | None = None
        self.resources: dict[str, Any] = {}

    def __enter__(self) -> SimProcess:
        self.proc = subprocess.Popen(self.args, stdout=subprocess.PIPE, text=True)
        assert self.proc.stdout is not None
        ready, _, _ = select.select([self.proc.stdout], [], [], self.startup_s)
        line = self.proc.stdout.readline() if ready else ""
        if not line:
            self.stop()
            raise InstrumentError("the simulated bench did not start")
        self.resources = json.loads(line)
        return self

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()

    def __exit__(self, *exc: Any) -> None:
        self.stop()
