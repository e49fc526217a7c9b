"""The invariants under signals, kills and faults, watched from outside through the
simulator's instrument log (docs/design.md, "Invariants")."""

from __future__ import annotations

import json
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from nightbench.simproc import SimProcess
from tests.conftest import assert_never_above, cli, plan_dict, source_log, wait_until
from tests.test_drivers import assert_points_are_real, run_plan

LOSS = 6.0 + 0.9 * (100e6 / 1e9) ** 0.5  # the simulator's default path at 100 MHz


def sweep_plan(resources, levels=41, freqs=(100e6, 900e6)):
    plan = plan_dict(
        resources, sweep={"frequency_hz": list(freqs), "power_dbm": {"start": -70, "stop": -10, "points": levels}}
    )
    plan["path"] = {"table": [[f, 6.0 + 0.9 * (f / 1e9) ** 0.5] for f in sorted(freqs)]}
    return plan


def start_run(plan_path: Path, db: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "nightbench", "run", str(plan_path), "--db", str(db)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def points_stored(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        with sqlite3.connect(db, timeout=5) as conn:
            return conn.execute("SELECT COUNT(*) FROM points").fetchone()[0]
    except sqlite3.OperationalError:
        return 0


def wait_for_points(db: Path, n: int, proc: subprocess.Popen, timeout: float = 30.0) -> None:
    def stored() -> bool:
        assert proc.poll() is None, proc.communicate()
        return points_stored(db) >= n

    wait_until(stored, f"{n} points stored", timeout_s=timeout, poll_s=0.02)


def check_exactly_once(db: Path, total: int) -> None:
    with sqlite3.connect(db) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        idx = [r[0] for r in conn.execute("SELECT idx FROM points WHERE run_id=1 ORDER BY idx")]
        assert idx == list(range(total)), "every point exactly once"
        orphans = conn.execute(
            "SELECT COUNT(*) FROM readings r LEFT JOIN points p "
            "ON p.run_id=r.run_id AND p.idx=r.idx WHERE p.idx IS NULL"
        ).fetchone()[0]
        assert orphans == 0


@pytest.mark.parametrize(
    "sig, code, seed",
    [(signal.SIGTERM, 143, 1), (signal.SIGTERM, 143, 2), (signal.SIGINT, 130, 3), (signal.SIGINT, 130, 4)],
)
def test_signal_stops_promptly_with_rf_off_and_resume_completes(bench, write_plan, db, sig, code, seed):
    plan = sweep_plan(bench.resources)
    path = write_plan(plan)
    proc = start_run(path, db)
    rng = random.Random(seed)
    wait_for_points(db, rng.randint(1, 60), proc)  # a random point of the run
    time.sleep(rng.uniform(0, 0.02))  # and a random instant within it
    t_signal = time.monotonic()
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=10)
    assert time.monotonic() - t_signal < 5, "exits within a few seconds"
    assert proc.returncode == code, err
    assert "Traceback" not in err and "interrupted" in err
    assert bench.events()[-1]["output"] is False, "RF off is the last thing the source hears"
    runs = json.loads(cli("runs", "--db", str(db), "--json").stdout)
    assert runs[0]["state"] == "interrupted" and runs[0]["points_done"] < runs[0]["points_total"]
    res = cli("resume", "1", "--db", str(db))
    assert res.returncode == 0, res.stderr
    check_exactly_once(db, 82)
    assert bench.events()[-1]["output"] is False


def test_sigkill_at_20_random_instants_then_resume_gives_every_point_once(bench, write_plan, db):
    plan = sweep_plan(bench.resources, levels=301)
    path = write_plan(plan)
    total = 602
    rng = random.Random(20)
    first_after_restart = []
    kills = 0
    for i in range(20):
        if i == 0:
            proc = start_run(path, db)
            wait_for_points(db, 1, proc)  # run 1 exists to be resumed (start-up can be slow)
        else:
            mark = len(bench.events())
            proc = subprocess.Popen(
                [sys.executable, "-m", "nightbench", "resume", "1", "--db", str(db)],
                stdout=subprocess.PIPE,
                stderr=subprocess.PIPE,
                text=True,
            )
            if i % 2:  # every other restart is killed only after it has reached the source
                wait_until(lambda p=proc, m=mark: len(bench.events()) > m or p.poll() is not None, "a source event")
                assert proc.poll() is None, proc.communicate()
        time.sleep(rng.uniform(0.2, 0.9))  # a random instant, from start-up to mid-sweep
        proc.kill()  # SIGKILL: no handler runs, RF stays on
        proc.wait()
        kills += int(proc.returncode == -signal.SIGKILL)
        if i:
            first_after_restart.append(bench.events()[mark : mark + 1])
        with sqlite3.connect(db) as conn:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            dup = conn.execute("SELECT COUNT(*) - COUNT(DISTINCT idx) FROM points").fetchone()[0]
            assert dup == 0
        if points_stored(db) >= total:
            break
    mark = len(bench.events())
    res = cli("resume", "1", "--db", str(db)) if points_stored(db) < total else None
    if res is not None:
        assert res.returncode == 0, res.stderr
        first_after_restart.append(bench.events()[mark : mark + 1])
    check_exactly_once(db, total)
    assert kills == 20, "the run outlived fewer than 20 kills: make it longer"
    # After a hard kill the next start switches RF off before anything else (invariant 2). A
    # restart killed during start-up never reached the source; the odd ones and the final
    # resume did, so at least 11 are checked.
    firsts = [events[0] for events in first_after_restart if events]
    assert len(firsts) >= 11, first_after_restart
    assert all(e["event"] == "output" and e["output"] is False for e in firsts), firsts
    assert bench.events()[-1]["output"] is False


def test_resume_refuses_a_run_that_is_still_running(bench, write_plan, db):
    proc = start_run(write_plan(sweep_plan(bench.resources)), db)
    try:
        wait_for_points(db, 1, proc)
        res = cli("resume", "1", "--db", str(db))
        assert res.returncode == 2 and "still running" in res.stderr
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=10)


