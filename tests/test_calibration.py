"""Level calibration end to end on the simulated bench (a simulator process with a hidden source
level error, pyvisa-py, the CLI in child processes): `calibrate`, then the same sweep run through
the calibration and through the nominal path.

The truth is the simulator's own: `BenchModel.dut_dbm` (the true DUT-plane level of a source
setting) and `BenchModel.truth_v` (the noiseless detector law), with the log law's intercept taken
as in tests/test_laws.py: numpy.polyfit of the noiseless law at the swept levels in the fit range.
The hidden error delivers MORE than set at 100 MHz and less at 900 MHz, so the ceiling check is
tested where it matters: the nominal run pushes the DUT over limits.dut_max_dbm (the simulator's
own log says so), the calibrated run never does.
"""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest
import yaml

import nightbench
from nightbench.plan.calibration import parse_calibration
from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig, BenchModel
from tests.conftest import cli, plan_dict, sim_toml, source_log

FREQS = [100e6, 900e6]
LEVELS = {"start": -50, "stop": -20, "step": 10}
FIT = (-50.0, -20.0)
CAL_LEVELS = [-50.0, -40.0, -30.0, -20.0]
CEILING = -19.85  # above the sweep's top, below what the nominal path delivers at 100 MHz
# a hidden error of several tenths of a dB, different per frequency, plus 0.02 dB per 10 dB
SIM = {
    "source": {"error_hz": [100e6, 900e6], "error_db": [0.3, -0.4], "error_db_per_10db": 0.02},
    "detector": {"ripple_db": 0.0, "output_noise_v": 2e-7, "floor_noise_v": 2e-7},
    "meter": {"noise_v": 1e-8},
}


def _truth_intercept(model: BenchModel, f: float, delivered=lambda p: p) -> float:
    """The log law's intercept fitted (numpy.polyfit) to the noiseless law at the swept levels."""
    swept = np.arange(FIT[0], FIT[1] + 1e-9, LEVELS["step"])
    volts = [model.truth_v(delivered(p), f) for p in swept]
    b, a = np.polyfit(swept, volts, 1)
    return -a / b


def _run_in_process(plan, db) -> str:
    from nightbench.measure.signals import StopFlag
    from nightbench.plan.load import load_plan
    from nightbench.runs import execute, new_run
    from nightbench.store.db import Store

    loaded, store = load_plan(plan), Store(db)
    try:
        state, error = execute(loaded, store, new_run(store, loaded), StopFlag())
    finally:
        store.close()
    assert error is None, error
    return state


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    """calibrate, then a calibrated run and a nominal run; the simulator's log split per step."""
    tmp = tmp_path_factory.mktemp("calibration")
    (tmp / "sim.toml").write_text(sim_toml(SIM))
    log = tmp / "source-log.jsonl"
    model = BenchModel(BenchConfig.from_dict(SIM))
    nominal = {"table": [[f, model.config.path.loss(f)] for f in FREQS]}  # right but for the hidden error
    out: dict = {"model": model, "tmp": tmp, "marks": []}
    with SimProcess("--config", str(tmp / "sim.toml"), "--log", str(log)) as sim:
        plan = plan_dict(
            sim.resources,
            path=nominal,
            limits={"dut_max_dbm": CEILING},
            sweep={"frequency_hz": FREQS, "power_dbm": LEVELS},
            settle={"tolerance_v": 1e-4, "timeout_s": 2, "tail_share": 0},
            analysis={"fit_dbm": list(FIT)},
            calibration={
                "sensor": {"driver": "scpi-power-sensor", "resource": sim.resources["sensor"], "accuracy_db": 0.12},
                "levels_dbm": {"start": CAL_LEVELS[0], "stop": CAL_LEVELS[-1], "step": 10},
            },
        )
        (tmp / "nominal.yaml").write_text(yaml.safe_dump(plan, sort_keys=False))
        (tmp / "calibrated.yaml").write_text(yaml.safe_dump({**plan, "path": {"calibration": "cal.csv"}}))
        before = len(source_log(log))
        args = ["calibrate", str(tmp / "nominal.yaml"), "-o", str(tmp / "cal.csv"), "--db", str(tmp / "c.db"), "--json"]
        out["calibrate"] = cli(*args)
        out["calibrate_log"], before = source_log(log)[before:], len(source_log(log))
        out["calibrated"] = cli("run", str(tmp / "calibrated.yaml"), "--db", str(tmp / "runs.db"))
        out["calibrated_log"], before = source_log(log)[before:], len(source_log(log))
        out["nominal"] = _run_in_process(tmp / "nominal.yaml", tmp / "runs.db")  # the contrast: saves a process
        out["nominal_log"] = source_log(log)[before:]
    rep = cli("report", "1", "--db", str(tmp / "runs.db"), "--json")
    assert rep.returncode == 0, rep.stderr
    out["calibrated_report"] = {g["frequency_hz"]: g for g in json.loads(rep.stdout)["groups"]}
    with nightbench.open_db(tmp / "runs.db") as db:  # the same object as report --json (docs/design.md)
        out["nominal_report"] = {g["frequency_hz"]: g for g in db.report(2).to_json()["groups"]}
    return out


