"""What the engine, recovery and the bench may ask of an instrument: one interface per role.

Above the drivers nothing touches a transport or a session; a new kind of instrument for a role
(another source, another chamber, a power sensor later) implements that role's Protocol and the
engine needs no change. The concrete roles are `drivers.source.RfSource`, `drivers.meter.ScpiDmm`,
`drivers.meter.SerialAdc` and `drivers.chamber.ScpiChamber`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Protocol


class Role(Protocol):
    """Every instrument: who it is, how to make it known-good, and how to let it go."""

    @property
    def resource(self) -> str:
        """The resource string it was opened with (errors carry it, to say which one failed)."""

    @property
    def identity(self) -> str:
        """What it said it is when opened ('' if it has no way to say)."""

    def prove(self) -> None:
        """Show that the instrument answers, right after opening: its identity where it has one
        (kept as `identity`), else a reply it must give anyway. InstrumentError if it does not."""

    def configure(self) -> None:
        """Bring it to the known state a run needs (a source: RF off first)."""

    def reconnect(self, should_stop: Callable[[], bool]) -> None:
        """A new link, proven to reach the same instrument; state is unknown afterwards, so the
        caller configures it again. ConnectionLost if it does not come back."""

    def flush(self) -> None:
        """Throw away replies already received and not asked for (a late reply)."""

    def close(self) -> None:
        """Close the link; never raises (closing a dead link must not mask the real error)."""


class SourceRole(Role, Protocol):
    """An RF source. `frequency_hz`, `level_dbm` and `output_on` are what it was last set to and
    read back as; None while unknown (after a reconnect)."""

    min_dbm: float
    max_dbm: float

    @property
    def frequency_hz(self) -> float | None: ...

    @property
    def level_dbm(self) -> float | None: ...

    @property
    def output_on(self) -> bool | None: ...

    def set(
        self, *, frequency_hz: float | None = None, level_dbm: float | None = None, output: bool | None = None
    ) -> None:
        """Apply any of the three, level first, read back; SafetyError outside min/max_dbm."""

    def rf_off(self) -> None: ...


class MeterRole(Role, Protocol):
    """A meter that answers one reading at a time, in volts (+/-inf for overrange)."""

    def read(self, *, checked: bool = False) -> float:
        """One reading; `checked` also asks for the instrument's own error report, if it has one."""

    def request(self, *, checked: bool = False) -> None:
        """Start one reading without waiting for it (the engine judges the last reading while the
        meter takes the next); `collect` with the same `checked` takes it."""

    def collect(self, *, checked: bool = False) -> float:
        """The reading `request` started."""


class ChamberRole(Role, Protocol):
    """A temperature chamber. `configure` never changes its setpoint (after a crash the source is
    made safe first, and the chamber is only touched by a soak or the way out); `setpoint_c` is
    what it was last set to and read back as, None while unknown."""

    min_c: float
    max_c: float

    @property
    def setpoint_c(self) -> float | None: ...

    def set_temperature(self, temperature_c: float) -> None:
        """Set the setpoint and read it back; SafetyError outside min_c/max_c (nothing sent)."""

    def temperature(self) -> float:
        """The chamber's measured (air) temperature, degC."""

    def start(self) -> None:
        """Start conditioning (heating/cooling toward the setpoint)."""

    def stop(self) -> None:
        """Stop conditioning."""


class SwitchRole(Role, Protocol):
    """An RF switch routing one unit at a time to the source and meter (drivers/switch.py).
    `closed` is the route last closed and read back, None when open or unknown."""

    @property
    def closed(self) -> int | None: ...

    def open_all(self) -> None: ...

    def query_closed(self, channel: int) -> bool:
        """Whether the switch itself says this route is closed."""

    def select(self, channel: int) -> None:
        """Open all, close this route and read it back; InstrumentError if it reads open."""


class SensorRole(Role, Protocol):
    """An RF power sensor where the DUT goes (drivers/sensor.py): the level calibration's reference."""

    def set_frequency(self, frequency_hz: float) -> None:
        """The signal's frequency, for the sensor's cal factor (read back)."""

    def read_dbm(self) -> float:
        """One reading in dBm; InstrumentError beyond the sensor's range."""
