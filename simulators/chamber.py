"""An invented temperature chamber on a SCPI-styled line protocol, over the bench's thermal model.

There is no SCPI standard for chambers; the "scpi" headers below are nightbench's own default
names, the "alt" set is a different invented protocol (for the plan template that overrides every
chamber command). The chamber changes the DUT temperature the detector model sees
(physics.BenchModel.thermal), so a run's intercept and slope move as a real part's would.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import TextIO

from nightbench.simulators.faults import FaultInjector
from nightbench.simulators.physics import BenchModel
from nightbench.simulators.scpi import MAKER, ScpiCommandError, ScpiInstrument, one_arg, parse_bool, parse_number


@dataclass(frozen=True)
class ChamberHeaders:
    error: str
    setpoint: str
    temperature: str
    conditioning: str
    dut: str  # the simulator's truth: a DUT-mounted sensor (tests and the optional DUT reading)


CHAMBER_HEADERS = {
    "scpi": ChamberHeaders(
        error="SYSTem:ERRor[:NEXT]?",
        setpoint="CHAMber:SETPoint",
        temperature="CHAMber:TEMPerature?",
        conditioning="CHAMber:CONDitioning",
        dut="CHAMber:DUT:TEMPerature?",
    ),
    "alt": ChamberHeaders(error="ERRor?", setpoint="SETP", temperature="PVAL?", conditioning="RUN", dut="DUTT?"),
}


class SimChamber(ScpiInstrument):
    """A chamber: setpoint, measured air temperature, conditioning on/off, error queue."""

    idn = f"{MAKER},Simulated Chamber,SIM0004,1.0"

    def __init__(
        self,
        model: BenchModel,
        clock: Callable[[], float] = time.monotonic,
        log: TextIO | None = None,
        faults: FaultInjector | None = None,
        dialect: str = "scpi",
    ) -> None:
        h = CHAMBER_HEADERS[dialect]
        super().__init__(error_header=h.error)
        self.model = model
        self.thermal = model.thermal
        self.clock = clock
        self.log = log
        self.faults = faults or FaultInjector([])
        self.add(h.setpoint, self._set_setpoint)
        self.add(h.setpoint + "?", lambda a: f"{self.thermal.setpoint_c:.3f}")
        self.add(h.temperature, self._read)
        self.add(h.conditioning, self._set_conditioning)
        self.add(h.conditioning + "?", lambda a: "1" if self.thermal.conditioning else "0")
        self.add(h.dut, lambda a: f"{self.thermal.dut_at(self.clock()):.3f}")

    def reset(self) -> None:
        """*RST leaves a chamber's temperature alone: changing it is never a safe default."""

    def _set_setpoint(self, args: list[str]) -> None:
        cfg = self.thermal.config
        value = parse_number(one_arg(args), ("C", "CEL"), minimum=cfg.min_c, maximum=cfg.max_c)
        refusal = self.faults.refuses_setpoint()
        if refusal is not None:
            raise ScpiCommandError(refusal.code or -222, f"setpoint {value:g} C refused")
        self.thermal.set_setpoint(self.clock(), value)
        self._write_log("setpoint")

    def _set_conditioning(self, args: list[str]) -> None:
        self.thermal.set_conditioning(self.clock(), parse_bool(one_arg(args)) if args else True)
        self._write_log("conditioning")

    def _read(self, args: list[str]) -> str:
        if args:
            raise ScpiCommandError(-108)
        return f"{self.thermal.reading(self.clock()) + self.faults.drift_c():.3f}"

    def _write_log(self, what: str) -> None:
        """One JSON line per chamber change, in the bench's instrument log (the same fields as the
        source's lines, so safety tests can read the order of RF and chamber events)."""
        if self.log is None:
            return
        t = self.clock()
        m = self.model
        with m.lock:
            self.log.write(
                json.dumps(
                    {
                        "t": t,
                        "event": f"chamber {what}",
                        "frequency_hz": m.frequency_hz,
                        "level_dbm": m.level_dbm,
                        "output": m.output_on,
                        "dut_dbm": None,
                        "setpoint_c": self.thermal.setpoint_c,
                        "conditioning": self.thermal.conditioning,
                        "dut_c": round(self.thermal.dut_at(t), 4),
                    }
                )
                + "\n"
            )
            self.log.flush()
