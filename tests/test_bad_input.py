"""Bad input changes nothing (invariant 5): a corpus of broken and hostile plans, and a fuzz test
of random plan documents. Each must end with exit code 2, a plain message naming the file (and
line and key where they exist), no traceback, no database, and no instrument contacted."""

from __future__ import annotations

import socket
import threading
from pathlib import Path

import pytest
import yaml
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from nightbench.cli import main
from nightbench.drivers.errors import InputError
from nightbench.plan.load import parse_plan
from tests.conftest import plan_dict


class Tripwire:
    """A listening loopback port that counts connections: plans point their instruments here."""

    def __init__(self) -> None:
        self.sock = socket.create_server(("127.0.0.1", 0))
        self.sock.settimeout(0.1)
        self.port = self.sock.getsockname()[1]
        self.connections = 0
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    def _serve(self) -> None:
        while not self.stop.is_set():
            try:
                conn, _ = self.sock.accept()
            except (TimeoutError, OSError):
                continue
            self.connections += 1
            conn.close()

    def close(self) -> None:
        self.stop.set()
        self.thread.join()
        self.sock.close()


@pytest.fixture(scope="module")
def tripwire():
    wire = Tripwire()
    yield wire
    wire.close()
    assert wire.connections == 0, "bad input must never contact an instrument"


def base_text(port: int, **overrides) -> str:
    res = f"TCPIP::127.0.0.1::{port}::SOCKET"
    return yaml.safe_dump(plan_dict({"source": res, "meter": res}, **overrides), sort_keys=False)


def edit(old: str, new: str):
    def apply(text: str) -> str:
        assert old in text, old
        return text.replace(old, new, 1)

    return apply


BOMB = "a: &a [x, x, x, x, x, x, x, x, x, x]\n" + "".join(
    f"{c}: &{c} [*{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}]\n" for p, c in zip("abcdefgh", "bcdefghi")
)

