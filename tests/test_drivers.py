"""Drivers against the simulated bench in its own process: every injected fault ends in a
completed run (after a reconnect) or a failed run with a clear error and RF off, and never in
a stored point that did not happen. Plus the serial ADC, pyserial, dialects and resource checks.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
import yaml

from nightbench.drivers.errors import ConnectionLost, InputError, ScpiError
from nightbench.drivers.scpi import join_program, split_response
from nightbench.drivers.transport import check_resource
from nightbench.measure.roles import open_source
from nightbench.measure.signals import StopFlag
from nightbench.plan.load import parse_plan
from nightbench.plan.model import SourceSpec
from nightbench.runs import execute, new_run
from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig, BenchModel
from nightbench.store.db import Store
from tests.conftest import assert_never_above, cli, plan_dict, source_log

TRUTH = BenchModel(BenchConfig())
LEVELS = [-60, -50, -40, -30, -20, -10]


def run_plan(tmp_path: Path, resources: dict, **overrides):
    plan = plan_dict(resources, sweep={"frequency_hz": [100e6], "power_dbm": LEVELS}, **overrides)
    plan["path"] = {"loss_db": TRUTH.config.path.loss(100e6)}
    for role in ("source", "meter"):
        plan["instruments"][role]["timeout_s"] = 0.5
    loaded = parse_plan(yaml.safe_dump(plan, sort_keys=False), "plan.yaml")
    store = Store(tmp_path / "faults.db")
    run_id = new_run(store, loaded)
    state, error = execute(loaded, store, run_id, StopFlag())
    rows = [dict(r) for r in store.points(run_id)]
    events = [dict(r) for r in store.conn.execute("SELECT kind, message FROM events WHERE run_id=?", (run_id,))]
    return state, error, rows, events


def sim_with(tmp_path: Path, *faults: str) -> SimProcess:
    args = ["--log", str(tmp_path / "source.jsonl")]
    for fault in faults:
        args += ["--fault", fault]
    return SimProcess(*args)


def last_output(tmp_path: Path) -> bool:
    """What the source was last told about its output; the log is also checked for the ceiling."""
    assert_never_above(tmp_path / "source.jsonl", 0.0)
    return source_log(tmp_path / "source.jsonl")[-1]["output"]


def assert_points_are_real(rows):
    """Every stored point is a measurement of what was set: within tolerance of the law."""
    for r in rows:
        if r["overload"]:
            assert r["value_v"] is None
            continue
        expected = TRUTH.truth_v(r["power_dbm"], r["frequency_hz"])
        assert abs(r["value_v"] - expected) < 0.0005 + 3 * (r["stdev_v"] or 0), r


METER_FAULTS = [
    "drop@meter:after=12",  # the link drops, the meter comes back
    "silence@meter:after=12,duration_s=0.8",  # stops answering for a while
    "delay@meter:after=12,delay_s=0.9",  # one reply later than the timeout: stale-reply trap
    "garbage@meter:after=12",  # junk instead of a reading
    "spurious_error@meter:after=12",  # an error-queue entry out of nowhere
]


# A serial line cannot drop a connection (the pty stays), so drop runs on TCP only.
@pytest.mark.parametrize(
    "fault, meter_key",
    [(f, "meter") for f in METER_FAULTS] + [(f, "meter_serial") for f in METER_FAULTS if not f.startswith("drop")],
)
def test_meter_faults_recover_and_store_only_real_points(tmp_path, fault, meter_key):
    with sim_with(tmp_path, fault) as sim:
        resources = dict(sim.resources, meter=sim.resources[meter_key])
        state, error, rows, events = run_plan(tmp_path, resources)
    assert state == "completed", error
    assert [r["power_dbm"] for r in rows] == LEVELS, "every point exactly once"
    assert_points_are_real(rows)
    assert any(e["kind"] == "fault" for e in events), "the fault is recorded"
    assert last_output(tmp_path) is False


@pytest.mark.parametrize(
    "fault",
    [
        "drop@source:after=6",
        "silence@source:after=6,duration_s=0.8",
        "garbage@source:after=6",
        "spurious_error@source:after=6",
        "refuse_level@source:level_dbm=-30",  # refused once, accepted on the retry
    ],
)
def test_source_faults_recover(tmp_path, fault):
    with sim_with(tmp_path, fault) as sim:
        state, error, rows, events = run_plan(tmp_path, sim.resources)
    assert state == "completed", error
    assert [r["power_dbm"] for r in rows] == LEVELS
    assert_points_are_real(rows)
    assert any(e["kind"] == "reconnect" for e in events)
    assert last_output(tmp_path) is False


@pytest.mark.parametrize(
    "fault, words",
    [
        ("drop@meter:after=12,duration_s=-1", "meter"),
        ("silence@meter:after=12", "no reply"),
        ("refuse_level@source:level_dbm=-30,count=0", "-222"),
    ],
)
def test_permanent_faults_fail_clearly_with_rf_off(tmp_path, fault, words):
    with sim_with(tmp_path, fault) as sim:
        state, error, rows, _ = run_plan(tmp_path, sim.resources)
    assert state == "failed"
    assert words in error and "while measuring point" in error
    assert all(r["power_dbm"] < -30 for r in rows) or "meter" in fault
    assert_points_are_real(rows)
    assert last_output(tmp_path) is False, "RF off is the last thing the source hears"


def test_meter_overload_is_stored_flagged_not_as_a_value(tmp_path):
    # three overrange readings in a row (OVERLOAD_READINGS) end one point as overloaded, wherever
    # they fall: independent of how many readings the settle detector takes per point
    with sim_with(tmp_path, "overload@meter:after=40,count=3") as sim:
        state, error, rows, _ = run_plan(tmp_path, sim.resources)
    assert state == "completed", error
    assert any(r["overload"] for r in rows) and not all(r["overload"] for r in rows)
    assert_points_are_real(rows)


@pytest.mark.parametrize(
    "meter, samples, fault",
    [
        ("meter", 4, None),
        ("meter", 1, None),  # one sample: every request asks the error queue too
        ("meter", 4, "overload@meter:after=20,count=3"),  # a point ended by overload, mid-settle
        ("adc_serial", 2, None),  # the line protocol over a pty
    ],
)
def test_every_reading_taken_is_collected_and_stored(tmp_path, inproc_bench, meter, samples, fault):
    """The engine asks for the next reading before it judges the last one (engine.measure), so one
    reading is always in flight. Whatever ends a point (settled, timed out, overloaded), that
    reading is collected: as the first sample, or stored with the overloaded point. So the
    conversions the simulated meter made equal the readings stored, and no late reply lands on
    a later point (its value would then be another level's: assert_points_are_real)."""
    from nightbench.simulators.faults import parse_fault_flag

    bench = inproc_bench(BenchConfig(faults=[parse_fault_flag(fault)] if fault else []))
    taken = {"meter": 0, "adc_serial": 0}
    instrument = bench.meter if meter == "meter" else bench.adc
    real_sleep = instrument.sleep

    def counting_sleep(seconds: float) -> None:  # each conversion sleeps once for its window
        taken[meter] += 1
        real_sleep(seconds)

    instrument.sleep = counting_sleep
    resources = bench.resources()
    instruments = plan_dict(resources)["instruments"]
    if meter == "adc_serial":
        instruments["meter"] = adc_meter(resources["adc_serial"], identify="V")  # proven by its identity, not a reading
    state, error, rows, events = run_plan(tmp_path, resources, instruments=instruments, measure={"samples": samples})
    assert state == "completed", error
    with sqlite3.connect(tmp_path / "faults.db") as conn:
        stored = conn.execute("SELECT count(*) FROM readings").fetchone()[0]
    assert taken[meter] == stored > len(rows) * (samples + 1), events
    assert bool(fault) == any(r["overload"] for r in rows)
    # each value is of its own level: 5 dB apart, the levels' outputs differ by about 100 mV, so a
    # reply one reading late would be off by far more than the tolerance and 5 single-reading sigmas
    window = TRUTH.integration_s(0.1)
    sigma = TRUTH.config.detector.output_noise_v * (0.02 / window) ** 0.5  # at a 20 ms window (physics.py)
    for r in rows:
        if not r["overload"]:
            assert abs(r["value_v"] - TRUTH.truth_v(r["power_dbm"], r["frequency_hz"])) < 0.0005 + 5 * sigma, r


def test_serial_adc_board_plan_completes(tmp_path):
    adc = TRUTH.config.adc
    with sim_with(tmp_path) as sim:
        meter = {
            "driver": "serial-adc",
            "resource": sim.resources["adc_serial"],
            "identify": "V",
            "setup": ["A 2"],
            "query": "R",
            "pattern": r"R=([+-]\d+)",
            "overload": "OVER",
            "scale": adc.lsb_v,
            "offset": -adc.offset_counts * adc.lsb_v,
            "baud_rate": 115200,
        }
        instruments = {"source": {"driver": "scpi-source", "resource": sim.resources["source"]}, "meter": meter}
        state, error, rows, _ = run_plan(tmp_path, sim.resources, instruments=instruments)
    assert state == "completed", error
    assert len(rows) == len(LEVELS)
    assert_points_are_real(rows)


def adc_meter(resource: str, **keys) -> dict:
    adc = TRUTH.config.adc
    return {
        "driver": "serial-adc",
        "resource": resource,
        "setup": ["A 2"],
        "query": "R",
        "pattern": r"R=([+-]\d+)",
        "overload": "OVER",
        "scale": adc.lsb_v,
        "offset": -adc.offset_counts * adc.lsb_v,
        "baud_rate": 115200,
        **keys,
    }


# A pty cannot hang up, so `drop` makes the board go quiet for a while (see simulators/links.py).
@pytest.mark.parametrize("fault", ["drop@adc:after=12,duration_s=0.6", "garbage@adc:after=12"])
def test_serial_adc_without_identify_reconnects_after_a_fault(tmp_path, fault):
    """A board with no identity query is proven back by a reading it answers, not by comparing
    identities: its "identity" would be a reading, which never repeats."""
    with sim_with(tmp_path, fault) as sim:
        instruments = {
            "source": {"driver": "scpi-source", "resource": sim.resources["source"]},
            "meter": adc_meter(sim.resources["adc_serial"]),
        }
        state, error, rows, events = run_plan(tmp_path, sim.resources, instruments=instruments)
    assert state == "completed", error
    assert [e["message"] for e in events if e["kind"] == "reconnect"] == ["reconnecting the meter"]
    assert [r["power_dbm"] for r in rows] == LEVELS
    assert_points_are_real(rows)
    assert last_output(tmp_path) is False


def test_plain_pyserial_transport_plan_completes(tmp_path):
    with sim_with(tmp_path) as sim:
        port = sim.resources["meter_serial"].removeprefix("ASRL").removesuffix("::INSTR")
        state, error, rows, _ = run_plan(tmp_path, dict(sim.resources, meter=f"serial:{port}"))
    assert state == "completed", error
    assert_points_are_real(rows)


# The simulator's invented non-standard dialect (simulators/instruments.py, "alt").
ALT_SOURCE = {
    "set_frequency": "TONE:PITC {frequency_hz:.0f}",
    "set_level": "TONE:LOUD {level_dbm:.2f}",
    "output_on": "TONE:SOUN ON",
    "output_off": "TONE:SOUN OFF",
    "query_frequency": "TONE:PITC?",
    "query_level": "TONE:LOUD?",
    "query_output": "TONE:SOUN?",
    "error_query": "ERR?",
    "modulation_off": "TONE:WOBB OFF",
    "query_modulation": "TONE:WOBB?",
    "offset_off": "TONE:SHIF 0",
    "query_offset": "TONE:SHIF?",
}
ALT_METER = {
    "configure": "CONF:DCV",
    "set_nplc": "DCV:INT {nplc:g}",
    "set_range": "DCV:RANG {range_v:g}",
    "set_trigger": "TRIG:MODE IMM",
    "read": "DCV?",
    "error_query": "ERR?",
    "query_function": "MODE?",
    "query_range": "DCV:RANG?",
    "query_autorange": "DCV:ARAN?",
    "query_nplc": "DCV:INT?",
    "query_autozero": "DCV:AZER?",
}


def test_dialect_override_completes_against_a_simulator_in_that_dialect(tmp_path):
    with SimProcess("--dialect", "alt", "--log", str(tmp_path / "source.jsonl")) as sim:
        plain = run_plan(tmp_path, sim.resources)
        # standard SCPI is not understood by this dialect: a clear failure naming the command
        assert plain[0] == "failed" and "OUTPut:STATe" in plain[1] and "opening the instruments" in plain[1]
        instruments = {
            "source": {"driver": "scpi-source", "resource": sim.resources["source"], "commands": ALT_SOURCE},
            "meter": {"driver": "scpi-dmm", "resource": sim.resources["meter"], "nplc": 0.1, "commands": ALT_METER},
        }
        state, error, rows, _ = run_plan(tmp_path, sim.resources, instruments=instruments)
    assert state == "completed", error
    assert_points_are_real(rows)
    assert last_output(tmp_path) is False


@pytest.mark.parametrize(
    "sim_args, commands, kind, code, step, command",
    [
        # a plan that overrides only the error query for the alternative dialect: the RF-off of
        # configure() is refused (-113, undefined header) and the error queue says so
        (
            ["--dialect", "alt"],
            {"error_query": ALT_SOURCE["error_query"]},
            ScpiError,
            -113,
            "the source could not be configured",
            ":OUTPut:STATe OFF",
        ),
        (["--fault", "silence@source"], None, ConnectionLost, None, "the source did not identify itself", "*IDN?"),
    ],
)
def test_an_error_while_opening_keeps_its_type_and_fields(sim_args, commands, kind, code, step, command):
    with SimProcess(*sim_args) as sim:
        spec = SourceSpec(driver="scpi-source", resource=sim.resources["source"], timeout_s=0.5, commands=commands)
        with pytest.raises(kind) as info:
            open_source(spec)
    err = info.value
    assert type(err) is kind and err.scpi_code == code
    assert err.resource == sim.resources["source"] and command in (err.command or "")
    assert str(err).startswith(step + ": "), "what was being done comes first"


def test_adding_context_keeps_the_object_its_type_and_its_fields():
    err = ScpiError("source refused a setting", resource="TCPIP::h::1::SOCKET", scpi_code=-222)
    same = err.add_context("the source could not be configured", resource="other", command=":POW 5")
    assert same is err and type(same) is ScpiError
    assert (err.resource, err.command, err.scpi_code) == ("TCPIP::h::1::SOCKET", ":POW 5", -222), (
        "a field already set is kept; an unset one is filled"
    )
    assert err.args == (err.message,) == ("the source could not be configured: source refused a setting",)
    plan_error = InputError("no such file", file="plan.yaml").add_context("path", resource="ignored", key="path")
    assert (plan_error.file, plan_error.key) == ("plan.yaml", "path") and not hasattr(plan_error, "resource")
    assert str(plan_error) == "plan.yaml, key 'path': path: no such file"


def test_bad_command_templates_are_refused_at_check(write_plan, db):
    from tests.conftest import OFFLINE

    plan = plan_dict(OFFLINE)
    plan["instruments"]["source"]["commands"] = {"set_levle": "LVL {level_dbm}"}
    res = cli("check", str(write_plan(plan)))
    assert res.returncode == 2 and "unknown command name 'set_levle'" in res.stderr
    plan["instruments"]["source"]["commands"] = {"set_level": "LVL {level}"}
    res = cli("check", str(write_plan(plan)))
    assert res.returncode == 2 and "does not format" in res.stderr


@pytest.mark.parametrize(
    "resource, ok",
    [
        ("TCPIP::192.0.2.7::5025::SOCKET", True),
        ("TCPIP0::192.0.2.7::inst0::INSTR", True),
        ("GPIB0::22::INSTR", True),
        ("USB0::0x1234::0x5678::SN001::INSTR", True),
        ("ASRL/dev/ttyUSB0::INSTR", True),
        ("serial:/dev/ttyUSB0", True),
        ("serial:loop://", True),
        ("ASRL::/dev/ttyUSB0::INSTR", False),  # FIELD-NOTES: rejected by pyvisa
        ("TCPIP::192.0.2.7::SOCKET", False),  # no port
        ("TCPIP::192.0.2.7::70000::SOCKET", False),
        ("/dev/ttyUSB0", False),
        ("serial:", False),
        ("", False),
    ],
)
def test_resource_strings_are_checked_without_opening(resource, ok):
    # VISA resource syntax per the VISA specification as pyvisa parses it (reference library).
    assert (check_resource(resource) is None) == ok


def test_program_and_response_messages():
    # IEEE 488.2 7.3.4 (program message units joined by ';') and 8.4 (response units joined by
    # ';', strings quoted), from memory.
    assert join_program(["FREQ 1", ":POW -3", "*OPC?"]) == ":FREQ 1;:POW -3;*OPC?"
    assert split_response('1;-222,"Data out of range; 99 > 20";+4.5E-1') == [
        "1",
        '-222,"Data out of range; 99 > 20"',
        "+4.5E-1",
    ]


def test_unreachable_source_is_named_and_nothing_stored(tmp_path):
    from tests.conftest import OFFLINE

    state, error, rows, _ = run_plan(tmp_path, OFFLINE)
    assert state == "failed" and "TCPIP::127.0.0.1::1::SOCKET" in error and "opening the instruments" in error
    assert rows == []


def test_points_and_readings_stay_consistent_after_faults(tmp_path):
    with sim_with(tmp_path, "garbage@meter:after=9", "drop@meter:after=20") as sim:
        state, error, _, _ = run_plan(tmp_path, sim.resources)
    assert state == "completed", error
    conn = sqlite3.connect(tmp_path / "faults.db")
    orphans = conn.execute(
        "SELECT COUNT(*) FROM readings r LEFT JOIN points p ON p.run_id=r.run_id AND p.idx=r.idx WHERE p.idx IS NULL"
    ).fetchone()[0]
    assert orphans == 0, "no raw readings of a point that was not stored"


def test_a_plan_can_name_the_visa_library(tmp_path):
    with sim_with(tmp_path) as sim:
        plan = plan_dict(sim.resources)
        plan["instruments"]["source"]["visa_library"] = "@py"  # explicit pyvisa-py
        state, error, _, _ = run_plan(tmp_path, sim.resources, instruments=plan["instruments"])
        assert state == "completed", error
        plan["instruments"]["meter"]["visa_library"] = "@no-such-backend"
        state, error, _, _ = run_plan(tmp_path, sim.resources, instruments=plan["instruments"])
    assert state == "failed" and "cannot load the VISA library '@no-such-backend'" in error
    assert last_output(tmp_path) is False, "the source was opened first and is left safe"


def test_meter_range_from_the_plan_reaches_the_meter(tmp_path):
    # range_v 0.1: the detector's 0.4-1.6 V at these levels is beyond 120 % of range, so every
    # point is an overload (SCPI-1999 overrange, 9.9E37), stored flagged and without a value.
    with sim_with(tmp_path) as sim:
        plan = plan_dict(sim.resources)
        plan["instruments"]["meter"]["range_v"] = 0.1
        state, error, rows, _ = run_plan(tmp_path, sim.resources, instruments=plan["instruments"])
    assert state == "completed", error
    assert rows and all(r["overload"] and r["value_v"] is None for r in rows)


def test_socket_links_have_tcp_nodelay(inproc_bench):
    # FIELD-NOTES trap 10: TCP_NODELAY on the session's socket (pyvisa-py ignores the VISA attribute).
    import socket

    from nightbench.drivers.transport import open_transport

    link = open_transport(inproc_bench().resources()["source"])
    try:
        sock = link._inst.visalib.sessions[link._inst.session].interface
        assert sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) != 0
    finally:
        link.close()
