"""The DC meter role: a SCPI DMM measuring DC volts (SCPI-1999 CONFigure/SENSe/READ?)."""

from __future__ import annotations

import math

from drivers.errors import InstrumentError
from drivers.scpi import ScpiSession

# SCPI-1999 vol. 1, 7.2.1: +9.9E37 is the value an instrument returns for overrange.
OVERRANGE = 9.9e37


class ScpiDmm:
    """A DMM read one triggered reading at a time with READ?."""

    def __init__(self, session: ScpiSession, *, nplc: float | None = None) -> None:
        self.session = session
        self.nplc = nplc

    def configure(self) -> None:
        self.session.drain_errors()
        commands = ["CONFigure:VOLTage:DC"]
        if self.nplc is not None:
            commands.append(f"SENSe:VOLTage:DC:NPLCycles {self.nplc:g}")
        self.session.apply(commands)

    def read(self) -> float:
        """One reading in volts; +/-inf for an overrange reading."""
        reply = self.session.query("READ?")
        try:
            value = float(reply)
        except ValueError as exc:
            raise InstrumentError(f"meter reply {reply!r} is not a number",
                                  resource=self.session.resource, command="READ?") from exc
        if not math.isfinite(value) or abs(value) >= OVERRANGE:
            return math.copysign(math.inf, value)
        return value
