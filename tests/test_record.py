"""The run record: every start puts the instruments in a known state, reads it back and stores it
(measure/record.py, docs/run-record.md); calibration-due dates refuse an overdue instrument.

The simulated bench starts with a previous user's settings (simulators/physics.py `user_*`:
amplitude modulation on, a 3 dB level offset, the meter autoranging with autozero off). The
references: the simulator's own truth (BenchModel.dut_dbm, truth_v), IEEE 488.2 (*IDN? fields,
*RST), SCPI-1999 (boolean responses 0/1, the error queue). Dates are far in the past (2001) or
the future (2999), never today's.
"""

from __future__ import annotations

import json
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
import yaml

from nightbench.drivers.chamber import ScpiChamber
from nightbench.drivers.dialect import METER_COMMANDS, SOURCE_COMMANDS, merged
from nightbench.drivers.errors import InputError
from nightbench.drivers.meter import ScpiDmm, SerialAdc
from nightbench.drivers.source import RfSource
from nightbench.drivers.transport import Link
from nightbench.measure.engine import Engine
from nightbench.measure.signals import StopFlag
from nightbench.plan.load import load_plan, parse_plan
from nightbench.runs import new_run
from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig, BenchModel
from nightbench.store.db import Store
from tests.conftest import OFFLINE, assert_never_above, cli, plan_dict, wait_until

MAKER = "Nightbench Simulated Instruments"  # every simulated *IDN? names it (docs/simulator.md)
PREVIOUS_USER = """
[source]
user_modulation = true
user_offset_db = 3.0
[meter]
user_autorange = true
user_autozero = false
"""
LEVELS = [-60.0, -50.0, -40.0, -30.0]
REBOOT_AFTER = 8  # the source's 8th message: the second point of the first pass (the start sends 4)
PAST, FUTURE = "2001-01-01", "2999-12-31"


def previous_user_config() -> BenchConfig:
    config = BenchConfig()
    config.source.user_modulation, config.source.user_offset_db = True, 3.0
    config.meter.user_autorange, config.meter.user_autozero = True, False
    return config


# -- one real run on a bench left in a previous user's state --------------------------------------


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    """A CLI run (repeats 2, the meter's calibration overdue but allowed), its report and summary."""
    tmp = tmp_path_factory.mktemp("record")
    (tmp / "sim.toml").write_text(PREVIOUS_USER)
    log = tmp / "source-log.jsonl"
    # mid-night the source reboots and recalls the previous user's offset (simulators/faults.py
    # `reboot`): the reconnect must put it back in the known state, or the rest reads 3 dB low
    reboot = f"reboot@source:after={REBOOT_AFTER}"
    with SimProcess("--config", str(tmp / "sim.toml"), "--log", str(log), "--fault", reboot) as sim:
        plan = plan_dict(
            sim.resources,
            sweep={"frequency_hz": [100e6], "power_dbm": LEVELS},
            measure={"samples": 4, "repeats": 2},
            analysis={"fit_dbm": [-60, -30], "error_limit_db": 1.0},
        )
        plan["instruments"]["source"]["calibration_due"] = FUTURE
        plan["instruments"]["meter"].update(nplc=0.2, calibration_due=PAST, allow_overdue=True)
        path = tmp / "plan.yaml"
        path.write_text(yaml.safe_dump(plan, sort_keys=False))
        db = tmp / "night.db"
        res = cli("run", str(path), "--db", str(db))
        assert res.returncode == 0, res.stderr
    report = cli("report", "1", "--db", str(db), "--json", "--out", str(tmp / "out"))
    assert report.returncode == 0, report.stderr
    assert_never_above(log, 0.0)
    conn = sqlite3.connect(db)
    conn.row_factory = sqlite3.Row
    yield {
        "log": log,
        "db": db,
        "conn": conn,
        "report": json.loads(report.stdout),
        "summary": (tmp / "out" / "summary.md").read_text(),
    }
    conn.close()


def record(conn: sqlite3.Connection, role: str) -> dict[str, Any]:
    row = conn.execute("SELECT * FROM instruments WHERE run_id=1 AND role=?", (role,)).fetchone()
    assert row is not None, f"no record of the {role}"
    return {**dict(row), "state": json.loads(row["state_json"])}


