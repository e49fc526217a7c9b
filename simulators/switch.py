"""A simulated RF switch (one route closed at a time) and the units behind its routes.

SCPI-1999 ROUTe subsystem with channel lists `(@1)`, `(@1,3)`, `(@2:4)`: CLOSe, CLOSe? (1 or 0 per
channel), OPEN, OPEN:ALL. Closing a route first opens the one closed before (break before make).
Each route leads to its own detector: the `[[unit]]` tables of the simulator config give a
channel and the DetectorConfig keys that differ from `[detector]` (a lot's spread); a route with
no table leads to the `[detector]` part; with every route open the meter sees no detector at all.

Every route change is kept in `history` and written to the instrument log together with the
source's RF state at that instant (the source is in the same process), so a test can check from
the simulator that the route never moved with RF on. The fault `stuck_route@switch:channel=N`
leaves route N open when it is closed (CLOSe? then reads 0).
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import fields, replace
from typing import Any, TextIO

from nightbench.simulators.faults import FaultInjector
from nightbench.simulators.physics import BenchConfig, BenchModel, DetectorConfig
from nightbench.simulators.scpi import MAKER, ScpiCommandError, ScpiInstrument

DEFAULT_CHANNELS = 16  # routes of the simulated switch (a unit table may name a higher one)


def unit_detectors(config: BenchConfig) -> dict[int, DetectorConfig]:
    """channel -> the detector on that route, from the config's `[[unit]]` tables; ValueError for
    a bad table (unknown key, a channel twice, a channel below 1)."""
    known = {f.name: f for f in fields(DetectorConfig)}
    out: dict[int, DetectorConfig] = {}
    for i, table in enumerate(config.units):
        data = dict(table)
        channel = data.pop("channel", None)
        if not isinstance(channel, int) or channel < 1:
            raise ValueError(f"[[unit]] number {i + 1} needs channel = a whole number from 1")
        if channel in out:
            raise ValueError(f"[[unit]] channel {channel} is given twice")
        unknown = set(data) - set(known)
        if unknown:
            raise ValueError(f"unknown simulator config key(s) in [[unit]] {channel}: {', '.join(sorted(unknown))}")
        values = {k: type(getattr(config.detector, k))(v) for k, v in data.items()}
        out[channel] = replace(config.detector, **values)
    return out


def parse_channels(args: list[str]) -> list[int]:
    """'(@1,3:5)' (split at commas by the parser, so joined again) -> [1, 3, 4, 5]."""
    text = ",".join(args).strip()
    if not (text.startswith("(@") and text.endswith(")")):
        raise ScpiCommandError(-104, f"expected a channel list (@n), got {text!r}")
    channels: list[int] = []
    for item in text[2:-1].split(","):
        first, _, last = item.strip().partition(":")
        try:
            lo, hi = int(first), int(last or first)
        except ValueError:
            raise ScpiCommandError(-104, f"bad channel {item!r}") from None
        channels += range(lo, hi + 1)
    if not channels:
        raise ScpiCommandError(-109, "empty channel list")
    return channels


class SimSwitch(ScpiInstrument):
    """An invented single-pole, multi-throw RF switch."""

    idn = f"{MAKER},Simulated RF Switch,SIM0005,1.0"

    def __init__(
        self,
        model: BenchModel,
        clock: Callable[[], float] = time.monotonic,
        log: TextIO | None = None,
        faults: FaultInjector | None = None,
    ) -> None:
        super().__init__()
        self.model = model
        self.clock = clock
        self.log = log
        self.faults = faults or FaultInjector([])
        self.base = model.config.detector
        self.detectors = unit_detectors(model.config)
        self.channels = max([DEFAULT_CHANNELS, *self.detectors])
        self.closed: int | None = None
        self.history: list[dict[str, Any]] = []
        self.add("ROUTe:CLOSe", self._close)
        self.add("ROUTe:CLOSe?", self._query_closed)
        self.add("ROUTe:OPEN", self._open)
        self.add("ROUTe:OPEN:ALL", lambda a: self._route(None, "open all"))
        if self.detectors:  # a bench of several units starts with every route open
            self._route(None, "start")

    def _checked(self, args: list[str]) -> list[int]:
        channels = parse_channels(args)
        bad = [c for c in channels if not 1 <= c <= self.channels]
        if bad:
            raise ScpiCommandError(-222, f"channel {bad[0]} outside 1..{self.channels}")
        return channels

    def _close(self, args: list[str]) -> None:
        channels = self._checked(args)
        if len(channels) != 1:
            raise ScpiCommandError(-221, "one route at a time")
        channel = channels[0]
        if self.faults.stuck_route(channel):
            self._route(None, f"close {channel} stuck open")
            return
        self._route(channel, f"close {channel}")

    def _open(self, args: list[str]) -> None:
        if self.closed in self._checked(args):
            self._route(None, f"open {self.closed}")

    def _query_closed(self, args: list[str]) -> str:
        return ",".join("1" if c == self.closed else "0" for c in self._checked(args))

    def _route(self, channel: int | None, what: str) -> None:
        """Connect the meter to the detector on `channel` (None: to nothing), and log it."""
        m = self.model
        with m.lock:
            self.closed = channel
            m.config.detector = self.detectors.get(channel, self.base) if channel is not None else self.base
            m.connected = channel is not None
            m.set_source(self.clock())  # the meter now sees the new detector's output
            entry = {
                "t": self.clock(),
                "event": f"switch {what}",
                "closed": channel,
                "frequency_hz": m.frequency_hz,
                "level_dbm": m.level_dbm,
                "output": m.output_on,
                "dut_dbm": None,
            }
            self.history.append(entry)
            if self.log is not None:
                self.log.write(json.dumps(entry) + "\n")
                self.log.flush()