def test_resume_refuses_completed_and_unknown_runs(bench, write_plan, db):
    plan = plan_dict(bench.resources, sweep={"frequency_hz": [100e6], "power_dbm": [-40, -30, -20]})
    assert cli("run", str(write_plan(plan)), "--db", str(db)).returncode == 0
    for run_id, words in (("1", "already completed"), ("7", "no run 7")):
        res = cli("resume", run_id, "--db", str(db))
        assert res.returncode == 2 and words in res.stderr and "Traceback" not in res.stderr


def test_frequency_change_lowers_the_level_first(bench, write_plan, db):
    # Going from a frequency with more path loss to one with less: at the old level the new
    # frequency would put more than the ceiling on the DUT, so the level must come down first.
    plan = plan_dict(
        bench.resources,
        limits={"dut_max_dbm": -10},
        sweep={"frequency_hz": [3e9, 100e6], "power_dbm": [-14, -12, -10]},
        analysis={"fit_dbm": [-14, -10]},
        path={"table": [[100e6, 6.0 + 0.9 * 0.1**0.5], [3e9, 6.0 + 0.9 * 3**0.5]]},
    )
    bench.ceiling_dbm = -10
    res = cli("run", str(write_plan(plan)), "--db", str(db))
    assert res.returncode == 0, res.stderr
    changes = [e for e in bench.events() if e["event"] == "frequency" and e["output"]]
    assert changes, "the frequency changed with RF on"
    assert_never_above(bench.log, -10)


def _phase_faults():
    n_points = len([-60, -50, -40, -30, -20, -10])
    end = 2 + 1 + 3 + (n_points - 1) + 1  # source messages: *IDN?, RF off, the run record's one
    cases = []  # (measure/record.py), 3 for the first point, one level per further point, the final RF off
    for kind in ("drop", "silence", "delay", "garbage", "spurious_error"):
        extra = {"silence": ",duration_s=0.8", "delay": ",delay_s=0.9"}.get(kind, "")
        cases.append((f"{kind}@source:after=2{extra}", "configuration"))
        cases.append((f"{kind}@meter:after=2{extra}", "configuration"))
        cases.append((f"{kind}@source:after={end}{extra}", "end"))
    return cases


@pytest.mark.parametrize("fault, phase", _phase_faults())
def test_faults_during_configuration_and_at_the_end(tmp_path, fault, phase):
    log = tmp_path / "source.jsonl"
    with SimProcess("--log", str(log), "--fault", fault) as sim:
        state, error, rows, _ = run_plan(tmp_path, sim.resources)
    assert_points_are_real(rows)
    assert_never_above(log, 0.0)
    if state == "completed":
        assert len(rows) == 6
        assert source_log(log)[-1]["output"] is False
    else:
        assert state == "failed" and error, "a failed run says why"
        assert source_log(log)[-1]["output"] is False or "could not switch RF off" in error
    assert state == "completed", f"{phase}: {error}"  # every one of these is transient


def test_a_signal_during_a_reconnect_interrupts_the_run_instead_of_failing_it(tmp_path, write_plan, db):
    """The meter's link drops for good; SIGTERM arrives while the engine is reconnecting. The run
    is `interrupted` (resumable, exit 143 as for any SIGTERM), not `failed`, and RF is off."""
    log = tmp_path / "source.jsonl"
    with SimProcess("--log", str(log), "--fault", "drop@meter:after=12,duration_s=-1") as sim:
        proc = start_run(write_plan(sweep_plan(sim.resources)), db)

        def reconnecting() -> bool:
            assert proc.poll() is None, proc.communicate()
            try:
                with sqlite3.connect(db, timeout=5) as conn:
                    return conn.execute("SELECT COUNT(*) FROM events WHERE kind='reconnect'").fetchone()[0] > 0
            except sqlite3.OperationalError:
                return False

        wait_until(reconnecting, "a reconnect", timeout_s=20, poll_s=0.02)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=10)
    assert proc.returncode == 143, err
    assert "Traceback" not in err
    runs = json.loads(cli("runs", "--db", str(db), "--json").stdout)
    assert runs[0]["state"] == "interrupted"
    assert source_log(log)[-1]["output"] is False
    assert_never_above(log, 0.0)