def test_one_night_on_a_bench_left_in_a_previous_users_state(night):
    """One run checked from four sides (one test, so parallel workers do not each run the night)."""
    check_the_record_reads_back_modulation_off_offset_zero_and_the_plans_nplc(night)
    check_calibration_dates_are_stored_and_an_allowed_overdue_instrument_is_noted(night)
    check_with_the_record_the_night_measures_the_planned_levels(night)
    check_report_json_and_summary_carry_the_record(night)
    check_a_reboot_mid_night_is_put_back_in_the_known_state(night)


def check_a_reboot_mid_night_is_put_back_in_the_known_state(night):
    """The source rebooted inside the first pass (its own log says power-on, recalling the 3 dB
    offset) and points were measured after the reconnect: those too match the truth (checked above)."""
    log = [json.loads(line) for line in night["log"].read_text().splitlines()]
    power_on = [i for i, e in enumerate(log) if e.get("event") == "power-on"]
    assert len(power_on) == 1, "the reboot fault did not fire"
    after = [e for e in log[power_on[0] :] if e.get("event") == "level"]
    assert after, "no level was set after the reboot: the fault came too late to test anything"
    kinds = [r["kind"] for r in night["conn"].execute("SELECT kind FROM events WHERE run_id=1 ORDER BY id")]
    assert "reconnect" in kinds


def check_the_record_reads_back_modulation_off_offset_zero_and_the_plans_nplc(night):
    source, meter = record(night["conn"], "source"), record(night["conn"], "meter")
    s = source["state"]
    # SCPI-1999 boolean responses: 0 is off; the simulator started with AM on (PREVIOUS_USER)
    assert s["modulation"] == "off" and s["modulation_readback"][":SOURce:AM:STATe?"] == "0"
    assert set(s["modulation_readback"].values()) == {"0"} and len(s["modulation_readback"]) == 4
    assert s["level_offset_db"] == 0.0 and s["preset"] is False, "the plan did not allow a preset"
    m = meter["state"]
    assert m["nplc"] == pytest.approx(0.2) and m["nplc_set"] == 0.2 and m["function"] == "VOLT"
    # what the plan does not set is recorded as the meter has it: the previous user's autorange, autozero
    assert m["autorange"] is True and m["autozero"] == "OFF" and m["range"] == 10.0
    runs = night["conn"].execute("SELECT source_idn, meter_idn FROM runs WHERE id=1").fetchone()
    # IEEE 488.2 10.14: *IDN? is maker, model, serial number, firmware
    assert source["identity"] == runs["source_idn"] and source["identity"].split(",")[0] == MAKER
    assert meter["identity"] == runs["meter_idn"] and len(meter["identity"].split(",")) == 4
    assert (source["driver"], meter["driver"]) == ("scpi-source", "scpi-dmm")


def check_calibration_dates_are_stored_and_an_allowed_overdue_instrument_is_noted(night):
    source, meter = record(night["conn"], "source"), record(night["conn"], "meter")
    assert (source["calibration_due"], meter["calibration_due"]) == (FUTURE, PAST)
    assert "calibration" not in source["state"]
    assert PAST in meter["state"]["calibration"] and "allow_overdue" in meter["state"]["calibration"]
    events = [r[0] for r in night["conn"].execute("SELECT message FROM events WHERE run_id=1 AND kind='calibration'")]
    assert len(events) == 1 and events[0].startswith("meter: ")


def check_with_the_record_the_night_measures_the_planned_levels(night):
    """The simulator's truth for each planned DUT level (simulators/physics.py truth_v): with the
    3 dB offset left on, every reading would sit 3 dB (about 60 mV) low."""
    model = BenchModel(previous_user_config())
    rows = night["conn"].execute("SELECT power_dbm, value_v, direction FROM v_points ORDER BY idx").fetchall()
    assert [r["direction"] for r in rows] == ["up"] * 4 + ["down"] * 4
    for r in rows:
        # plan loss 6.28 dB vs the simulator's 6.2846 dB at 100 MHz: 0.005 dB, 0.1 mV
        assert r["value_v"] == pytest.approx(model.truth_v(r["power_dbm"], 100e6), abs=0.003)
    slope = model.config.detector.slope(100e6)
    assert 3.0 * slope > 0.05, "the offset would be far outside that tolerance"


