"""Fault injection for the simulated bench: reproducible (seeded) misbehaviour on demand.

A fault is a dict (from a `[[fault]]` table of the simulator config, or a `--fault` flag):

    kind         drop | silence | delay | garbage | spurious_error | refuse_level | overload
                 | refuse_setpoint | drift | stuck_route | reboot
    instrument   source | meter | adc | chamber | switch | sensor
    after        fire from the N-th message to that instrument on (1-based; 0 = from the start)
    at_s         or from this many seconds after the simulator started
    count        how many times it fires (0 = every time once triggered); default 1
    probability  chance that an eligible message triggers it (seeded); default 1
    duration_s   drop/silence/reboot: how long the instrument stays away (-1 = for good); default 0 / -1 / 0
    delay_s      delay: seconds added before the reply; default 0.5
    code         spurious_error / refuse_level: the SCPI error code; default -221 / -222
    level_dbm    refuse_level: refuse only levels at or above this
    rate_c_per_s drift: how fast the chamber's reading walks away from the air, degC per clock second
    channel      stuck_route: the switch route that stays open when closed (any route if not given)

Transport kinds (drop, silence, delay, garbage, spurious_error, reboot) act where messages arrive;
reboot is a drop after which the instrument is as at power-on (its own `power_on`: a source
recalls the settings a previous user saved, output off);
refuse_level, overload, refuse_setpoint (the chamber refuses a setpoint, -222) and drift (its
reading walks away from the air temperature) act inside the instrument. "No answer" from the
chamber is `silence@chamber`.
"""

from __future__ import annotations

import random
import threading
import time
from dataclasses import dataclass, field

KINDS = (
    "drop",
    "silence",
    "delay",
    "garbage",
    "spurious_error",
    "refuse_level",
    "overload",
    "refuse_setpoint",
    "drift",
    "stuck_route",
    "reboot",
)
INSTRUMENTS = ("source", "meter", "adc", "chamber", "switch", "sensor")


@dataclass
class Fault:
    kind: str
    instrument: str
    after: int = 0
    at_s: float | None = None
    count: int = 1
    probability: float = 1.0
    duration_s: float | None = None
    delay_s: float = 0.5
    code: int | None = None
    level_dbm: float | None = None
    rate_c_per_s: float = 0.5
    channel: int | None = None
    fired: int = 0
    fired_at: float | None = None
    rng: random.Random = field(default_factory=random.Random, repr=False)

    @classmethod
    def from_dict(cls, data: dict, seed: int) -> Fault:
        names = set(cls.__dataclass_fields__) - {"fired", "fired_at", "rng"}
        unknown = set(data) - names
        if unknown:
            raise ValueError(f"unknown fault key(s): {', '.join(sorted(unknown))}")
        fault = cls(**data)
        if fault.kind not in KINDS:
            raise ValueError(f"unknown fault kind '{fault.kind}' (one of {', '.join(KINDS)})")
        if fault.instrument not in INSTRUMENTS:
            raise ValueError(f"unknown fault instrument '{fault.instrument}' (one of {', '.join(INSTRUMENTS)})")
        if fault.duration_s is None:
            fault.duration_s = 0.0 if fault.kind in ("drop", "reboot") else -1.0
        if fault.code is None:
            fault.code = -222 if fault.kind in ("refuse_level", "refuse_setpoint") else -221
        fault.rng = random.Random(seed)
        return fault


def parse_fault_flag(text: str) -> dict:
    """'drop@meter:after=20,duration_s=1' -> {'kind': 'drop', 'instrument': 'meter', ...}."""
    head, _, rest = text.partition(":")
    kind, _, instrument = head.partition("@")
    if not kind or not instrument:
        raise ValueError(f"a fault is KIND@INSTRUMENT[:key=value,...], got '{text}'")
    data: dict = {"kind": kind, "instrument": instrument}
    for item in filter(None, rest.split(",")):
        key, eq, value = item.partition("=")
        if not eq:
            raise ValueError(f"fault option '{item}' is not key=value")
        number = float(value)
        data[key] = int(number) if key in ("after", "count", "code", "channel") else number
    return data


