"""Shared fixtures: a simulated bench in its own process, plan files, a database path, the CLI."""

from __future__ import annotations

import json
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import yaml

from nightbench.simproc import SimProcess

DATA = Path(__file__).parent / "data"


def source_log(path: Path) -> list[dict[str, Any]]:
    """The simulator's log of source state changes (one JSON object per change)."""
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def sim_toml(config: dict[str, dict[str, Any]]) -> str:
    """A simulator config file's text from {section: {key: value}} (values as JSON, which TOML reads)."""
    out = []
    for section, values in config.items():
        out.append(f"[{section}]")
        out += [f"{k} = {json.dumps(v)}" for k, v in values.items()]
    return "\n".join(out) + "\n"


def wait_until(condition: Callable[[], Any], what: str, timeout_s: float = 10.0, poll_s: float = 0.01) -> Any:
    """Poll `condition` until it is truthy and return its value; fail naming `what` after
    `timeout_s`. For tests that wait for an event, not for an amount of time."""
    import time

    deadline = time.monotonic() + timeout_s
    while not (value := condition()):
        assert time.monotonic() < deadline, f"timed out after {timeout_s:g} s waiting for {what}"
        time.sleep(poll_s)
    return value


def output_settled(model: Any, tolerance_v: float) -> bool:
    """Whether a simulated bench's detector output (in-process, clock time.monotonic) is within
    `tolerance_v` of where it is heading: the event a test waits for after setting the source."""
    import time

    return abs(model.output.value(time.monotonic()) - model.steady_output_v()) < tolerance_v


def assert_never_above(path: Path, ceiling_dbm: float) -> None:
    """Invariant 1 from outside: the true DUT-plane level the simulator saw, whenever RF was on."""
    levels = [e["dut_dbm"] for e in source_log(path) if e["output"] and e["dut_dbm"] is not None]
    assert not levels or max(levels) <= ceiling_dbm + 1e-6, f"DUT saw {max(levels)} dBm > {ceiling_dbm}"


class RunningBench:
    def __init__(self, proc: SimProcess, log: Path) -> None:
        self.proc = proc
        self.resources = proc.resources
        self.log = log
        self.ceiling_dbm = 0.0  # plan_dict's limits.dut_max_dbm; a test with another sets this

    def events(self) -> list[dict[str, Any]]:
        return source_log(self.log)


@pytest.fixture
def bench(tmp_path: Path):
    """A fresh simulated bench (default physics) in a separate process, with an instrument log;
    afterwards the log is checked: the DUT never saw more than the plan's ceiling."""
    log = tmp_path / "source-log.jsonl"
    with SimProcess("--log", str(log)) as proc:
        running = RunningBench(proc, log)
        yield running
    assert_never_above(log, running.ceiling_dbm)


def plan_dict(resources: dict[str, str], **overrides: Any) -> dict[str, Any]:
    """A small valid plan for the simulated bench; top-level sections replaced by overrides."""
    plan: dict[str, Any] = {
        "name": "test-plan",
        "dut": {"id": "T-1"},
        "instruments": {
            "source": {"driver": "scpi-source", "resource": resources["source"], "timeout_s": 2},
            "meter": {"driver": "scpi-dmm", "resource": resources["meter"], "nplc": 0.1},
        },
        "path": {"loss_db": 6.28},
        "limits": {"dut_max_dbm": 0},
        "sweep": {"frequency_hz": [100e6], "power_dbm": {"start": -70, "stop": -10, "step": 5}},
        "settle": {"tolerance_v": 0.0005, "timeout_s": 2},
        "measure": {"samples": 4},
        "analysis": {"fit_dbm": [-60, -20], "error_limit_db": 1.0},
    }
    plan.update(overrides)
    return plan


OFFLINE = {"source": "TCPIP::127.0.0.1::1::SOCKET", "meter": "TCPIP::127.0.0.1::2::SOCKET"}


@pytest.fixture
def write_plan(tmp_path: Path):
    def write(plan: dict[str, Any] | str, name: str = "plan.yaml") -> Path:
        path = tmp_path / name
        path.write_text(plan if isinstance(plan, str) else yaml.safe_dump(plan, sort_keys=False))
        return path

    return write


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "test.db"


def cli(*args: str, timeout: float = 120, **kwargs: Any) -> subprocess.CompletedProcess[str]:
    """Run the real command line in a child process."""
    return subprocess.run(
        [sys.executable, "-m", "nightbench", *args], capture_output=True, text=True, timeout=timeout, **kwargs
    )


@pytest.fixture
def inproc_bench():
    """Factory: a simulated bench served from threads of this process (for simulator tests that
    need its internals); every bench made is stopped at the end of the test."""
    from nightbench.simulators.physics import BenchConfig
    from nightbench.simulators.server import Bench

    made = []

    def make(config: BenchConfig | None = None, **kwargs: Any) -> Bench:
        b = Bench(config or BenchConfig(), **kwargs)
        b.start()
        made.append(b)
        return b

    yield make
    for b in made:
        b.stop()


def session(resource: str, timeout_s: float = 2.0, name: str = "instrument"):
    """A real pyvisa-py session to a simulated instrument."""
    from nightbench.drivers.scpi import ScpiSession
    from nightbench.drivers.transport import open_transport

    return ScpiSession(open_transport(resource, timeout_s=timeout_s), name)


def store_run(
    db: Path,
    law: Callable[[float, float], float],
    *,
    dut_id: str = "T-1",
    frequencies: list[float] | None = None,
    levels: list[float] | None = None,
    analysis: dict[str, Any] | None = None,
    stdev_v: float | None = 1e-4,
    status: Callable[[float, float], str] | None = None,
) -> int:
    """A completed run written through the real plan loader and Store, from a known law V(P, f).

    For checks whose expected values follow from the law by arithmetic (differences between two
    boards, what the views return); `status(P, f)` may mark a point "unsettled" or "overload".
    """
    from nightbench.measure.sweep import expand
    from nightbench.plan.load import parse_plan
    from nightbench.runs import new_run
    from nightbench.store.db import PointResult, Store

    sweep = {
        "frequency_hz": frequencies or [100e6],
        "power_dbm": levels if levels is not None else {"start": -80, "stop": 0, "step": 2},
    }
    plan = plan_dict(OFFLINE, dut={"id": dut_id}, sweep=sweep, **({"analysis": analysis} if analysis else {}))
    loaded = parse_plan(yaml.safe_dump(plan, sort_keys=False), "synthetic.yaml")
    store = Store(db)
    run_id = new_run(store, loaded)
    store.mark_running(run_id)
    for point in expand(loaded):
        kind = status(point.power_dbm, point.frequency_hz) if status else "ok"
        value = None if kind == "overload" else law(point.power_dbm, point.frequency_hz)
        result = PointResult(
            value,
            stdev_v if value is not None else None,
            4 if value is not None else 0,
            0.01,
            3,
            kind == "ok",
            kind == "overload",
            [(0.01, value, "measure")],
        )
        store.add_point(run_id, point, result)
    store.finish_run(run_id, "completed")
    store.close()
    return run_id
