"""Temperature: the chamber role, the soak rule, and the plan keys, against the simulated chamber
(its own TCP port, a thermal model in accelerated time). Safety under signals and faults is in
test_temperature_safety.py; the analysis over temperature in test_temperature_report.py."""

from __future__ import annotations

import json
import sqlite3
import time
from pathlib import Path
from typing import Any

import pytest

from nightbench.drivers.chamber import ScpiChamber
from nightbench.drivers.errors import SafetyError, ScpiError
from nightbench.drivers.transport import Link
from nightbench.measure.signals import StopFlag
from nightbench.measure.soak import SoakTimeout, soak
from nightbench.plan.model import Soak
from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig
from tests.conftest import cli, plan_dict, source_log
from tests.test_bad_input import Tripwire

TIME_SCALE = "300"  # simulated chamber seconds per real second: a 35 degC step soaks in ~4 s


def temp_plan(resources: dict[str, Any], temps: list[float], **soak: float) -> dict[str, Any]:
    """plan_dict with a chamber, a short soak (seconds in accelerated time) and few levels."""
    plan = plan_dict(
        resources,
        sweep={"temperature_c": temps, "frequency_hz": [100e6], "power_dbm": {"start": -60, "stop": -10, "step": 10}},
        soak={"tolerance_c": 0.5, "stable_s": 2.0, "timeout_s": 20.0, "end_c": 25.0, **soak},
        analysis={"fit_dbm": [-50, -20], "error_limit_db": 1.0},
    )
    plan["instruments"]["chamber"] = {
        "driver": "scpi-chamber",
        "resource": resources["chamber"],
        "timeout_s": 0.5,
        "min_c": -40,
        "max_c": 85,
    }
    return plan


@pytest.fixture
def chamber_bench(tmp_path: Path):
    """A simulated bench with the chamber in accelerated time, and its instrument log."""
    log = tmp_path / "bench-log.jsonl"
    with SimProcess("--log", str(log), "--chamber-time-scale", TIME_SCALE) as proc:
        proc.log = log  # type: ignore[attr-defined]
        yield proc


def chamber_of(inproc_bench, scale: float = 300.0, faults: list[dict] | None = None):
    config = BenchConfig()
    config.chamber.time_scale = scale
    config.faults = faults or []
    bench = inproc_bench(config, serial=False)
    chamber = ScpiChamber.open(Link(bench.resources()["chamber"], timeout_s=1.0), min_c=-40, max_c=85)
    chamber.prove()
    chamber.configure()
    return bench, chamber


def test_chamber_role_sets_reads_back_and_refuses_beyond_its_limits(inproc_bench):
    bench, chamber = chamber_of(inproc_bench)
    chamber.set_temperature(-12.5)
    assert chamber.setpoint_c == -12.5
    assert bench.model.thermal.setpoint_c == -12.5  # what the simulated chamber holds
    assert "Simulated Chamber" in chamber.identity
    assert abs(chamber.temperature() - 25.0) < 1.0  # conditioning is off: still the room
    with pytest.raises(SafetyError):
        chamber.set_temperature(90.0)  # beyond max_c: refused before anything is sent
    assert bench.model.thermal.setpoint_c == -12.5
    chamber.close()


def test_a_refused_setpoint_is_an_error_with_its_scpi_code(inproc_bench):
    # SCPI-1999 21.8: -222 "Data out of range"
    bench, chamber = chamber_of(inproc_bench, faults=[{"kind": "refuse_setpoint", "instrument": "chamber"}])
    with pytest.raises(ScpiError) as info:
        chamber.set_temperature(40.0)
    assert info.value.scpi_code == -222
    assert bench.model.thermal.setpoint_c == 25.0
    chamber.set_temperature(40.0)  # the fault fired once
    chamber.close()


def test_soak_waits_out_the_overshoot(inproc_bench):
    """A chamber swinging through the setpoint is not a chamber holding it: the count restarts at
    every reading outside the band, and ends only after stable_s inside without a break."""
    bench, chamber = chamber_of(inproc_bench)
    rule = Soak(tolerance_c=0.5, stable_s=2.0, timeout_s=20.0, end_c=25.0)
    readings: list[tuple[float, float]] = []
    assert soak(chamber, rule, -40.0, StopFlag(), readings, started=time.monotonic())
    beyond = [t for t, v in readings if v < -40.5]
    assert beyond, "the simulated chamber overshoots a 65 degC step by more than the tolerance"
    last_out = max(t for t, v in readings if abs(v + 40.0) > 0.5)
    inside = [(t, v) for t, v in readings if t > last_out]
    assert inside[-1][0] - inside[0][0] >= 2.0 - 0.2  # held stable_s (to one poll) after the last swing out
    assert all(abs(v + 40.0) <= 0.5 for _, v in inside)
    # with stable_s this long the DUT has caught up with the air (docs/temperature.md)
    assert abs(bench.model.thermal.dut_c + 40.0) < 1.0
    chamber.close()


