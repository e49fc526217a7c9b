"""DC meter roles: a SCPI DMM measuring DC volts, and a serial ADC board answering counts."""

from __future__ import annotations

import math
import re

from nightbench.drivers.dialect import METER_COMMANDS
from nightbench.drivers.errors import InstrumentError
from nightbench.drivers.scpi import ScpiSession

# SCPI-1999 vol. 1, 7.2.1: +9.9E37 is the value an instrument returns for overrange.
OVERRANGE = 9.9e37


class ScpiDmm:
    """A DMM read one triggered reading at a time (READ? by default)."""

    def __init__(self, session: ScpiSession, *, nplc: float | None = None, range_v: float | None = None,
                 commands: dict[str, str] | None = None) -> None:
        self.session = session
        self.nplc = nplc
        self.range_v = range_v
        self.commands = commands or dict(METER_COMMANDS)

    def configure(self) -> None:
        c = self.commands
        self.session.drain_errors()
        commands = [c["configure"], c["set_trigger"]]
        if self.range_v is not None:
            commands.append(c["set_range"].format(range_v=self.range_v))
        if self.nplc is not None:
            commands.append(c["set_nplc"].format(nplc=self.nplc))
        self.session.apply(commands)

    def read(self, *, checked: bool = False) -> float:
        """One reading in volts; +/-inf for an overrange reading. `checked` asks the error queue
        in the same round trip (ScpiError if the meter reported anything)."""
        command = self.commands["read"]
        reply = self.session.query_checked(command) if checked else self.session.query(command)
        return _volts(reply, self.session.resource, command)


def _volts(reply: str, resource: str, command: str) -> float:
    try:
        value = float(reply)
    except ValueError as exc:
        raise InstrumentError(f"meter reply {reply!r} is not a number", resource=resource, command=command) from exc
    if not math.isfinite(value) or abs(value) >= OVERRANGE:
        return math.copysign(math.inf, value)
    return value


class SerialAdc:
    """An ADC board with a line protocol: send `query`, pull the number out of the reply with
    `pattern` (first group), volts = counts * scale + offset. A reply containing `overload`
    reads as overrange. No error queue: a reply that does not match is an InstrumentError."""

    def __init__(self, session: ScpiSession, *, query: str, pattern: str, scale: float, offset: float = 0.0,
                 setup: list[str] = (), overload: str | None = None) -> None:
        self.session = session
        self.query_text = query
        self.pattern = re.compile(pattern)
        self.scale = scale
        self.offset = offset
        self.setup = list(setup)
        self.overload = overload

    def configure(self) -> None:
        for command in self.setup:
            self.session.query(command)

    def read(self, *, checked: bool = False) -> float:
        reply = self.session.query(self.query_text)
        if self.overload and self.overload in reply:
            return math.inf
        match = self.pattern.search(reply)
        if not match:
            raise InstrumentError(f"ADC reply {reply!r} does not match {self.pattern.pattern!r}",
                                  resource=self.session.resource, command=self.query_text)
        try:
            counts = float(match.group(1) if match.groups() else match.group(0))
        except ValueError as exc:
            raise InstrumentError(f"ADC reply {reply!r} holds no number", resource=self.session.resource) from exc
        return counts * self.scale + self.offset
