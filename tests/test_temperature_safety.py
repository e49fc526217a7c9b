"""Safety with a chamber, watched from the simulator's instrument log: on every way out RF off
first, then the chamber to end_c; a kill mid-soak resumes with a new soak and no lost or
duplicated point; a chamber that stops answering fails the run safely."""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from nightbench.simproc import SimProcess
from tests.conftest import cli, source_log, wait_until
from tests.test_safety import check_exactly_once
from tests.test_temperature import TIME_SCALE, chamber_bench, temp_plan

__all__ = ["chamber_bench"]


def start_run(plan_path: Path, db: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "nightbench", "run", str(plan_path), "--db", str(db)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def soaking_at(db: Path, temperature_c: float) -> bool:
    """Whether a soak at this temperature is under way (its row is written when it starts)."""
    if not db.exists():
        return False
    try:
        with sqlite3.connect(db, timeout=5) as conn:
            row = conn.execute(
                "SELECT 1 FROM soaks WHERE temperature_c=? AND outcome='soaking'", (temperature_c,)
            ).fetchone()
    except sqlite3.OperationalError:
        return False
    return row is not None


def rf_off_then_chamber_to(log: list[dict], end_c: float) -> None:
    """The last events: RF off, and after it the chamber's setpoint at end_c, with RF still off."""
    off = max(i for i, e in enumerate(log) if e["event"] == "output" and not e["output"])
    end = max(i for i, e in enumerate(log) if e["event"] == "chamber setpoint")
    assert off < end, "RF must go off before the chamber is sent to end_c"
    assert log[end]["setpoint_c"] == end_c
    assert not any(e["output"] for e in log[off:]), "RF stays off"


def test_sigterm_during_a_soak_stops_within_5_s_rf_off_chamber_to_end(chamber_bench, write_plan, db):
    plan = temp_plan(chamber_bench.resources, [-10, 25], stable_s=60, timeout_s=120, end_c=20)
    proc = start_run(write_plan(plan), db)
    try:
        wait_until(lambda: soaking_at(db, -10.0), "a soak at -10 degC under way", timeout_s=60)
        time.sleep(0.5)
        sent = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=10)
        took = time.monotonic() - sent
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 143, err
    assert took < 5.0, f"stopped after {took:.1f} s"
    rf_off_then_chamber_to(source_log(chamber_bench.log), 20.0)
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT outcome FROM soaks").fetchall() == [("interrupted",)]
        assert conn.execute("SELECT state FROM runs").fetchone()[0] == "interrupted"


def test_sigkill_during_a_soak_then_resume_soaks_again_and_loses_nothing(chamber_bench, write_plan, db):
    plan = temp_plan(chamber_bench.resources, [25, -10], stable_s=2, timeout_s=30)
    proc = start_run(write_plan(plan), db)
    try:
        wait_until(lambda: soaking_at(db, -10.0), "the soak at -10 degC under way", timeout_s=30)
        proc.kill()  # SIGKILL: no handler runs, nothing is made safe
        proc.wait(5)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    killed_at = len(source_log(chamber_bench.log))
    result = cli("resume", "1", "--db", str(db), timeout=60)
    assert result.returncode == 0, result.stderr
    check_exactly_once(db, 12)
    with sqlite3.connect(db) as conn:
        soaks = conn.execute("SELECT temperature_c, outcome FROM soaks ORDER BY id").fetchall()
    # the killed soak stays as it was left; the resume soaked again before its first point
    assert soaks == [(25.0, "stable"), (-10.0, "soaking"), (-10.0, "stable")]
    after = source_log(chamber_bench.log)[killed_at:]
    first_rf = next(i for i, e in enumerate(after) if e["event"] == "output")
    first_chamber = next(i for i, e in enumerate(after) if e["event"].startswith("chamber"))
    assert first_rf < first_chamber and not after[first_rf]["output"], "RF made safe before the chamber is touched"
    measured = [e for e in after if e["event"] in ("level", "output") and e["output"]]
    assert len(measured) == 6 and max(abs(e["dut_c"] + 10.0) for e in measured) < 1.0


def test_a_soak_that_times_out_fails_the_run_with_the_last_readings(tmp_path, write_plan, db):
    log = tmp_path / "log.jsonl"
    # the chamber's reading walks away at 1 degC/s once the soak has started
    with SimProcess(
        "--log", str(log), "--chamber-time-scale", TIME_SCALE, "--fault", "drift@chamber:after=8,rate_c_per_s=1"
    ) as sim:
        plan = temp_plan(sim.resources, [25], stable_s=2, timeout_s=3)
        result = cli("run", str(write_plan(plan)), "--db", str(db), timeout=60)
    assert result.returncode == 1, result.stderr
    assert "did not hold 25 ± 0.5 degC" in result.stderr and "last readings" in result.stderr
    assert "Traceback" not in result.stderr
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT outcome FROM soaks").fetchall() == [("timeout",)]
        assert conn.execute("SELECT COUNT(*) FROM points").fetchone()[0] == 0
    rf_off_then_chamber_to(source_log(log), 25.0)


def test_a_chamber_that_stops_answering_mid_run_fails_it_safely(tmp_path, write_plan, db):
    log = tmp_path / "log.jsonl"
    # silent for good from its 40th message: past the first soak (about 25 messages), mid-sweep
    with SimProcess(
        "--log", str(log), "--chamber-time-scale", TIME_SCALE, "--fault", "silence@chamber:after=40"
    ) as sim:
        plan = temp_plan(sim.resources, [25, -10], stable_s=1, timeout_s=30)
        result = cli("run", str(write_plan(plan)), "--db", str(db), timeout=90)
    assert result.returncode == 1, result.stderr
    assert "chamber" in result.stderr and "Traceback" not in result.stderr
    assert "could not send the chamber to end_c" in result.stderr  # said, not swallowed
    events = source_log(log)
    off = max(i for i, e in enumerate(events) if e["event"] == "output" and not e["output"])
    assert not any(e["output"] for e in events[off:]), "RF off at the end"
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT state FROM runs").fetchone()[0] == "failed"
        idx = [r[0] for r in conn.execute("SELECT idx FROM points ORDER BY idx")]
    assert idx == list(range(len(idx))) and len(idx) < 12