def test_soak_times_out_with_the_last_readings(inproc_bench):
    _, chamber = chamber_of(
        inproc_bench, faults=[{"kind": "drift", "instrument": "chamber", "after": 6, "rate_c_per_s": 2.0}]
    )
    rule = Soak(tolerance_c=0.5, stable_s=1.0, timeout_s=2.0, end_c=25.0)
    readings: list[tuple[float, float]] = []
    with pytest.raises(SoakTimeout) as info:
        soak(chamber, rule, 25.0, StopFlag(), readings, started=time.monotonic())
    message = str(info.value)
    assert "last readings" in message
    assert f"{readings[-1][1]:.2f}" in message
    assert readings[-1][0] >= 2.0
    chamber.close()


def test_check_prints_the_least_soak_time(chamber_bench, write_plan):
    plan = temp_plan(chamber_bench.resources, [25, -40, 85], stable_s=600, timeout_s=5400)
    result = cli("check", str(write_plan(plan)))
    assert result.returncode == 0, result.stderr
    assert "25, -40, 85 degC" in result.stdout
    assert "at least 30.0 min (3 x stable_s 600 s)" in result.stdout  # 3 x 600 s = 30 min


@pytest.mark.parametrize(
    "change, key",
    [
        (lambda p: p["sweep"].update(temperature_c=[25, 90]), "sweep.temperature_c.1"),
        (lambda p: p["sweep"].update(temperature_c=[-45, 25]), "sweep.temperature_c.0"),
        (lambda p: p["soak"].update(end_c=100), "soak.end_c"),
        (lambda p: p["analysis"].update(reference_c=30), "analysis.reference_c"),
        (lambda p: p.pop("soak"), "sweep"),
        (lambda p: p["instruments"].pop("chamber"), "sweep.temperature_c"),
    ],
)
def test_temperatures_out_of_limits_are_refused_and_nothing_is_contacted(tmp_path, write_plan, change, key):
    wire = Tripwire()
    try:
        res = f"TCPIP::127.0.0.1::{wire.port}::SOCKET"
        plan = temp_plan({"source": res, "meter": res, "chamber": res}, [25, -10])
        change(plan)
        path = write_plan(plan)
        db = tmp_path / "never.db"
        for args in (("check", str(path)), ("run", str(path), "--db", str(db))):
            result = cli(*args)
            assert result.returncode == 2, result.stderr
            assert str(path) in result.stderr and key in result.stderr, result.stderr
            assert "line" in result.stderr
            assert "Traceback" not in result.stderr
        assert not db.exists()
    finally:
        wire.close()
    assert wire.connections == 0


def test_a_run_over_temperature_soaks_first_and_stores_setpoint_and_reading(chamber_bench, write_plan, db):
    plan = temp_plan(chamber_bench.resources, [25, -10])
    result = cli("run", str(write_plan(plan)), "--db", str(db), timeout=60)
    assert result.returncode == 0, result.stderr
    with sqlite3.connect(db) as conn:
        rows = conn.execute("SELECT idx, temperature_c, chamber_c FROM v_points ORDER BY idx").fetchall()
        soaks = conn.execute("SELECT temperature_c, outcome, seconds, readings_json FROM soaks ORDER BY id").fetchall()
    assert [r[1] for r in rows] == [25.0] * 6 + [-10.0] * 6  # temperature outermost, in written order
    assert all(abs(c - t) <= 0.5 for _, t, c in rows)
    assert [(s[0], s[1]) for s in soaks] == [(25.0, "stable"), (-10.0, "stable")]
    assert all(s[2] >= 2.0 and json.loads(s[3]) for s in soaks)
    # from the simulator's side: no level was set while the DUT was more than 1 degC off its setpoint
    log = source_log(chamber_bench.log)
    measured = [e for e in log if e["event"] in ("level", "output") and e["output"]]  # a point's level with RF on
    assert len(measured) == 12
    assert max(abs(e["dut_c"] - e["setpoint_c"]) for e in measured) < 1.0
    # the way out: RF off first, then the chamber to end_c
    off = max(i for i, e in enumerate(log) if e["event"] == "output" and not e["output"])
    end = max(i for i, e in enumerate(log) if e["event"] == "chamber setpoint")
    assert off < end and log[end]["setpoint_c"] == 25.0
    export = cli("export", "1", "--format", "csv", "--db", str(db))
    header = export.stdout.splitlines()[0].split(",")
    assert "temperature_c" in header and "chamber_c" in header


def test_the_temperature_demo_plan_is_valid_and_names_the_chamber():
    from nightbench.demo import demo_plan_text
    from nightbench.plan.load import parse_plan

    res = "TCPIP::127.0.0.1::{}::SOCKET"
    loaded = parse_plan(demo_plan_text(res.format(1), res.format(2), res.format(3)), "demo-temperature.yaml")
    plan = loaded.plan
    assert plan.instruments.chamber is not None and plan.instruments.chamber.resource == res.format(3)
    assert plan.temperatures() == [25.0, -20.0, 70.0] and plan.reference_c() == 25.0