# (what a tired engineer or an attacker might hand over, a word the message must contain)
CORPUS = [
    ("empty", lambda t: "", "empty"),
    ("only comments", lambda t: "# todo: fill in tomorrow\n", "no YAML document"),
    ("binary", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "binary"),
    ("utf-16", lambda t: t.encode("utf-16"), "binary"),
    ("not utf-8", b"name: caf\xe9\n", "UTF-8"),
    ("a list", lambda t: "- name: x\n- name: y\n", "mapping"),
    ("a scalar", lambda t: "just some words\n", "mapping"),
    ("tabs", lambda t: "name: x\n\tsweep: {}\n", "not valid YAML"),
    ("unclosed bracket", edit("power_dbm:", "power_dbm: [1, 2"), "not valid YAML"),
    ("duplicate key", lambda t: t + "name: other\n", "appears twice"),
    ("missing name", lambda t: "\n".join(ln for ln in t.splitlines() if not ln.startswith("name:")), "name"),
    ("name with a path", edit("name: test-plan", "name: ../../etc/passwd"), "name"),
    ("top-level typo", edit("analysis:", "analysys:"), "unknown key"),
    ("nested typo", edit("samples: 4", "sampels: 4"), "unknown key"),
    ("above the ceiling", edit("stop: -10", "stop: 20"), "ceiling"),
    ("no ceiling", edit("dut_max_dbm: 0", "dut_min_dbm: 0"), "dut_min_dbm"),
    ("step does not divide", edit("step: 5", "step: 7"), "whole number of steps"),
    ("zero step", edit("step: 5", "step: 0"), "zero"),
    ("step points away", edit("step: 5", "step: -5"), "away"),
    ("zero points", edit("step: 5", "points: 0"), "points"),
    ("nan tolerance", edit("tolerance_v: 0.0005", "tolerance_v: .nan"), "finite"),
    ("infinite timeout", edit("timeout_s: 2\n", "timeout_s: .inf\n"), "timeout_s"),
    ("negative timeout", edit("timeout_s: 2\n", "timeout_s: -3\n"), "timeout_s"),
    ("timeout with units", edit("timeout_s: 2\n", "timeout_s: 2 s\n"), "timeout_s"),
    ("zero samples", edit("samples: 4", "samples: 0"), "samples"),
    ("fractional samples", edit("samples: 4", "samples: 4.5"), "samples"),
    ("negative frequency", edit("- 100000000.0", "- -1.0e8"), "positive"),
    ("frequency as text", edit("- 100000000.0", "- 100 MHz"), "frequency_hz"),
    ("no frequencies", edit("frequency_hz:\n  - 100000000.0", "frequency_hz: []"), "at least one"),
    ("bare serial path", edit("resource: TCPIP", "resource: /dev/ttyUSB0 #"), "resource"),
    ("empty resource", lambda t: t.replace("resource: TCPIP::127.0.0.1", "resource: ''  #", 1), "empty"),
    ("unknown driver", edit("driver: scpi-dmm", "driver: volt-o-matic"), "unknown driver"),
    ("adc without pattern", edit("driver: scpi-dmm", "driver: serial-adc\n    query: R\n    scale: 1.0e-6"), "pattern"),
    (
        "bad regex",
        edit("driver: scpi-dmm", "driver: serial-adc\n    query: R\n    scale: 1.0\n    pattern: '(['"),
        "regular expression",
    ),
    ("two path forms", edit("loss_db: 6.28", "loss_db: 6.28\n  table: [[1.0e8, 6]]"), "path"),
    ("table with a clash", edit("loss_db: 6.28", "table: [[1.0e8, 6], [1.0e8, 7]]"), "path"),
    ("missing touchstone", edit("loss_db: 6.28", "touchstone: cal/nowhere.s2p"), "nowhere.s2p"),
    ("fit range reversed", edit("- -60\n  - -20", "- -20\n  - -60"), "fit_dbm"),
    ("fit range of three", edit("- -60\n  - -20", "- -60\n  - -40\n  - -20"), "fit_dbm"),
    ("fit range outside the sweep", edit("- -60\n  - -20", "- -95\n  - -75"), "wholly outside"),
    ("fit range with two levels", edit("- -60\n  - -20", "- -42\n  - -33"), "at least 3"),
    ("sweep order key", edit("sweep:\n", "sweep:\n  order: [power_dbm, frequency_hz]\n"), "key 'sweep.order'"),
    ("alias bomb", lambda t: BOMB, "aliases"),
    ("deep nesting", lambda t: "name: " + "[" * 5000 + "]" * 5000 + "\n", "not valid YAML|nested"),
    ("a billion points", edit("step: 5", "step: 0.00000006"), "allowed"),
    ("python object", lambda t: "!!python/object/apply:os.system ['touch /tmp/owned']\n", "not valid YAML"),
    ("key is a list", lambda t: "? [a, b]\n: 1\n", "plain name"),
    ("huge file", lambda t: "# " + "x" * (1 << 21) + "\n", "bytes"),
]


@pytest.mark.parametrize("name, mutate, words", CORPUS, ids=[c[0] for c in CORPUS])
def test_bad_plan_is_refused_plainly_and_changes_nothing(tmp_path, tripwire, name, mutate, words):
    text = base_text(tripwire.port)
    content = mutate if isinstance(mutate, bytes) else mutate(text)
    plan = tmp_path / "tonight.yaml"
    plan.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
    db = tmp_path / "lab.db"
    for command in (["check", str(plan)], ["run", str(plan), "--db", str(db)]):
        result = CliRunner().invoke(main, command)
        # the CLI's own exit (the `friendly` wrapper), not an exception escaping with a traceback
        assert isinstance(result.exception, SystemExit) and result.exit_code == 2, (name, result.exception)
        message = result.stderr
        assert result.stdout == "", "the refusal goes to stderr only"
        assert message.startswith("nightbench: ") and str(plan) in message, message
        assert any(w in message for w in words.split("|")), (name, message)
    assert not db.exists(), "bad input must not create a database"
    assert not Path("/tmp/owned").exists()


