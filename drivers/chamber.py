"""The temperature chamber role: setpoint (read back), measured temperature, conditioning on/off.

Chambers have no SCPI standard; the default commands (drivers/dialect.py CHAMBER_COMMANDS) are
SCPI-styled names of nightbench's own, and a plan replaces any of them under `commands`. What the
driver needs of the instrument is what a SCPI session needs: an identity query, `*OPC?` and an
error query, so a setting is known to be finished and accepted before the soak timer starts.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

from nightbench.drivers.dialect import CHAMBER_COMMANDS
from nightbench.drivers.errors import InstrumentError, SafetyError
from nightbench.drivers.line import SessionRole
from nightbench.drivers.scpi import ScpiSession
from nightbench.drivers.transport import Link

SETPOINT_READBACK_C = 0.01  # the default template sends two decimals
DEFAULT_MIN_C = -70.0  # wide enough for common chambers; a plan states its own (DUT) limits
DEFAULT_MAX_C = 180.0


class ScpiChamber(SessionRole):
    """A chamber on a SCPI-styled line protocol. Refuses setpoints outside its limits before
    sending, and reads each setting back in the same message."""

    def __init__(
        self,
        session: ScpiSession,
        *,
        min_c: float = DEFAULT_MIN_C,
        max_c: float = DEFAULT_MAX_C,
        commands: dict[str, str] | None = None,
    ) -> None:
        self.session: ScpiSession = session
        self.min_c = min_c
        self.max_c = max_c
        self.commands = commands or dict(CHAMBER_COMMANDS)
        self.setpoint_c: float | None = None

    @classmethod
    def open(
        cls,
        link: Link,
        *,
        min_c: float = DEFAULT_MIN_C,
        max_c: float = DEFAULT_MAX_C,
        commands: dict[str, str] | None = None,
    ) -> ScpiChamber:
        table = commands or dict(CHAMBER_COMMANDS)
        session = ScpiSession(link.open(), "chamber", opener=link.open, error_query=table["error_query"])
        return cls(session, min_c=min_c, max_c=max_c, commands=table)

    def prove(self) -> None:
        self.session.identify()

    def configure(self) -> None:
        """An empty error queue, and nothing else: the setpoint is left as it is (a soak sets it)."""
        self.session.drain_errors()

    def reconnect(self, should_stop: Callable[[], bool]) -> None:
        self.setpoint_c = None
        self.session.reconnect(should_stop)

    def record_state(self, *, preset: bool = False) -> dict[str, Any]:
        """What the chamber reports (measure/record.py): its setpoint and its air temperature."""
        c = self.commands
        setpoint, air = self.session.apply([], [c["query_setpoint"], c["query_temperature"]])
        return {"setpoint_c": self._number("setpoint", setpoint), "temperature_c": self._number("temperature", air)}

    def set_temperature(self, temperature_c: float) -> None:
        if not (self.min_c <= temperature_c <= self.max_c):
            raise SafetyError(
                f"chamber setpoint {temperature_c:g} degC is outside its limits [{self.min_c:g}, {self.max_c:g}] degC",
                resource=self.resource,
            )
        c = self.commands
        (reply,) = self.session.apply([c["set_temperature"].format(temperature_c=temperature_c)], [c["query_setpoint"]])
        got = self._number("setpoint", reply)
        if not math.isclose(got, temperature_c, abs_tol=SETPOINT_READBACK_C):
            raise InstrumentError(
                f"chamber setpoint reads back {got:g} degC, not the {temperature_c:g} degC that was set",
                resource=self.resource,
            )
        self.setpoint_c = temperature_c

    def temperature(self) -> float:
        return self._number("temperature", self.session.query_checked(self.commands["query_temperature"]))

    def start(self) -> None:
        self.session.apply([self.commands["start"]])

    def stop(self) -> None:
        self.session.apply([self.commands["stop"]])

    def _number(self, what: str, reply: str) -> float:
        try:
            value = float(reply)
        except ValueError as exc:
            raise InstrumentError(f"chamber {what} reads {reply!r}, not a number", resource=self.resource) from exc
        if not math.isfinite(value):
            raise InstrumentError(f"chamber {what} reads {reply!r}", resource=self.resource)
        return value
