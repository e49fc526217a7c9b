"""Level calibration without a bench run: the file's relation, bad files and plans, the snapshot,
the engine's ceiling through the calibrated relation, the sensor driver on the in-process
simulator, and `calibrate`'s refusals (exit 2 before any instrument, exit 1 for an unreachable one).

References: interpolation values below are worked by hand from the file written here (linear in
dB, common practice for a calibration table); the scatter is checked against numpy.polyfit's
residuals with n - 2 degrees of freedom (the residual standard deviation of a straight line).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from nightbench.drivers.errors import InputError, InstrumentError, SafetyError
from nightbench.plan.calibration import parse_calibration
from nightbench.plan.load import load_plan, parse_plan
from tests.conftest import OFFLINE, cli, plan_dict

SENSOR = "TCPIP::127.0.0.1::3::SOCKET"  # nothing listens there: these tests contact nothing
CAL = """# nightbench level calibration
# sensor: test sensor
# date: 2026-01-01
# accuracy_db: 0.12
frequency_hz,source_dbm,dut_dbm
100000000,-44.0,-50.0
100000000,-34.0,-40.1
100000000,-24.0,-30.0
100000000,-14.0,-20.01
900000000,-43.0,-50.0
900000000,-33.0,-40.0
900000000,-23.0,-30.0
900000000,-13.0,-20.0
"""


def _cal_plan(tmp_path: Path, cal_text: str = CAL, **overrides) -> Path:
    (tmp_path / "cal.csv").write_text(cal_text)
    plan = plan_dict(
        OFFLINE,
        path={"calibration": "cal.csv"},
        limits={"dut_max_dbm": -19.0},
        sweep={"frequency_hz": [100e6, 900e6], "power_dbm": {"start": -60, "stop": -20, "step": 5}},
        analysis={"fit_dbm": [-50, -20]},
    )
    plan.update(overrides)
    path = tmp_path / "plan.yaml"
    path.write_text(yaml.safe_dump(plan, sort_keys=False))
    return path


def test_the_relation_interpolates_in_level_and_frequency_and_holds_below_the_lowest_level():
    cal = parse_calibration(CAL, "cal.csv")
    assert cal.sensor == "test sensor" and cal.sensor_accuracy_db == 0.12
    # 100 MHz corrections (source - dut): 6.0 at -50, 6.1 at -40.1, 6.0 at -30, 6.01 at -20.01
    assert cal.source_for(100e6, -50.0) == pytest.approx(-44.0)
    assert cal.source_for(100e6, -45.05) == pytest.approx(-45.05 + 6.05)  # halfway -50 .. -40.1
    assert cal.source_for(100e6, -70.0) == pytest.approx(-70.0 + 6.0)  # held below the lowest level
    # 500 MHz lies halfway between 100 (6.0) and 900 MHz (7.0) at -50 dBm
    assert cal.source_for(500e6, -50.0) == pytest.approx(-50.0 + 6.5)
    assert cal.lowest_dbm(500e6) == -50.0 and cal.highest_dbm(500e6) == -20.01
    assert cal.highest_dbm(900e6) == -20.0
    with pytest.raises(ValueError, match="outside the calibration"):
        cal.source_for(2e9, -30.0)


def test_dut_for_inverts_source_for_and_never_understates():
    cal = parse_calibration(CAL, "cal.csv")
    for f in (100e6, 300e6, 900e6):
        for dut in (-65.0, -50.0, -44.3, -30.0, -21.0):
            back = cal.dut_for(f, cal.source_for(f, dut))
            assert back == pytest.approx(dut, abs=1e-8)
            assert back >= dut - 1e-12


def test_scatter_is_the_residual_sd_about_a_line_in_level():
    cal = parse_calibration(CAL, "cal.csv")
    dut = np.array([-50.0, -40.1, -30.0, -20.01])
    corr = np.array([-44.0, -34.0, -24.0, -14.0]) - dut
    resid = corr - np.polyval(np.polyfit(dut, corr, 1), dut)  # numpy as the reference line fit
    expected = math.sqrt(float(np.sum(resid**2)) / (len(dut) - 2))
    assert cal.scatter_db(100e6) == pytest.approx(expected, rel=1e-9)
    assert cal.scatter_db(900e6) == pytest.approx(0.0, abs=1e-9)
    assert cal.scatter_db(500e6) == pytest.approx(expected, rel=1e-9)  # the larger neighbour


BAD_FILES = [
    (CAL.replace("-40.1", "minus40"), 7, "dut_dbm", "is not a number"),
    (CAL.replace("frequency_hz,source_dbm,dut_dbm", "f,src,dut"), 5, None, "header"),
    (CAL.replace("100000000,-24.0,-30.0", "100000000,-24.0"), 8, None, "3 values"),
    (CAL.replace("# accuracy_db: 0.12\n", ""), 1, None, "accuracy_db"),
    (CAL.replace("# accuracy_db: 0.12", "# accuracy_db: -1"), 4, "accuracy_db", "negative"),
    (CAL.replace("100000000,-24.0,-30.0\n", "").replace("100000000,-14.0,-20.01\n", ""), 7, "source_dbm", "at least 3"),
    (CAL.replace("-34.0,-40.1", "-34.0,-50.5"), 7, "dut_dbm", "does not rise"),
    (CAL.replace("-34.0,-40.1", "-44.0,-40.1"), 7, "source_dbm", "also on line 6"),
    (CAL.replace("-44.0,-50.0", "nan,-50.0"), 6, "source_dbm", "finite"),
]


@pytest.mark.parametrize(("text", "line", "key", "words"), BAD_FILES)
def test_bad_calibration_files_are_refused_naming_file_line_and_column(text, line, key, words):
    with pytest.raises(InputError) as info:
        parse_calibration(text, "cal.csv")
    err = info.value
    assert err.file == "cal.csv" and err.line == line and err.key == key
    assert words in err.message


def test_check_refuses_a_bad_calibration_file_with_exit_2_naming_file_line_and_key(tmp_path):
    plan = _cal_plan(tmp_path, CAL.replace("-40.1", "minus40"))
    res = cli("check", str(plan))
    assert res.returncode == 2
    assert "cal.csv, line 7" in res.stderr and "path.calibration (dut_dbm)" in res.stderr
    assert "Traceback" not in res.stderr


def test_check_shows_the_calibrated_range(tmp_path):
    res = cli("check", str(_cal_plan(tmp_path)))
    assert res.returncode == 0, res.stderr
    assert "calibrated at 100 MHz: -50 to -20.01 dBm at the DUT, 4 levels" in res.stdout
    assert "calibrated at 900 MHz: -50 to -20 dBm at the DUT, 4 levels" in res.stdout
    # the source range comes from the relation at each end, worked by hand from CAL: -60 dBm holds
    # the correction at -50 (6.0 dB); -20 dBm lies 10/9.99 of the way from -30 (6.0) to -20.01 (6.01)
    row = next(line for line in res.stdout.splitlines() if line.strip().startswith("100.000 MHz"))
    assert "source  -54.00 ..  -13.99 dBm" in row, row


@pytest.mark.parametrize(
    ("overrides", "key", "words"),
    [
        # above the highest calibrated level (-20.01 dBm at 100 MHz): never extrapolated upward
        (
            {"limits": {"dut_max_dbm": -10}, "sweep": {"frequency_hz": [100e6], "power_dbm": [-40, -30, -20, -15]}},
            "sweep.power_dbm",
            "above the highest calibrated level",
        ),
        (
            {"sweep": {"frequency_hz": [2e9], "power_dbm": {"start": -60, "stop": -30, "step": 5}}},
            "path.calibration",
            "outside the calibration",
        ),
        ({"path": {"calibration": "cal.csv", "extrapolate": "hold"}}, "path", "extrapolate applies"),
    ],
)
def test_plans_a_calibration_cannot_serve_are_refused(tmp_path, overrides, key, words):
    with pytest.raises(InputError) as info:
        load_plan(_cal_plan(tmp_path, **overrides))
    assert info.value.key == key and words in info.value.message and info.value.line is not None


def test_a_calibration_run_above_the_ceiling_is_refused(tmp_path):
    calibration = {
        "sensor": {"driver": "scpi-power-sensor", "resource": SENSOR, "accuracy_db": 0.1},
        "levels_dbm": {"start": -40, "stop": 0, "step": 10},
    }
    plan = plan_dict(OFFLINE, calibration=calibration, limits={"dut_max_dbm": -5})
    with pytest.raises(InputError) as info:
        parse_plan(yaml.safe_dump(plan), "p.yaml")
    assert info.value.key == "calibration.levels_dbm.stop" and "exceeds the DUT ceiling" in info.value.message


def test_a_resume_uses_the_snapshot_not_the_file_on_disk(tmp_path):
    loaded = load_plan(_cal_plan(tmp_path, sweep={"frequency_hz": [900e6], "power_dbm": [-40, -30, -20]}))
    assert set(loaded.files) == {"cal.csv"}
    (tmp_path / "cal.csv").write_text(CAL.replace("900000000,-33.0,-40.0", "900000000,-32.0,-40.0"))
    again = parse_plan(loaded.text, loaded.file, files=loaded.files)
    fresh = load_plan(loaded.file)
    from nightbench.measure.sweep import expand

    assert [p.source_dbm for p in expand(again)] == [-33.0, -23.0, -13.0]
    assert [p.source_dbm for p in expand(fresh)] == [-32.0, -23.0, -13.0]


def test_the_engines_ceiling_uses_what_the_calibration_says_the_source_delivers(tmp_path):
    """At 900 MHz the file says -13 dBm set gives -20 dBm at the DUT (7 dB), though a nominal 8 dB
    loss would say -21: a setting of -11.5 is -18.5 dBm at the DUT, over a -19 dBm ceiling."""
    from nightbench.measure.engine import Engine
    from nightbench.measure.signals import StopFlag
    from nightbench.store.db import Store

    loaded = load_plan(_cal_plan(tmp_path))
    engine = Engine(loaded, Store(tmp_path / "x.db"), 1, StopFlag())
    engine._check_ceiling(-13.0, 900e6)  # -20 dBm at the DUT: fine
    with pytest.raises(SafetyError, match=r"-18\.50 dBm at the DUT"):
        engine._check_ceiling(-11.5, 900e6)


def test_the_sensor_driver_reads_the_dut_plane_level_of_the_simulator(inproc_bench):
    from nightbench.drivers.sensor import ScpiPowerSensor
    from nightbench.drivers.transport import Link

    bench = inproc_bench()
    model = bench.model
    sensor = ScpiPowerSensor.open(Link(bench.resources()["sensor"]))
    try:
        sensor.prove()
        sensor.configure()
        assert "Nightbench Simulated Instruments" in sensor.identity
        with pytest.raises(InstrumentError, match="below the sensor's range"):
            sensor.read_dbm()  # RF off: nothing to read
        model.set_source(0.0, frequency_hz=900e6, level_dbm=-20.0, output_on=True)
        sensor.set_frequency(900e6)
        readings = [sensor.read_dbm() for _ in range(8)]
        # the simulator's truth, and its 0.004 dB reading noise (simulators/physics.py SensorConfig)
        assert np.mean(readings) == pytest.approx(model.dut_dbm(), abs=0.01)
        model.set_source(0.0, level_dbm=-100.0)  # far below the sensor's -60 dBm limit
        with pytest.raises(InstrumentError, match="below the sensor's range"):
            sensor.read_dbm()
    finally:
        sensor.close()


def test_calibrate_refuses_bad_input_with_exit_2_before_any_instrument(tmp_path):
    plan = tmp_path / "plan.yaml"
    plan.write_text(yaml.safe_dump(plan_dict(OFFLINE)))
    res = cli("calibrate", str(plan), "-o", str(tmp_path / "cal.csv"))
    assert res.returncode == 2 and "key 'calibration'" in res.stderr and "Traceback" not in res.stderr
    calibration = {
        "sensor": {"driver": "scpi-power-sensor", "resource": SENSOR, "accuracy_db": 0.1},
        "levels_dbm": {"start": -40, "stop": -10, "step": 10},
    }
    plan.write_text(yaml.safe_dump(plan_dict(OFFLINE, calibration=calibration)))
    res = cli("calibrate", str(plan), "-o", str(tmp_path / "missing" / "cal.csv"))
    assert res.returncode == 2 and "does not exist" in res.stderr
    # an unreachable instrument: a plain message, exit 1, no file
    res = cli("calibrate", str(plan), "-o", str(tmp_path / "cal.csv"))
    assert res.returncode == 1 and "connection refused" in res.stderr and "Traceback" not in res.stderr
    assert list(tmp_path.iterdir()) == [plan]


def test_the_simulated_sources_hidden_error_is_off_by_default_and_interpolated_when_set():
    from nightbench.simulators.physics import BenchConfig, BenchModel

    default = BenchModel(BenchConfig())
    assert default.source_error_db(900e6, -30.0) == 0.0
    cfg = {"source": {"error_hz": [100e6, 900e6], "error_db": [0.3, -0.5], "error_db_per_10db": 0.05}}
    model = BenchModel(BenchConfig.from_dict(cfg))
    # by hand: halfway in frequency (-0.1 dB), and 3 x 10 dB below the 0 dBm reference (+0.15 dB)
    assert model.source_error_db(500e6, -30.0) == pytest.approx(-0.1 + 0.15)
    assert model.source_error_db(50e6, 0.0) == pytest.approx(0.3)  # held beyond the table
    assert model.dut_dbm(500e6, -30.0, True) == pytest.approx(-30.0 + 0.05 - model.config.path.loss(500e6))


def test_a_stop_mid_calibration_switches_rf_off_and_returns_nothing(inproc_bench, tmp_path):
    """The flag SIGINT/SIGTERM set (measure/signals.py), set here after the first calibrated level."""
    import json

    from nightbench.measure.calibrate import CalibrationInterrupted, Calibrator
    from nightbench.measure.signals import StopFlag

    log = (tmp_path / "log.jsonl").open("w")
    bench = inproc_bench(log=log)
    res = bench.resources()
    calibration = {
        "sensor": {"driver": "scpi-power-sensor", "resource": res["sensor"], "accuracy_db": 0.1},
        "levels_dbm": {"start": -40, "stop": -10, "step": 10},
    }
    loaded = parse_plan(yaml.safe_dump(plan_dict(res, calibration=calibration)), "p.yaml")
    stop = StopFlag()
    rows = []

    def progress(row, done, total):
        rows.append(row)
        stop.set("SIGTERM")

    with pytest.raises(CalibrationInterrupted, match="SIGTERM"):
        Calibrator(loaded, stop, progress).run()
    log.close()
    events = [json.loads(line) for line in (tmp_path / "log.jsonl").read_text().splitlines()]
    assert len(rows) == 1 and any(e["output"] for e in events) and events[-1]["output"] is False
