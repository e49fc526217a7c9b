"""Serve the simulated bench in its own process: TCP ports and pseudo-terminals.

`python -m nightbench.simulators.server` (or `nightbench sim`) prints one JSON line with the VISA resource
strings, then serves until SIGTERM or SIGINT:

    {"source": "TCPIP::127.0.0.1::P::SOCKET", "meter": "TCPIP::127.0.0.1::Q::SOCKET",
     "meter_serial": "ASRL/dev/pts/N::INSTR", "adc_serial": "ASRL/dev/pts/M::INSTR",
     "chamber": "TCPIP::127.0.0.1::R::SOCKET", "sensor": "TCPIP::127.0.0.1::S::SOCKET"}

The meter is one instrument reachable two ways (LAN and serial), as real meters are.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import pty
import signal
import socket
import sys
import threading
import tomllib
import tty
from collections.abc import Sequence
from typing import Any, TextIO

from nightbench.simulators.chamber import SimChamber
from nightbench.simulators.faults import FaultInjector, parse_fault_flag
from nightbench.simulators.instruments import DIALECTS, SimAdc, SimMeter, SimSource
from nightbench.simulators.links import PtyStream, SocketStream, serve_stream
from nightbench.simulators.physics import BenchConfig, BenchModel
from nightbench.simulators.sensor import SimSensor
from nightbench.simulators.switch import SimSwitch


class TcpPort:
    """One listening loopback port for one instrument; a thread per client."""

    def __init__(self, port: int, instrument: Any, name: str, bench: Bench) -> None:
        self.sock = socket.create_server(("127.0.0.1", port), reuse_port=False)
        self.sock.settimeout(0.1)
        self.instrument, self.name, self.bench = instrument, name, bench

    @property
    def resource(self) -> str:
        return f"TCPIP::127.0.0.1::{self.sock.getsockname()[1]}::SOCKET"

    def serve(self) -> None:
        while not self.bench.stop_event.is_set():
            try:
                conn, _ = self.sock.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            if self.bench.faults.away(self.name) == "drop":
                conn.close()  # rebooting: accepts, then hangs up
                continue
            threading.Thread(
                target=serve_stream,
                daemon=True,
                args=(
                    SocketStream(conn),
                    self.instrument,
                    self.name,
                    self.bench.faults,
                    self.bench.locks[self.name],
                    self.bench.stop_event,
                ),
            ).start()

    def close(self) -> None:
        self.sock.close()


class PtyPort:
    """A pseudo-terminal for one instrument; the path is what a client opens as ASRL<path>::INSTR."""

    def __init__(self, instrument: Any, name: str, bench: Bench) -> None:
        self.master, self.slave = pty.openpty()
        tty.setraw(self.slave)
        self.path = os.ttyname(self.slave)
        self.instrument, self.name, self.bench = instrument, name, bench

    @property
    def resource(self) -> str:
        return f"ASRL{self.path}::INSTR"

    def serve(self) -> None:
        serve_stream(
            PtyStream(self.master),
            self.instrument,
            self.name,
            self.bench.faults,
            self.bench.locks[self.name],
            self.bench.stop_event,
            can_drop=False,
        )

    def close(self) -> None:
        for fd in (self.master, self.slave):
            with contextlib.suppress(OSError):
                os.close(fd)


class Bench:
    """The whole simulated bench: model, instruments, faults and the ports serving them."""

    def __init__(
        self,
        config: BenchConfig | None = None,
        *,
        source_port: int = 0,
        meter_port: int = 0,
        log: TextIO | None = None,
        serial: bool = True,
        dialect: str = "scpi",
        chamber_port: int = 0,
        sensor_port: int = 0,
    ) -> None:
        self.config = config or BenchConfig()
        self.model = BenchModel(self.config)
        self.faults = FaultInjector(self.config.faults, seed=self.config.seed)
        self.stop_event = threading.Event()
        self.locks = {name: threading.Lock() for name in ("source", "meter", "adc", "chamber", "switch", "sensor")}
        self.source = SimSource(self.model, log=log, faults=self.faults, dialect=dialect)
        self.meter = SimMeter(self.model, faults=self.faults, dialect=dialect)
        self.adc = SimAdc(self.model, faults=self.faults)
        self.chamber = SimChamber(self.model, log=log, faults=self.faults, dialect=dialect)
        self.chamber_port = TcpPort(chamber_port, self.chamber, "chamber", self)
        self.ports: list[Any] = [
            TcpPort(source_port, self.source, "source", self),
            TcpPort(meter_port, self.meter, "meter", self),
        ]
        if serial:
            self.ports += [PtyPort(self.meter, "meter", self), PtyPort(self.adc, "adc", self)]
        self.ports.append(self.chamber_port)
        self.switch = SimSwitch(self.model, log=log, faults=self.faults)  # the units behind its routes
        self.switch_port = TcpPort(0, self.switch, "switch", self)
        self.ports.append(self.switch_port)
        self.sensor = SimSensor(self.model, faults=self.faults)  # where the DUT goes: the same level
        self.sensor_port = TcpPort(sensor_port, self.sensor, "sensor", self)
        self.ports.append(self.sensor_port)

    def resources(self) -> dict[str, str | None]:
        serial = any(isinstance(p, PtyPort) for p in self.ports)
        return {
            "source": self.ports[0].resource,
            "meter": self.ports[1].resource,
            "meter_serial": self.ports[2].resource if serial else None,
            "adc_serial": self.ports[3].resource if serial else None,
            "chamber": self.chamber_port.resource,
            "switch": self.switch_port.resource,
            "sensor": self.sensor_port.resource,
        }

    def start(self) -> None:
        self.threads = [threading.Thread(target=port.serve, daemon=True) for port in self.ports]
        for thread in self.threads:
            thread.start()

    def stop(self) -> None:
        """Stop serving; threads end before their file descriptors close, so a number the OS
        hands out again can never be read by a thread of a stopped bench."""
        self.stop_event.set()
        for thread in getattr(self, "threads", []):
            thread.join(timeout=2.0)
        for port in self.ports:
            port.close()


def load_config(path: str | None, fault_flags: Sequence[str] = (), seed: int | None = None) -> BenchConfig:
    data: dict[str, Any] = {}
    if path:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    config = BenchConfig.from_dict(data)
    config.faults = config.faults + [parse_fault_flag(f) for f in fault_flags]
    if seed is not None:
        config.seed = seed
    return config


def serve(
    *,
    source_port: int = 0,
    meter_port: int = 0,
    config_path: str | None = None,
    log_path: str | None = None,
    faults: Sequence[str] = (),
    seed: int | None = None,
    dialect: str = "scpi",
    chamber_port: int = 0,
    chamber_time_scale: float | None = None,
    sensor_port: int = 0,
) -> int:
    """Run the bench in this process until SIGTERM/SIGINT; print the resource line first."""
    config = load_config(config_path, faults, seed)
    if chamber_time_scale is not None:
        if not chamber_time_scale > 0:
            raise ValueError("--chamber-time-scale must be positive")
        config.chamber.time_scale = chamber_time_scale
    with contextlib.ExitStack() as stack:
        log = stack.enter_context(open(log_path, "a", encoding="utf-8")) if log_path else None
        bench = Bench(
            config,
            source_port=source_port,
            meter_port=meter_port,
            log=log,
            dialect=dialect,
            chamber_port=chamber_port,
            sensor_port=sensor_port,
        )
        stack.callback(bench.stop)  # threads end before the log closes
        stop = threading.Event()
        signal.signal(signal.SIGTERM, lambda *_: stop.set())
        signal.signal(signal.SIGINT, lambda *_: stop.set())
        bench.start()
        print(json.dumps(bench.resources()), flush=True)
        while not stop.wait(0.2):
            pass
    return 0


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--source-port", type=int, default=0, help="TCP port of the source (0 = any free)")
    parser.add_argument("--meter-port", type=int, default=0, help="TCP port of the meter (0 = any free)")
    parser.add_argument("--chamber-port", type=int, default=0, help="TCP port of the chamber (0 = any free)")
    parser.add_argument("--sensor-port", type=int, default=0, help="TCP port of the power sensor (0 = any free)")
    parser.add_argument(
        "--chamber-time-scale",
        type=float,
        help="simulated chamber seconds per real second (default: the config's, 1), so soaks take seconds",
    )
    parser.add_argument(
        "--config",
        help="simulator config file (TOML: [source] [path] [detector] [meter] [adc] [chamber] sections, "
        "[[fault]] tables, [[unit]] tables: a detector per switch route)",
    )
    parser.add_argument("--log", help="append one JSON line per source state change to this file")
    parser.add_argument(
        "--fault",
        action="append",
        default=[],
        help="inject a fault: KIND@INSTRUMENT[:key=value,...], e.g. drop@meter:after=20",
    )
    parser.add_argument("--seed", type=int, help="seed for noise and faults (default: the config's, 1)")
    parser.add_argument(
        "--dialect",
        choices=DIALECTS,
        default="scpi",
        help="command set: scpi (SCPI-1999) or alt (a non-standard set invented for tests)",
    )


def main(argv: list[str] | None = None, prog: str = "nightbench.simulators.server") -> int:
    parser = argparse.ArgumentParser(prog=prog, description="Serve the simulated bench.")
    add_arguments(parser)
    args = parser.parse_args(argv)
    try:
        return serve(
            source_port=args.source_port,
            meter_port=args.meter_port,
            config_path=args.config,
            log_path=args.log,
            faults=args.fault,
            seed=args.seed,
            dialect=args.dialect,
            chamber_port=args.chamber_port,
            chamber_time_scale=args.chamber_time_scale,
            sensor_port=args.sensor_port,
        )
    except (OSError, ValueError, tomllib.TOMLDecodeError) as exc:
        print(f"nightbench.simulators.server: cannot start the simulated bench: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