def check_report_json_and_summary_carry_the_record(night):
    report, summary = night["report"], night["summary"]
    assert [i["role"] for i in report["instruments"]] == ["source", "meter"]
    meter = report["instruments"][1]
    assert meter["state"]["nplc"] == pytest.approx(0.2) and meter["calibration_due"] == PAST
    assert {"run_id", "groups", "analysis", "details"} <= set(report), "every existing key kept"
    section = summary[summary.index("### Setup (the run record)") :]
    for text in (
        record(night["conn"], "source")["identity"],
        record(night["conn"], "meter")["resource"],
        PAST,
        FUTURE,
        "nplc: 0.2",
        "autorange: yes",
        "level_offset_db: 0",
        "tolerance_v: 0.0005",
        "repeats: 2",
        "path: loss_db: 6.28",
    ):
        assert text in section, f"{text!r} missing from the summary's setup section"


# -- in-process, on a bench served from this process's threads -------------------------------------


def open_source(resource: str) -> RfSource:
    src = RfSource.open(Link(resource, timeout_s=2.0), commands=merged(SOURCE_COMMANDS, None))
    src.prove()
    src.configure()
    return src


def test_without_the_record_a_previous_users_offset_delivers_3_db_less(inproc_bench):
    sim = inproc_bench(previous_user_config(), serial=False)
    src = open_source(sim.resources()["source"])
    try:
        loss = sim.config.path.loss(100e6)
        src.set(frequency_hz=100e6, level_dbm=-10.0, output=True)
        # the source reads back what was set, so nothing in the read-back shows the offset ...
        assert src.level_dbm == -10.0
        # ... but the simulator's truth: the DUT gets set minus offset minus loss
        assert sim.model.dut_dbm() == pytest.approx(-10.0 - 3.0 - loss, abs=1e-9)
        assert sim.source.modulation["AM"] is True
        src.rf_off()
        state = src.record_state()
        src.set(level_dbm=-10.0, output=True)
        assert sim.model.dut_dbm() == pytest.approx(-10.0 - loss, abs=1e-9)
        assert state["level_offset_db"] == 0.0 and not any(sim.source.modulation.values())
    finally:
        src.rf_off()
        src.close()


def test_a_preset_leaves_rf_off_and_the_driver_assuming_nothing(inproc_bench):
    sim = inproc_bench(previous_user_config(), serial=False)
    src = open_source(sim.resources()["source"])
    try:
        src.set(frequency_hz=200e6, level_dbm=-20.0, output=True)
        state = src.record_state(preset=True)
        # IEEE 488.2 10.32 *RST, and the simulator's truth afterwards
        assert state["preset"] is True and sim.model.output_on is False
        assert sim.source.offset_db == 0.0 and not any(sim.source.modulation.values())
        assert (src.frequency_hz, src.level_dbm, src.output_on) == (None, None, False)
    finally:
        src.close()


def test_the_meter_records_a_stated_range_with_autorange_ended(inproc_bench):
    sim = inproc_bench(previous_user_config(), serial=False)
    commands = merged(METER_COMMANDS, None)
    dmm = ScpiDmm.open(Link(sim.resources()["meter"], timeout_s=2.0), nplc=1.0, range_v=1.0, commands=commands)
    try:
        dmm.prove()
        dmm.configure()
        state = dmm.record_state()
    finally:
        dmm.close()
    # SCPI-1999 SENSe:...:RANGe: a range set by hand switches autoranging off (from memory)
    assert state["range"] == 1.0 and state["autorange"] is False and state["nplc"] == 1.0
    assert state["autozero"] == "OFF", "not set by the plan: recorded as the previous user left it"


def test_a_serial_adc_records_its_plan_settings_and_a_chamber_what_it_reports(inproc_bench):
    sim = inproc_bench(BenchConfig())
    res = sim.resources()
    adc = SerialAdc.open(Link(res["adc_serial"], timeout_s=2.0), query="R", pattern=r"R=([+-]\d+)", scale=5.96e-7)
    chamber = ScpiChamber.open(Link(res["chamber"], timeout_s=2.0))
    try:
        state = adc.record_state()
        chamber.prove()
        chamber.set_temperature(31.0)
        reported = chamber.record_state()
    finally:
        adc.close()
        chamber.close()
    assert state["query"] == "R" and state["scale"] == 5.96e-7 and state["pattern"] == r"R=([+-]\d+)"
    assert "none" in state["read_back"]
    # the simulator's truth: the setpoint just set; the air still near the 25 degC room (0.02 degC noise)
    assert reported["setpoint_c"] == 31.0 == sim.model.thermal.setpoint_c
    assert reported["temperature_c"] == pytest.approx(25.0, abs=0.5)


