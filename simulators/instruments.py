"""Simulated instruments: an RF source and a DC voltmeter, sharing one BenchModel."""

from __future__ import annotations

import json
import math
import time
from typing import Callable, TextIO

from simulators.physics import BenchModel
from simulators.scpi import ScpiCommandError, ScpiInstrument, one_arg, parse_bool, parse_number

Clock = Callable[[], float]


class SimSource(ScpiInstrument):
    """An invented RF signal generator (SCPI SOURce / OUTPut subsystems)."""

    idn = "NIGHTBENCH-SIM,NS-RF100 Virtual Signal Source,SIM0001,1.0"

    def __init__(self, model: BenchModel, clock: Clock = time.monotonic, log: TextIO | None = None) -> None:
        super().__init__()
        self.model = model
        self.clock = clock
        self.log = log
        cfg = model.config.source
        self.add("[SOURce]:FREQuency[:CW]", self._set_freq)
        self.add("[SOURce]:FREQuency[:CW]?", lambda a: f"{self.model.frequency_hz:.6f}")
        self.add("[SOURce]:POWer[:LEVel][:IMMediate][:AMPLitude]", self._set_level)
        self.add("[SOURce]:POWer[:LEVel][:IMMediate][:AMPLitude]?", lambda a: f"{self.model.level_dbm:.3f}")
        self.add("OUTPut[:STATe]", self._set_output)
        self.add("OUTPut[:STATe]?", lambda a: "1" if self.model.output_on else "0")
        self._limits = cfg
        self._write_log("start")

    def reset(self) -> None:
        self.model.set_source(self.clock(), level_dbm=self._limits.min_dbm, output_on=False)
        self._write_log("*RST")

    def _set_freq(self, args: list[str]) -> None:
        value = parse_number(one_arg(args), ("HZ", "KHZ", "MHZ", "MAHZ", "GHZ"),
                             minimum=self._limits.min_hz, maximum=self._limits.max_hz)
        self.model.set_source(self.clock(), frequency_hz=value)
        self._write_log("frequency")

    def _set_level(self, args: list[str]) -> None:
        value = parse_number(one_arg(args), ("DBM",), minimum=self._limits.min_dbm, maximum=self._limits.max_dbm)
        self.model.set_source(self.clock(), level_dbm=value)
        self._write_log("level")

    def _set_output(self, args: list[str]) -> None:
        self.model.set_source(self.clock(), output_on=parse_bool(one_arg(args)))
        self._write_log("output")

    def _write_log(self, what: str) -> None:
        """One JSON line per state change: the instrument log safety tests read."""
        if self.log is None:
            return
        m = self.model
        dut = m.dut_dbm()
        self.log.write(json.dumps({
            "t": self.clock(), "event": what, "frequency_hz": m.frequency_hz, "level_dbm": m.level_dbm,
            "output": m.output_on, "dut_dbm": None if dut == -math.inf else round(dut, 6),
        }) + "\n")
        self.log.flush()


class SimMeter(ScpiInstrument):
    """An invented DC voltmeter that integrates over NPLC power-line cycles."""

    idn = "NIGHTBENCH-SIM,NS-DV200 Virtual DC Meter,SIM0002,1.0"

    def __init__(self, model: BenchModel, clock: Clock = time.monotonic, sleep: Callable[[float], None] = time.sleep) -> None:
        super().__init__()
        self.model = model
        self.clock = clock
        self.sleep = sleep
        self.nplc = model.config.meter.default_nplc
        self.add("CONFigure[:VOLTage][:DC]", lambda a: None)
        self.add("[SENSe]:VOLTage[:DC]:NPLCycles", self._set_nplc)
        self.add("[SENSe]:VOLTage[:DC]:NPLCycles?", lambda a: f"{self.nplc:g}")
        self.add("READ?", self._read)
        self.add("MEASure[:VOLTage][:DC]?", self._read)

    def reset(self) -> None:
        self.nplc = self.model.config.meter.default_nplc

    def _set_nplc(self, args: list[str]) -> None:
        self.nplc = parse_number(one_arg(args), minimum=0.001, maximum=100.0)

    def _read(self, args: list[str]) -> str:
        if args:
            raise ScpiCommandError(-108)
        window = self.model.integration_s(self.nplc)
        start = self.clock()
        self.sleep(window)
        value = self.model.reading(start, start + window)
        if abs(value) > self.model.config.meter.range_v:
            return "+9.90000000E+37"
        return f"{value:+.8E}"
