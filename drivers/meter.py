"""DC meter roles: a SCPI DMM measuring DC volts, and a serial ADC board answering counts."""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Sequence
from typing import Any

from nightbench.drivers.dialect import METER_COMMANDS
from nightbench.drivers.errors import InstrumentError
from nightbench.drivers.line import LineSession, SessionRole
from nightbench.drivers.scpi import ScpiSession
from nightbench.drivers.transport import Link

# SCPI-1999 vol. 1, 7.2.1: +9.9E37 is the value an instrument returns for overrange.
OVERRANGE = 9.9e37


class ScpiDmm(SessionRole):
    """A DMM read one triggered reading at a time (READ? by default)."""

    def __init__(
        self,
        session: ScpiSession,
        *,
        nplc: float | None = None,
        range_v: float | None = None,
        commands: dict[str, str] | None = None,
    ) -> None:
        self.session: ScpiSession = session
        self.nplc = nplc
        self.range_v = range_v
        self.commands = commands or dict(METER_COMMANDS)

    @classmethod
    def open(
        cls,
        link: Link,
        *,
        nplc: float | None = None,
        range_v: float | None = None,
        commands: dict[str, str] | None = None,
    ) -> ScpiDmm:
        """A DMM on a new link (not yet proven to answer: see `prove`)."""
        table = commands or dict(METER_COMMANDS)
        session = ScpiSession(link.open(), "meter", opener=link.open, error_query=table["error_query"])
        return cls(session, nplc=nplc, range_v=range_v, commands=table)

    def prove(self) -> None:
        self.session.identify()

    def configure(self) -> None:
        c = self.commands
        self.session.drain_errors()
        commands = [c["configure"], c["set_trigger"]]
        if self.range_v is not None:
            commands.append(c["set_range"].format(range_v=self.range_v))
        if self.nplc is not None:
            commands.append(c["set_nplc"].format(nplc=self.nplc))
        self.session.apply(commands)

    def reconnect(self, should_stop: Callable[[], bool]) -> None:
        self.session.reconnect(should_stop)

    def record_state(self, *, preset: bool = False) -> dict[str, Any]:
        """What the meter says it is set to (measure/record.py), in one error-checked message:
        function, range and autorange, NPLC, autozero; beside them what the plan set. A stated
        NPLC that does not read back, or a range below the stated one, is an InstrumentError."""
        asked = [(key, self.commands[f"query_{key}"]) for key in DMM_STATE if self.commands[f"query_{key}"]]
        replies = self.session.apply([], [q for _, q in asked]) if asked else []
        state: dict[str, Any] = {"nplc_set": self.nplc, "range_v_set": self.range_v}
        for (key, query), reply in zip(asked, replies):
            state[key] = _state_value(key, reply, self.resource, query)
        nplc, range_v = state.get("nplc"), state.get("range")
        if self.nplc is not None and isinstance(nplc, float) and not math.isclose(nplc, self.nplc, rel_tol=1e-6):
            raise InstrumentError(
                f"meter NPLC reads back {nplc:g}, not the {self.nplc:g} that was set",
                resource=self.resource,
                command=self.commands["query_nplc"],
            )
        if self.range_v is not None and isinstance(range_v, float) and range_v < self.range_v * (1 - 1e-9):
            raise InstrumentError(
                f"meter range reads back {range_v:g} V, below the {self.range_v:g} V that was set",
                resource=self.resource,
                command=self.commands["query_range"],
            )
        return state

    def read(self, *, checked: bool = False) -> float:
        """One reading in volts; +/-inf for an overrange reading. `checked` asks the error queue
        in the same round trip (ScpiError if the meter reported anything)."""
        self.request(checked=checked)
        return self.collect(checked=checked)

    def request(self, *, checked: bool = False) -> None:
        command = self.commands["read"]
        self.session.send(self.session.checked_program(command) if checked else command)

    def collect(self, *, checked: bool = False) -> float:
        command = self.commands["read"]
        reply = self.session.receive()
        return _volts(self.session.checked_reply(reply, command) if checked else reply, self.resource, command)


DMM_STATE = ("function", "range", "autorange", "nplc", "autozero")