def test_a_refused_record_command_fails_the_run_naming_instrument_and_command_with_rf_off(inproc_bench, tmp_path):
    sim = inproc_bench(BenchConfig(), serial=False)
    plan = plan_dict(sim.resources(), sweep={"frequency_hz": [100e6], "power_dbm": [-60, -50, -40]})
    plan["analysis"]["fit_dbm"] = [-60, -40]
    plan["instruments"]["source"]["commands"] = {"query_offset": ":SOURce:POWer:LEVel:BOGus?"}
    loaded = parse_plan(yaml.safe_dump(plan, sort_keys=False), str(tmp_path / "plan.yaml"))
    store = Store(tmp_path / "t.db")
    run_id = new_run(store, loaded)
    state, error = Engine(loaded, store, run_id, StopFlag()).run()
    assert state == "failed" and error is not None
    # SCPI-1999 -113 "Undefined header", the command and the step named
    assert "known state" in error and "LEVel:BOGus?" in error and "-113" in error, error
    assert sim.model.output_on is False and store.done_indices(run_id) == set()


# -- calibration-due dates ------------------------------------------------------------------------


def due_plan(write_plan, resources: dict[str, str], due: str, **meter: Any) -> Path:
    plan = plan_dict(resources)
    plan["instruments"]["meter"].update(calibration_due=due, **meter)
    return write_plan(plan)


def line_of(path: Path, key: str) -> int:
    return next(n for n, text in enumerate(path.read_text().splitlines(), start=1) if text.strip().startswith(key))


def test_check_refuses_an_overdue_instrument_naming_file_line_and_key(write_plan):
    path = due_plan(write_plan, OFFLINE, PAST)
    res = cli("check", str(path))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    where = f"{path}, line {line_of(path, 'calibration_due')}, key 'instruments.meter.calibration_due'"
    assert where in res.stderr and PAST in res.stderr and "allow_overdue" in res.stderr, res.stderr


def test_load_plan_refuses_a_past_date_at_its_line_and_key(write_plan):
    path = due_plan(write_plan, OFFLINE, PAST)
    with pytest.raises(InputError) as info:
        load_plan(path)
    key, line = "instruments.meter.calibration_due", line_of(path, "calibration_due")
    assert (info.value.key, info.value.line) == (key, line)


@pytest.mark.parametrize("due, allow", [(PAST, True), (FUTURE, False)])
def test_a_future_date_or_allow_overdue_is_accepted(write_plan, due, allow):
    path = due_plan(write_plan, OFFLINE, due, allow_overdue=allow)
    assert load_plan(path).plan.instruments.meter.calibration_due.isoformat() == due


@pytest.mark.parametrize("command", ["run", "submit"])
def test_run_and_submit_refuse_an_overdue_instrument_before_anything(command, write_plan, db):
    # OFFLINE resources: had an instrument been contacted, the run would fail with exit 1
    res = cli(command, str(due_plan(write_plan, OFFLINE, PAST)), "--db", str(db))
    assert res.returncode == 2 and "instruments.meter.calibration_due" in res.stderr, res.stderr
    assert not db.exists(), "nothing written"


def test_serve_fails_a_job_whose_instrument_became_overdue_without_contacting_it(write_plan, db, tmp_path):
    from nightbench.service.queue import JobQueue

    path = due_plan(write_plan, OFFLINE, PAST)
    # queued while its date was still ahead: parse_plan, as a stored snapshot is read, skips the date
    JobQueue(Store(db)).submit(parse_plan(path.read_text(), str(path)))
    err = tmp_path / "serve.log"
    proc = subprocess.Popen(
        [sys.executable, "-m", "nightbench", "serve", "--db", str(db), "--poll", "0.1"],
        stdout=subprocess.DEVNULL,
        stderr=err.open("w"),
    )
    try:
        with sqlite3.connect(db) as conn:
            job = wait_until(
                lambda: conn.execute("SELECT state, error, run_id FROM jobs WHERE state != 'queued'").fetchone(),
                "the job to end",
                timeout_s=30,
            )
            runs = conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0]
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(10)
    assert job[0] == "failed" and "instruments.meter.calibration_due" in job[1] and PAST in job[1], job
    assert job[2] is None and runs == 0, "no run created, so no instrument contacted"