def test_calibrate_writes_the_simulators_own_relation(night):
    res = night["calibrate"]
    assert res.returncode == 0, res.stderr
    summary = json.loads(res.stdout)
    assert summary["sensor"].startswith("Nightbench Simulated Instruments,Simulated Power Sensor")
    text = (night["tmp"] / "cal.csv").read_text()
    assert text.splitlines()[0].startswith("#") and "# accuracy_db: 0.12" in text and "# date: " in text
    cal = parse_calibration(text, "cal.csv")
    assert cal.frequency_hz == tuple(FREQS) and cal.sensor_accuracy_db == 0.12
    model = night["model"]
    for f, relation in zip(FREQS, cal.relations):
        # the levels asked for, landed within the sensor's noise (0.004 dB rms, 4 readings)
        assert relation.dut_dbm == pytest.approx(CAL_LEVELS, abs=0.02)
        for dut in relation.dut_dbm:
            source = dut + relation.correction(dut)
            assert dut == pytest.approx(model.dut_dbm(f, source, True), abs=0.015)  # the simulator's truth
    # the file's leftovers: none (written beside, then renamed)
    assert sorted(p.name for p in night["tmp"].iterdir() if p.name.startswith(".")) == []
    with sqlite3.connect(night["tmp"] / "c.db") as conn:
        events = conn.execute("SELECT run_id, message FROM events WHERE kind='calibration'").fetchall()
    assert len(events) == 1 and events[0][0] is None and "wrote" in events[0][1]


def test_calibrate_switches_rf_off_at_the_end_and_stays_under_the_ceiling(night):
    events = night["calibrate_log"]
    assert any(e["output"] for e in events)
    assert events[-1]["output"] is False
    assert max(e["dut_dbm"] for e in events if e["output"]) <= CEILING


def test_the_calibrated_intercept_is_the_simulators_and_the_nominal_one_is_off_by_the_hidden_error(night):
    model = night["model"]
    assert night["calibrated"].returncode == 0, night["calibrated"].stderr
    assert night["nominal"] == "completed"
    for f in FREQS:
        truth = _truth_intercept(model, f)
        calibrated = night["calibrated_report"][f]["intercept_dbm"]
        nominal = night["nominal_report"][f]["intercept_dbm"]
        assert calibrated == pytest.approx(truth, abs=0.06)
        # what the nominal path really put on the DUT: the simulator's truth for each setting
        loss = model.config.path.loss(f)
        shifted = _truth_intercept(model, f, lambda p, f=f, loss=loss: model.dut_dbm(f, p + loss, True))
        assert nominal == pytest.approx(shifted, abs=0.06)
        assert abs(shifted - truth) > 0.2 and abs(nominal - truth) > 0.2


def test_the_k2_interval_of_the_calibrated_intercept_covers_the_truth(night):
    for f in FREQS:
        g = night["calibrated_report"][f]
        assert abs(g["intercept_dbm"] - _truth_intercept(night["model"], f)) <= g["intercept_u_db"]


def test_the_dut_never_sees_more_than_the_ceiling_through_a_calibration(night):
    """The simulator's log (the true DUT-plane level whenever RF was on), not the engine's belief."""
    calibrated = [e["dut_dbm"] for e in night["calibrated_log"] if e["output"]]
    nominal = [e["dut_dbm"] for e in night["nominal_log"] if e["output"]]
    assert calibrated and max(calibrated) <= CEILING
    assert night["calibrated_log"][-1]["output"] is False
    # the same sweep through the nominal path: the source's +0.3 dB at 100 MHz goes over it
    assert max(nominal) > CEILING + 0.1


def test_calibrate_switches_rf_off_when_the_sensor_goes_away(tmp_path):
    log = tmp_path / "source-log.jsonl"
    with SimProcess("--log", str(log), "--fault", "drop@sensor:after=8,duration_s=-1") as sim:
        plan = plan_dict(
            sim.resources,
            sweep={"frequency_hz": [100e6], "power_dbm": LEVELS},
            analysis={"fit_dbm": list(FIT)},
            calibration={
                "sensor": {
                    "driver": "scpi-power-sensor",
                    "resource": sim.resources["sensor"],
                    "accuracy_db": 0.1,
                    "timeout_s": 0.5,
                },
                "levels_dbm": {"start": -50, "stop": -10, "step": 10},
            },
        )
        (tmp_path / "plan.yaml").write_text(yaml.safe_dump(plan, sort_keys=False))
        res = cli("calibrate", str(tmp_path / "plan.yaml"), "-o", str(tmp_path / "cal.csv"))
    assert res.returncode == 1
    assert "while reading the sensor at 100 MHz" in res.stderr and "Traceback" not in res.stderr
    events = source_log(log)
    assert any(e["output"] for e in events) and events[-1]["output"] is False
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plan.yaml", "source-log.jsonl"]
