"""The simulator's SCPI parser and error queue, against SCPI-1999 and IEEE 488.2.

Where a rule is cited from the standards without the text at hand, it is marked "from memory".
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from nightbench.simulators.instruments import SimMeter, SimSource
from nightbench.simulators.physics import BenchModel
from nightbench.simulators.scpi import ERRORS, QUEUE_DEPTH


@pytest.fixture
def source():
    return SimSource(BenchModel(), clock=lambda: 0.0)


def errors(inst):
    out = []
    while True:
        entry = inst.execute("SYST:ERR?")
        if entry.startswith("0,"):
            return out
        out.append(int(entry.split(",")[0]))


@pytest.mark.parametrize(
    "message",
    [
        "SOURce:FREQuency:CW 250000000",
        "SOUR:FREQ:CW 250000000",
        "sour:freq:cw 250e6",
        "SoUrCe:FrEq 250E6",
        ":FREQ 250 MHZ",
        "FREQ 250MHZ",
        "FREQuency 0.25 GHZ",
        "FREQ 250000 KHZ",
        "SOUR1:FREQ 250MHZ",
    ],
)
def test_long_short_forms_case_optional_nodes_and_suffixes(source, message):
    # SCPI-1999 vol. 1, 6.2.1 (mnemonics: short form = the upper-case part, case-insensitive),
    # 6.2.5 (optional [nodes]), 7.5.3 (suffix multipliers; MHZ means megahertz), from memory.
    assert source.execute(message) is None
    assert float(source.execute("FREQ?")) == 250e6
    assert errors(source) == []


def test_long_form_must_be_exact(source):
    # SCPI-1999 vol. 1, 6.2.1: only the short or the complete long form is accepted (from memory).
    source.execute("FREQU 1MHZ")
    assert errors(source) == [-113]


def test_several_units_in_one_message_with_relative_paths(source):
    # IEEE 488.2 7.3.4 / SCPI-1999 6.2.4 (from memory): after ';' a header is relative to the
    # previous header's path; a leading ':' returns to the root; '*' commands do not move it.
    assert source.execute("SOUR:FREQ 1MHZ;POW -20;*OPC;:OUTP ON") is None
    assert source.execute("FREQ?;POW?;:OUTP?;*OPC?") == "1000000.000000;-20.000;1;1"
    assert errors(source) == []


def test_level_in_volts_into_50_ohm(source):
    # Common practice: 0 dBm = 1 mW = 0.2236 V rms into 50 ohm.
    source.execute("POW 223.6 MV")
    assert float(source.execute("POW?")) == pytest.approx(0.0, abs=0.001)
    source.execute("POW 0.2236V")
    assert float(source.execute("POW?")) == pytest.approx(0.0, abs=0.001)


@pytest.mark.parametrize(
    "message, code",
    [
        ("FREQ 1 DBM", -131),  # invalid suffix
        ("FREQ lots", -104),  # data type error
        ("FREQ 99 GHZ", -222),  # data out of range
        ("POW 80", -222),
        ("OUTP MAYBE", -224),  # illegal parameter value
        ("NOSUCH:THING 1", -113),  # undefined header
        ("FREQ", -109),  # missing parameter
        ("OUTP ON,OFF", -108),  # parameter not allowed
        ("FREQ::CW 1", -102),  # syntax error
    ],
)
def test_errors_get_the_standard_codes(source, message, code):
    # SCPI-1999 vol. 2, 21.8: standard error numbers.
    source.execute(message)
    assert errors(source) == [code]


def test_error_entries_are_code_comma_quoted_message_and_fifo(source):
    # SCPI-1999 vol. 2, 21.8: '<code>,"<description>[;<info>]"', oldest first, 0,"No error" when empty.
    source.execute("NOSUCH")
    source.execute("FREQ 99 GHZ")
    first = source.execute("SYST:ERR?")
    assert first.startswith('-113,"Undefined header') and first.endswith('"')
    assert source.execute("SYSTem:ERRor:NEXT?").startswith('-222,"Data out of range')
    assert source.execute("SYST:ERR?") == '0,"No error"'


def test_queue_overflow_replaces_the_newest_with_350(source):
    # SCPI-1999 vol. 2, 21.8 (from memory): on overflow the most recent entry is replaced by -350.
    for _ in range(QUEUE_DEPTH + 5):
        source.execute("NOSUCH")
    found = errors(source)
    assert len(found) == QUEUE_DEPTH and found[-1] == -350 and set(found[:-1]) == {-113}


def test_common_commands(source):
    # IEEE 488.2 10.14: *IDN? gives four comma-separated fields (maker, model, serial, firmware).
    assert len(source.execute("*IDN?").split(",")) == 4
    assert source.execute("*OPC?") == "1"
    assert source.execute("*WAI") is None
    # IEEE 488.2 11.5.1: a command error sets CME, bit 5 (32), of the event status register;
    # reading *ESR? clears it; *CLS clears the error queue.
    source.execute("NOSUCH")
    assert int(source.execute("*ESR?")) & 32
    assert source.execute("*ESR?") == "0"
    source.execute("NOSUCH")
    source.execute("*CLS")
    assert errors(source) == []
    # *RST returns to a safe known state: output off, lowest level.
    source.execute("POW 0;:OUTP ON")
    source.execute("*RST")
    assert source.execute("OUTP?") == "0"
    assert float(source.execute("POW?")) == source.model.config.source.min_dbm


def test_meter_settings_and_queries():
    meter = SimMeter(BenchModel(), clock=lambda: 0.0, sleep=lambda s: None)
    meter.execute("CONF:VOLT:DC;:SENS:VOLT:DC:NPLC 10;RANG 1")
    assert meter.execute("VOLT:NPLC?;:VOLT:RANG?") == "10;1"
    assert errors(meter) == []
    meter.execute("VOLT:DC:NPLC 1000")
    assert errors(meter) == [-222]


@pytest.mark.parametrize(
    "value, code",
    [
        ("-1V", -222),  # a valid number and suffix, but no rms voltage is negative
        ("-1 MV", -222),
        ("1.2.3", -121),  # invalid character in number
        ("-", -121),
        ("1e", -121),  # an exponent without digits
        ("1e+", -121),
        ("5 XYZ", -131),  # invalid suffix
        ("1V2", -131),
        ("lots", -104),  # character data where a number belongs: data type error
        ('"-10"', -104),  # string data
    ],
)
def test_malformed_numbers_get_their_code_and_the_instrument_keeps_answering(inproc_bench, value, code):
    # IEEE 488.2 7.7.2 / 7.7.3 (decimal numeric program data and its suffix) and SCPI-1999 vol. 2,
    # 21.8 (-104 data type error, -121 invalid character in number, -131 invalid suffix, -222 data
    # out of range), from memory. Over a real socket: a parser fault must not end the connection.
    import socket

    bench = inproc_bench(serial=False)
    port = int(bench.resources()["source"].split("::")[2])
    with socket.create_connection(("127.0.0.1", port), timeout=2.0) as sock:
        replies = sock.makefile("rb")
        sock.sendall(f":POW {value}\n*IDN?\n".encode())
        assert replies.readline().decode().startswith(SimSource.idn)
        sock.sendall(b":SYST:ERR?\n")
        assert int(replies.readline().split(b",")[0]) == code
        sock.sendall(b":SYST:ERR?\n")
        assert replies.readline().startswith(b"0,"), "exactly one error for one bad parameter"


NUMBER_HEADERS = ["FREQ", "POW", "OUTP", "SENS:VOLT:DC:NPLC", "VOLT:RANG", "CONF:VOLT:DC", "TRIG:SOUR"]


NUMBERISH = st.builds(
    "".join,
    st.tuples(  # decimal numeric program data, right and wrong
        st.sampled_from(["", "+", "-"]),
        st.sampled_from(["", "0", "1", "25", "1.5", ".5", "1.", "1.2.3", "MIN"]),
        st.sampled_from(["", "e", "E3", "e-2", "e+", "e999"]),
        st.sampled_from(["", " "]),
        st.sampled_from(["", "V", "MV", "uv", "DBM", "HZ", "MHZ", "X", "V2", "#", "-"]),
    ),
)
ANY_TEXT = st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=126, exclude_characters=';"'), max_size=12)


@settings(max_examples=400, deadline=None, derandomize=True)
@given(header=st.sampled_from(NUMBER_HEADERS), text=st.one_of(NUMBERISH, ANY_TEXT))
def test_no_parameter_text_can_break_the_parser(header, text):
    # Whatever follows a header, the instrument answers with an error-queue entry or obeys: it
    # never raises (a raise in a simulator kills its client's thread: the instrument goes silent).
    source = SimSource(BenchModel(), clock=lambda: 0.0)
    meter = SimMeter(BenchModel(), clock=lambda: 0.0, sleep=lambda s: None)
    for inst in (source, meter):
        inst.execute(f"{header} {text}")
        codes = errors(inst)
        assert all(c in ERRORS for c in codes), codes
        assert inst.execute("*OPC?") == "1"
