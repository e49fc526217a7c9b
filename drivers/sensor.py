"""The power-sensor role: an RF power sensor read in dBm, for a level calibration at the DUT plane.

A sensor applies a cal factor for the frequency it is told, so the frequency is set (and read
back) before any reading. The default commands are SCPI-1999 `SENSe:FREQuency` and `READ?`; a
plan replaces any of them under `calibration.sensor.commands`. A reading beyond the sensor's
range (SCPI-1999 vol. 1, 7.2.1: +/-9.9E37) is an InstrumentError naming the limit, never a
number: a calibration point the sensor cannot resolve must not enter the relation.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from nightbench.drivers.errors import InstrumentError
from nightbench.drivers.line import SessionRole
from nightbench.drivers.scpi import ScpiSession
from nightbench.drivers.transport import Link

SENSOR_COMMANDS: dict[str, str] = {
    "set_frequency": ":SENSe:FREQuency:CW {frequency_hz:.3f} HZ",
    "query_frequency": ":SENSe:FREQuency:CW?",
    "read": "READ?",
    "error_query": ":SYSTem:ERRor?",
}
OVERRANGE = 9.9e37
FREQUENCY_READBACK_REL = 1e-6


class ScpiPowerSensor(SessionRole):
    """A SCPI power sensor: frequency for its cal factor (read back), one reading in dBm."""

    def __init__(self, session: ScpiSession, *, commands: dict[str, str] | None = None) -> None:
        self.session: ScpiSession = session
        self.commands = commands or dict(SENSOR_COMMANDS)
        self.frequency_hz: float | None = None

    @classmethod
    def open(cls, link: Link, *, commands: dict[str, str] | None = None) -> ScpiPowerSensor:
        table = commands or dict(SENSOR_COMMANDS)
        session = ScpiSession(link.open(), "sensor", opener=link.open, error_query=table["error_query"])
        return cls(session, commands=table)

    def prove(self) -> None:
        self.session.identify()

    def configure(self) -> None:
        """An empty error queue; the frequency is unknown until set."""
        self.session.drain_errors()
        self.frequency_hz = None

    def reconnect(self, should_stop: Callable[[], bool]) -> None:
        self.session.reconnect(should_stop)
        self.frequency_hz = None

    def set_frequency(self, frequency_hz: float) -> None:
        """Tell the sensor the signal's frequency (its cal factor) and read it back."""
        c = self.commands
        (reply,) = self.session.apply(
            [c["set_frequency"].format(frequency_hz=frequency_hz)], readbacks=[c["query_frequency"]]
        )
        got = _number(reply, self.resource, c["query_frequency"], "frequency")
        if not math.isclose(got, frequency_hz, rel_tol=FREQUENCY_READBACK_REL):
            raise InstrumentError(
                f"sensor frequency reads back {got:g} Hz, {frequency_hz:g} Hz was set",
                resource=self.resource,
                command=c["set_frequency"],
            )
        self.frequency_hz = frequency_hz

    def read_dbm(self) -> float:
        """One reading in dBm, the error queue asked in the same round trip; InstrumentError for a
        reading beyond the sensor's range."""
        command = self.commands["read"]
        value = _number(self.session.query_checked(command), self.resource, command, "reading")
        if not math.isfinite(value) or abs(value) >= OVERRANGE:
            side = "below" if value < 0 else "above"
            raise InstrumentError(f"the level is {side} the sensor's range", resource=self.resource, command=command)
        return value


def _number(reply: str, resource: str, command: str, what: str) -> float:
    try:
        return float(reply)
    except ValueError as exc:
        raise InstrumentError(f"sensor {what} {reply!r} is not a number", resource=resource, command=command) from exc
