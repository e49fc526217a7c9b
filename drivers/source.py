"""The RF source role: frequency, level, output. SCPI-1999 SOURce/OUTPut subsystems."""

from __future__ import annotations

from drivers.errors import SafetyError
from drivers.scpi import ScpiSession


class RfSource:
    """An RF signal generator. Refuses levels outside its configured limits before sending."""

    def __init__(self, session: ScpiSession, *, min_dbm: float = -140.0, max_dbm: float = 20.0) -> None:
        self.session = session
        self.min_dbm = min_dbm
        self.max_dbm = max_dbm
        self.frequency_hz: float | None = None
        self.level_dbm: float | None = None
        self.output_on: bool | None = None

    def configure(self) -> None:
        """Start from a known state: output off, error queue empty."""
        self.session.drain_errors()
        self.set(output=False)

    def set(self, *, frequency_hz: float | None = None, level_dbm: float | None = None,
            output: bool | None = None) -> None:
        """Apply any of the three in one synchronised, error-checked message, in the given order:
        level before frequency, so a caller that lowers the level for a frequency change gets it
        applied first."""
        commands = []
        if level_dbm is not None:
            if not (self.min_dbm <= level_dbm <= self.max_dbm):
                raise SafetyError(
                    f"source level {level_dbm:.2f} dBm is outside the source's limits "
                    f"[{self.min_dbm}, {self.max_dbm}] dBm", resource=self.session.resource)
            commands.append(f"SOURce:POWer:LEVel {level_dbm:.3f} DBM")
        if frequency_hz is not None:
            commands.append(f"SOURce:FREQuency:CW {frequency_hz:.3f} HZ")
        if output is not None:
            commands.append(f"OUTPut:STATe {'ON' if output else 'OFF'}")
        if not commands:
            return
        self.session.apply(commands)
        if level_dbm is not None:
            self.level_dbm = level_dbm
        if frequency_hz is not None:
            self.frequency_hz = frequency_hz
        if output is not None:
            self.output_on = output

    def rf_off(self) -> None:
        self.set(output=False)
