"""Every fault the simulator can inject, seen through real sockets and ptys with pyvisa-py."""

from __future__ import annotations

import socket
import time

import pytest

from nightbench.drivers.errors import ConnectionLost, ScpiError
from nightbench.simulators.faults import FaultInjector, parse_fault_flag
from nightbench.simulators.instruments import SimAdc
from nightbench.simulators.physics import BenchConfig
from nightbench.simulators.scpi import MAKER
from tests.conftest import output_settled, session, wait_until


def bench_with(inproc_bench, *faults: str, seed: int = 1):
    config = BenchConfig(seed=seed)
    config.faults = [parse_fault_flag(f) for f in faults]
    return inproc_bench(config)


def errors(s):
    return [code for code, _ in s.drain_errors()]


def test_drop_after_n_messages_then_the_instrument_comes_back(inproc_bench):
    bench = bench_with(inproc_bench, "drop@meter:after=3")
    meter = session(bench.resources()["meter"], timeout_s=1.0)
    meter.query("*IDN?")
    meter.query("*IDN?")
    with pytest.raises(ConnectionLost):
        meter.query("*IDN?")  # the third message: connection closed, no reply
    again = session(bench.resources()["meter"])
    assert again.identify().startswith(MAKER)


def test_drop_for_good_refuses_every_reconnect(inproc_bench):
    bench = bench_with(inproc_bench, "drop@source:after=1,duration_s=-1")
    with pytest.raises(ConnectionLost):
        session(bench.resources()["source"], timeout_s=0.5).identify()
    with pytest.raises(ConnectionLost):
        session(bench.resources()["source"], timeout_s=0.5).identify()


def test_drop_at_a_time(inproc_bench):
    bench = bench_with(inproc_bench, "drop@meter:at_s=0.3")
    meter = session(bench.resources()["meter"], timeout_s=1.0)
    assert meter.identify()
    wait_until(lambda: bench.faults.clock() - bench.faults.started > 0.3, "the fault's time")
    with pytest.raises(ConnectionLost):
        meter.query("*IDN?")


def test_delayed_reply(inproc_bench):
    bench = bench_with(inproc_bench, "delay@meter:after=2,delay_s=0.4")
    meter = session(bench.resources()["meter"])
    meter.identify()
    t0 = time.monotonic()
    meter.query("*IDN?")
    assert time.monotonic() - t0 >= 0.4


def test_stop_answering(inproc_bench):
    bench = bench_with(inproc_bench, "silence@source:after=2")
    src = session(bench.resources()["source"], timeout_s=0.3)
    src.identify()
    with pytest.raises(ConnectionLost, match="no reply"):
        src.query("*IDN?")
    with pytest.raises(ConnectionLost):
        session(bench.resources()["source"], timeout_s=0.3).identify()  # silent for good


def test_garbage_reply_is_reproducible_with_the_seed(inproc_bench):
    replies = []
    for _ in range(2):
        bench = bench_with(inproc_bench, "garbage@meter:after=2", seed=7)
        sock = socket.create_connection(("127.0.0.1", int(bench.resources()["meter"].split("::")[2])))
        f = sock.makefile("rb")
        sock.sendall(b"*IDN?\n")
        assert f.readline().startswith(MAKER.encode())
        sock.sendall(b"*IDN?\n")
        replies.append(f.readline())
        sock.close()
    assert replies[0] == replies[1] and not replies[0].startswith(MAKER.encode())


def test_spurious_error_entry(inproc_bench):
    bench = bench_with(inproc_bench, "spurious_error@source:after=2,code=-221")
    src = session(bench.resources()["source"])
    src.identify()
    src.query("*OPC?")
    assert errors(src) == [-221]


def test_refuse_a_level(inproc_bench):
    bench = bench_with(inproc_bench, "refuse_level@source:level_dbm=-10,count=0")
    src = session(bench.resources()["source"])
    src.apply(["POW -20"])
    with pytest.raises(ScpiError) as info:
        src.apply(["POW -5"])
    assert info.value.scpi_code == -222
    assert float(src.query("POW?")) == -20, "a refused setting did not happen"


