"""Serve the simulated bench: one loopback TCP port per instrument, in its own process.

`python -m simulators.server` (or `nightbench sim`) prints one JSON line with the VISA resource
strings, then serves until SIGTERM or SIGINT.
"""

from __future__ import annotations

import argparse
import json
import signal
import socket
import socketserver
import sys
import threading
import tomllib
from pathlib import Path
from typing import TextIO

from simulators.instruments import SimMeter, SimSource
from simulators.physics import BenchConfig, BenchModel
from simulators.scpi import ScpiInstrument


class _Handler(socketserver.StreamRequestHandler):
    """One client connection: newline-terminated program messages in, responses out."""

    def setup(self) -> None:
        super().setup()
        self.connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    def handle(self) -> None:
        server: InstrumentServer = self.server  # type: ignore[assignment]
        while True:
            try:
                raw = self.rfile.readline()
            except OSError:
                return
            if not raw:
                return
            message = raw.decode("ascii", errors="replace").rstrip("\r\n")
            with server.lock:
                reply = server.instrument.execute(message)
            if reply is not None:
                try:
                    self.wfile.write(reply.encode("ascii") + b"\n")
                except OSError:
                    return


class InstrumentServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True

    def __init__(self, port: int, instrument: ScpiInstrument) -> None:
        super().__init__(("127.0.0.1", port), _Handler)
        self.instrument = instrument
        self.lock = threading.Lock()

    @property
    def port(self) -> int:
        return self.server_address[1]

    @property
    def resource(self) -> str:
        return f"TCPIP::127.0.0.1::{self.port}::SOCKET"


class Bench:
    """The whole simulated bench: model, instruments and their servers."""

    def __init__(self, config: BenchConfig | None = None, *, source_port: int = 0, meter_port: int = 0,
                 log: TextIO | None = None) -> None:
        self.model = BenchModel(config)
        self.source = SimSource(self.model, log=log)
        self.meter = SimMeter(self.model)
        self.servers = [InstrumentServer(source_port, self.source), InstrumentServer(meter_port, self.meter)]
        self._threads: list[threading.Thread] = []

    def resources(self) -> dict[str, str | None]:
        return {"source": self.servers[0].resource, "meter": self.servers[1].resource, "meter_serial": None}

    def start(self) -> None:
        for server in self.servers:
            t = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
            t.start()
            self._threads.append(t)

    def stop(self) -> None:
        for server in self.servers:
            server.shutdown()
            server.server_close()


def load_config(path: str | None) -> BenchConfig:
    if not path:
        return BenchConfig()
    with open(path, "rb") as fh:
        return BenchConfig.from_dict(tomllib.load(fh))


def serve(*, source_port: int = 0, meter_port: int = 0, config_path: str | None = None,
          log_path: str | None = None) -> int:
    """Run the bench in this process until SIGTERM/SIGINT; print the resource line first."""
    config = load_config(config_path)
    log = open(log_path, "a", encoding="utf-8") if log_path else None
    bench = Bench(config, source_port=source_port, meter_port=meter_port, log=log)
    stop = threading.Event()

    def _stop(signum: int, frame: object) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    bench.start()
    print(json.dumps(bench.resources()), flush=True)
    try:
        while not stop.wait(0.2):
            pass
    finally:
        bench.stop()
        if log:
            log.close()
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="simulators.server", description=__doc__)
    parser.add_argument("--source-port", type=int, default=0)
    parser.add_argument("--meter-port", type=int, default=0)
    parser.add_argument("--config", help="simulator config file (TOML)")
    parser.add_argument("--log", help="append one JSON line per source state change to this file")
    args = parser.parse_args(argv)
    return serve(source_port=args.source_port, meter_port=args.meter_port, config_path=args.config,
                 log_path=args.log)


if __name__ == "__main__":
    sys.exit(main())
