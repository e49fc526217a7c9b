"""`nightbench sim`: one JSON line of resource strings, serves, exits 0 on SIGTERM/SIGINT."""

from __future__ import annotations

import json
import signal
import subprocess
import sys

import pytest

from drivers.scpi import ScpiSession
from drivers.transport import open_transport


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_sim_prints_resources_serves_and_stops_cleanly(sig):
    proc = subprocess.Popen([sys.executable, "-m", "runner", "sim"], stdout=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline()
        resources = json.loads(line)
        assert set(resources) == {"source", "meter", "meter_serial"}
        assert resources["source"].startswith("TCPIP::127.0.0.1::") and resources["source"].endswith("::SOCKET")
        session = ScpiSession(open_transport(resources["meter"]), "meter")
        assert session.identify().startswith("NIGHTBENCH-SIM,")
        session.transport.close()
        proc.send_signal(sig)
        assert proc.wait(10) == 0
        assert proc.stdout.read() == "", "exactly one line on stdout"
    finally:
        proc.kill()