def test_meter_overload(inproc_bench):
    bench = bench_with(inproc_bench, "overload@meter:after=3,count=2")
    meter = session(bench.resources()["meter"])
    values = [float(meter.query("READ?")) for _ in range(5)]
    assert values[2] == values[3] == pytest.approx(9.9e37)
    assert abs(values[4]) < 100


def test_probability_faults_fire_at_the_same_messages_for_the_same_seed(inproc_bench):
    def pattern(seed):
        bench = bench_with(inproc_bench, "spurious_error@meter:probability=0.3,count=0", seed=seed)
        meter = session(bench.resources()["meter"])
        out = []
        for _ in range(20):
            meter.query("*OPC?")
            out.append(bool(errors(meter)))
        return out

    first = pattern(3)
    assert first == pattern(3) and any(first) and not all(first)


def test_faults_on_the_serial_meter(inproc_bench):
    bench = bench_with(inproc_bench, "silence@meter:after=2,duration_s=0.5")
    meter = session(bench.resources()["meter_serial"], timeout_s=0.3)
    meter.identify()
    with pytest.raises(ConnectionLost):
        meter.query("*IDN?")
    wait_until(lambda: not bench.faults.away("meter"), "the silence to end")
    meter.flush()
    assert meter.identify().startswith(MAKER)


def test_query_interrupted_and_unterminated(inproc_bench):
    # IEEE 488.2 6.3.2.3 / SCPI-1999 21.8 (from memory): a new message before the reply is sent
    # interrupts the query (-410); a query left without its terminator is unterminated (-420).
    bench = inproc_bench()
    port = int(bench.resources()["meter"].split("::")[2])
    sock = socket.create_connection(("127.0.0.1", port))
    f = sock.makefile("rb")
    sock.sendall(b"VOLT:NPLC 10\nREAD?\n*OPC?\n")  # *OPC? arrives during the 200 ms reading
    assert f.readline() == b"1\n"  # only the second query is answered
    sock.sendall(b"SYST:ERR?\n")
    assert f.readline().startswith(b"-410,")
    sock.sendall(b"*IDN?")  # no terminator
    wait_until(lambda: any(code == -420 for code, _ in list(bench.meter.errors)), "the -420 entry")
    sock.sendall(b"\nSYST:ERR?\n")
    assert f.readline().startswith(b"-420,")
    sock.sendall(b"\xff\xfe\n*OPC?\n")  # garbage bytes from the controller
    assert f.readline() == b"1\n"
    sock.sendall(b"SYST:ERR?\n")
    assert f.readline().startswith(b"-100,")
    sock.close()


def test_adc_board_line_protocol(inproc_bench):
    bench = inproc_bench()
    res = bench.resources()
    adc = session(res["adc_serial"])
    assert adc.query("V") == SimAdc.idn
    src = session(res["source"])
    src.apply(["FREQ 100MHZ", "POW -30", "OUTP ON"])
    wait_until(lambda: output_settled(bench.model, 1e-5), "the detector output to settle")
    assert adc.query("A 4") == "OK"
    reply = adc.query("R")
    assert reply.startswith("R=")
    cfg = bench.config.adc
    volts = (int(reply[2:]) - cfg.offset_counts) * cfg.lsb_v
    assert volts == pytest.approx(bench.model.truth_v(bench.model.dut_dbm(), 100e6), abs=0.002)
    assert adc.query("HELLO") == "ERR 1"


@pytest.mark.parametrize("text", ["drop", "explode@meter", "drop@toaster", "drop@meter:after", "drop@meter:when=3"])
def test_bad_fault_specs_are_refused(text):
    with pytest.raises(ValueError):
        FaultInjector([parse_fault_flag(text)])