def test_the_unbroken_base_plan_is_accepted(tmp_path, tripwire):
    # each corpus entry is one edit of this plan, so each refusal is that edit's doing
    plan = tmp_path / "tonight.yaml"
    plan.write_text(base_text(tripwire.port))
    result = CliRunner().invoke(main, ["check", str(plan)])
    assert result.exit_code == 0 and result.exception is None, result.output
    assert "valid plan 'test-plan', 13 points" in result.stdout


def test_missing_and_directory_plans(tmp_path):
    for target, words in ((tmp_path / "nope.yaml", "no such file"), (tmp_path, "directory")):
        result = CliRunner().invoke(main, ["check", str(target)])
        assert result.exit_code == 2 and words in result.output


# -- fuzz ------------------------------------------------------------------------------------
KEYS = [
    "name",
    "description",
    "dut",
    "id",
    "notes",
    "instruments",
    "source",
    "meter",
    "driver",
    "resource",
    "timeout_s",
    "nplc",
    "path",
    "loss_db",
    "table",
    "touchstone",
    "limits",
    "dut_max_dbm",
    "sweep",
    "frequency_hz",
    "power_dbm",
    "start",
    "stop",
    "step",
    "points",
    "settle",
    "tolerance_v",
    "measure",
    "samples",
    "analysis",
    "fit_dbm",
    "error_limit_db",
    "elements",
    "coupler",
    "commands",
]
scalars = (
    st.none()
    | st.booleans()
    | st.integers(-(10**12), 10**12)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=12)
    | st.sampled_from(
        ["scpi-source", "scpi-dmm", "serial-adc", "70e6", "-1e9", "TCPIP::127.0.0.1::1::SOCKET", "serial:", ".nan"]
    )
)
documents = st.recursive(
    scalars,
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=6), inner, max_size=5)
    ),
    max_leaves=40,
)


def mutated_plans():
    """Valid plans with one subtree replaced by anything at all."""
    base = plan_dict({"source": "TCPIP::127.0.0.1::1::SOCKET", "meter": "TCPIP::127.0.0.1::2::SOCKET"})

    def paths(node, prefix=()):
        yield prefix
        if isinstance(node, dict):
            for k, v in node.items():
                yield from paths(v, prefix + (k,))
        elif isinstance(node, list):
            for i, v in enumerate(node):
                yield from paths(v, prefix + (i,))

    def replace(choice):
        import copy

        where, value = choice
        doc = copy.deepcopy(base)
        if not where:
            return value
        node = doc
        for key in where[:-1]:
            node = node[key]
        node[where[-1]] = value
        return doc

    return st.tuples(st.sampled_from(list(paths(base))), documents).map(replace)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
@given(st.one_of(documents, mutated_plans()))
def test_fuzzed_plans_never_escape_as_anything_but_input_errors(doc):
    text = yaml.safe_dump(doc, sort_keys=False)
    try:
        parse_plan(text, "fuzz.yaml")
    except InputError as exc:
        assert str(exc).startswith("fuzz.yaml"), str(exc)


@settings(
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
    derandomize=True,
)
@given(mutated_plans())
def test_fuzzed_plans_through_the_cli(tmp_path, doc):
    plan = tmp_path / "fuzz.yaml"
    plan.write_text(yaml.safe_dump(doc, sort_keys=False))
    result = CliRunner().invoke(main, ["check", str(plan)])
    assert result.exit_code in (0, 2), repr(result.exception)
    if result.exit_code == 0:
        assert result.exception is None and "valid plan" in result.stdout
    else:  # refused by the CLI itself, in one plain message naming the file
        assert isinstance(result.exception, SystemExit), repr(result.exception)
        assert result.stderr.startswith(f"nightbench: {plan}"), result.stderr
