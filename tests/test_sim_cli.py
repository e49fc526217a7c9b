"""`nightbench sim`: one JSON line of resource strings, serves, exits 0 on SIGTERM/SIGINT."""

from __future__ import annotations

import json
import signal
import subprocess
import sys

import pytest

from nightbench.drivers.scpi import ScpiSession
from nightbench.drivers.transport import open_transport
from nightbench.simulators.scpi import MAKER


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_sim_prints_resources_serves_and_stops_cleanly(sig):
    proc = subprocess.Popen([sys.executable, "-m", "nightbench", "sim"], stdout=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline()
        resources = json.loads(line)
        # docs/design.md, the sim line: source, meter, meter_serial (adc_serial is this simulator's extra)
        assert {"source", "meter", "meter_serial"} <= set(resources)
        assert resources["source"].startswith("TCPIP::127.0.0.1::") and resources["source"].endswith("::SOCKET")
        assert resources["meter_serial"].startswith("ASRL/dev/") and resources["meter_serial"].endswith("::INSTR")
        for key in ("meter", "meter_serial"):
            session = ScpiSession(open_transport(resources[key]), "meter")
            assert session.identify().startswith(MAKER + ",")
            session.transport.close()
        proc.send_signal(sig)
        assert proc.wait(10) == 0
        assert proc.stdout.read() == "", "exactly one line on stdout"
    finally:
        proc.kill()


@pytest.mark.parametrize(
    "args, words",
    [
        (["--fault", "explode@meter"], "unknown fault kind"),
        (["--config", "CONFIG"], "unknown simulator config key 'detector.slpoe_v_per_db'"),
    ],
)
def test_sim_refuses_bad_config_plainly(tmp_path, args, words):
    config = tmp_path / "bad.toml"
    config.write_text("[detector]\nslpoe_v_per_db = 0.02\n")
    args = [str(config) if a == "CONFIG" else a for a in args]
    res = subprocess.run([sys.executable, "-m", "nightbench", "sim", *args], capture_output=True, text=True, timeout=20)
    assert res.returncode == 2
    assert words in res.stderr and "Traceback" not in res.stderr
    assert res.stdout == ""


def test_sim_config_file_sets_the_physics(tmp_path):
    config = tmp_path / "sim.toml"
    config.write_text(
        "seed = 5\n[detector]\ntau_rise_s = 0.05\n[meter]\nline_hz = 60\n"
        "[[fault]]\nkind = 'delay'\ninstrument = 'meter'\nafter = 1\n"
    )
    from nightbench.simulators.server import load_config

    cfg = load_config(str(config))
    assert cfg.seed == 5 and cfg.detector.tau_rise_s == 0.05 and cfg.meter.line_hz == 60
    assert cfg.faults == [{"kind": "delay", "instrument": "meter", "after": 1}]