class FaultInjector:
    """Counts messages per instrument and says which faults fire; thread-safe."""

    def __init__(self, faults: list[dict], seed: int = 1, clock=time.monotonic) -> None:
        self.faults = [Fault.from_dict(dict(f), seed + i) for i, f in enumerate(faults)]
        self.clock = clock
        self.started = clock()
        self.messages = {name: 0 for name in INSTRUMENTS}
        self.away_until = {name: 0.0 for name in INSTRUMENTS}  # drop/silence in force
        self.away_kind = {name: "" for name in INSTRUMENTS}
        self.lock = threading.Lock()

    def _due(self, fault: Fault) -> bool:
        if fault.count and fault.fired >= fault.count:
            return False
        if fault.at_s is not None and self.clock() - self.started < fault.at_s:
            return False
        if self.messages[fault.instrument] < fault.after:
            return False
        return fault.rng.random() < fault.probability

    def _fire(self, instrument: str, kinds: tuple[str, ...]) -> list[Fault]:
        fired = []
        for fault in self.faults:
            if fault.instrument == instrument and fault.kind in kinds and self._due(fault):
                fault.fired += 1
                fired.append(fault)
        return fired

    def on_message(self, instrument: str) -> list[Fault]:
        """Call once per arriving message; returns the transport faults that fire on it."""
        with self.lock:
            self.messages[instrument] += 1
            fired = self._fire(instrument, ("drop", "silence", "delay", "garbage", "spurious_error", "reboot"))
            for fault in fired:
                if fault.kind in ("drop", "silence", "reboot"):
                    away_s = -1.0 if fault.duration_s is None else fault.duration_s  # set by from_dict
                    until = float("inf") if away_s < 0 else self.clock() + away_s
                    self.away_until[instrument] = max(self.away_until[instrument], until)
                    self.away_kind[instrument] = "drop" if fault.kind == "reboot" else fault.kind
            return fired

    def away(self, instrument: str) -> str:
        """'drop' or 'silence' while such a fault keeps the instrument away, else ''."""
        with self.lock:
            return self.away_kind[instrument] if self.clock() < self.away_until[instrument] else ""

    def refuses_level(self, level_dbm: float) -> Fault | None:
        with self.lock:
            for fault in self.faults:
                if (
                    fault.kind == "refuse_level"
                    and (fault.level_dbm is None or level_dbm >= fault.level_dbm)
                    and self._due(fault)
                ):
                    fault.fired += 1
                    return fault
        return None

    def refuses_setpoint(self) -> Fault | None:
        with self.lock:
            fired = self._fire("chamber", ("refuse_setpoint",))
            return fired[0] if fired else None

    def drift_c(self) -> float:
        """How far the chamber's reading has walked from the air (0 until a drift fault fires)."""
        with self.lock:
            now = self.clock()
            for fault in self._fire("chamber", ("drift",)):
                fault.fired_at = now
            return sum(
                f.rate_c_per_s * (now - f.fired_at) for f in self.faults if f.kind == "drift" and f.fired_at is not None
            )

    def stuck_route(self, channel: int) -> bool:
        """Whether closing this switch route fails (it stays open)."""
        with self.lock:
            for fault in self.faults:
                if fault.kind == "stuck_route" and fault.channel in (None, channel) and self._due(fault):
                    fault.fired += 1
                    return True
        return False

    def overload(self, instrument: str) -> bool:
        with self.lock:
            return bool(self._fire(instrument, ("overload",)))

    def garbage(self, fault: Fault) -> bytes:
        """Seeded junk, newline-terminated so it lands as a (stale) reply."""
        junk = bytes(fault.rng.randrange(1, 256) for _ in range(fault.rng.randrange(3, 24)))
        return junk.replace(b"\n", b"#") + b"\n"