def _state_value(key: str, reply: str, resource: str, query: str) -> str | float | bool:
    """A read-back as stored: the function's name, the range and NPLC as numbers, autorange as a
    flag, autozero as ON, OFF or ONCE (SCPI-1999 boolean and character data)."""
    text = reply.strip().strip('"').strip()
    word = text.upper()
    if key == "function":
        return text
    if key == "autorange" and word in ("1", "ON", "0", "OFF"):
        return word in ("1", "ON")
    if key == "autozero" and word in ("1", "ON", "0", "OFF", "ONCE"):
        return {"1": "ON", "0": "OFF"}.get(word, word)
    if key in ("range", "nplc"):
        try:
            return float(text)
        except ValueError:
            pass
    raise InstrumentError(f"meter {key} reads back {reply!r}", resource=resource, command=query)


def _volts(reply: str, resource: str, command: str) -> float:
    try:
        value = float(reply)
    except ValueError as exc:
        raise InstrumentError(f"meter reply {reply!r} is not a number", resource=resource, command=command) from exc
    if not math.isfinite(value) or abs(value) >= OVERRANGE:
        return math.copysign(math.inf, value)
    return value


class SerialAdc(SessionRole):
    """An ADC board with a line protocol: send `query`, pull the number out of the reply with
    `pattern` (first group), volts = counts * scale + offset. A reply containing `overload`
    reads as overrange. No error queue: a reply that does not match is an InstrumentError.

    The session's identity query is optional; a board without one is proven alive, when opened
    and after a reconnect, by answering `query` with a reading `pattern` can parse.
    """

    def __init__(
        self,
        session: LineSession,
        *,
        query: str,
        pattern: str,
        scale: float,
        offset: float = 0.0,
        setup: Sequence[str] = (),
        overload: str | None = None,
    ) -> None:
        self.session = session
        self.query_text = query
        self.pattern = re.compile(pattern)
        self.scale = scale
        self.offset = offset
        self.setup = list(setup)
        self.overload = overload

    @classmethod
    def open(
        cls,
        link: Link,
        *,
        query: str,
        pattern: str,
        scale: float,
        offset: float = 0.0,
        identify: str | None = None,
        setup: Sequence[str] = (),
        overload: str | None = None,
    ) -> SerialAdc:
        """A board on a new link, with `identify` as its identity query if it has one."""
        session = LineSession(link.open(), "meter", opener=link.open, idn_query=identify)
        return cls(session, query=query, pattern=pattern, scale=scale, offset=offset, setup=setup, overload=overload)

    def configure(self) -> None:
        for command in self.setup:
            self.session.query(command)

    def record_state(self, *, preset: bool = False) -> dict[str, Any]:
        """A board with no queries for its settings: the record holds what the plan set."""
        return {
            "query": self.query_text,
            "pattern": self.pattern.pattern,
            "scale": self.scale,
            "offset": self.offset,
            "setup": list(self.setup),
            "overload": self.overload,
            "read_back": "none (the board has no queries for its settings)",
        }

    def prove(self) -> None:
        """Show the board is there and in step: its identity if it has a query for it, else one
        reading that parses (InstrumentError otherwise)."""
        if self.session.idn_query is not None:
            self.session.identify()
        else:
            self.read()

    def reconnect(self, should_stop: Callable[[], bool]) -> None:
        self.session.reconnect(should_stop, proof=self.read)

    def read(self, *, checked: bool = False) -> float:
        self.request()
        return self.collect()

    def request(self, *, checked: bool = False) -> None:
        self.session.send(self.query_text)

    def collect(self, *, checked: bool = False) -> float:
        return self._counts_to_volts(self.session.receive())

    def _counts_to_volts(self, reply: str) -> float:
        if self.overload and self.overload in reply:
            return math.inf
        match = self.pattern.search(reply)
        if not match:
            raise InstrumentError(
                f"ADC reply {reply!r} does not match {self.pattern.pattern!r}",
                resource=self.resource,
                command=self.query_text,
            )
        try:
            counts = float(match.group(1) if match.groups() else match.group(0))
        except ValueError as exc:
            raise InstrumentError(
                f"ADC reply {reply!r} holds no number", resource=self.resource, command=self.query_text
            ) from exc
        return counts * self.scale + self.offset
