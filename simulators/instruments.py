"""Simulated instruments sharing one BenchModel: an RF source, a DC voltmeter, an ADC board."""

from __future__ import annotations

import functools
import json
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import TextIO

from nightbench.simulators.faults import FaultInjector
from nightbench.simulators.physics import BenchModel, vrms_to_dbm
from nightbench.simulators.scpi import MAKER, ScpiCommandError, ScpiInstrument, one_arg, parse_bool, parse_number

Clock = Callable[[], float]
OVERRANGE = "+9.90000000E+37"  # SCPI-1999 vol. 1, 7.2.1: the value returned for overrange

# Command headers per dialect: "scpi" is SCPI-1999; "alt" is a non-standard set invented for this
# simulator (the headers follow no real instrument), for testing a plan's command overrides.
DIALECTS = ("scpi", "alt")


@dataclass(frozen=True)
class SourceHeaders:
    error: str
    freq: str
    level: str
    output: str
    offset: str  # the level offset (dB): the source delivers the set level minus it
    modulation: dict[str, str]  # each modulation's state header, by name


@dataclass(frozen=True)
class MeterHeaders:
    error: str
    configure: str
    nplc: str
    range: str
    trigger: str
    read: tuple[str, ...]
    function: str
    autorange: str
    autozero: str


SOURCE_HEADERS = {
    "scpi": SourceHeaders(
        error="SYSTem:ERRor[:NEXT]?",
        freq="[SOURce]:FREQuency[:CW]",
        level="[SOURce]:POWer[:LEVel][:IMMediate][:AMPLitude]",
        output="OUTPut[:STATe]",
        offset="[SOURce]:POWer[:LEVel][:IMMediate]:OFFSet",
        modulation={m: f"[SOURce]:{m}:STATe" for m in ("AM", "FM", "PM", "PULM")},
    ),
    "alt": SourceHeaders(
        error="ERRor?",
        freq="TONE:PITCh",
        level="TONE:LOUDness",
        output="TONE:SOUNding",
        offset="TONE:SHIFt",
        modulation={"AM": "TONE:WOBBle"},
    ),
}
METER_HEADERS = {
    "scpi": MeterHeaders(
        error="SYSTem:ERRor[:NEXT]?",
        configure="CONFigure[:VOLTage][:DC]",
        nplc="[SENSe]:VOLTage[:DC]:NPLCycles",
        range="[SENSe]:VOLTage[:DC]:RANGe[:UPPer]",
        trigger="TRIGger:SOURce",
        read=("READ?", "MEASure[:VOLTage][:DC]?"),
        function="[SENSe]:FUNCtion[:ON]",
        autorange="[SENSe]:VOLTage[:DC]:RANGe[:UPPer]:AUTO",
        autozero="[SENSe]:ZERO:AUTO",
    ),
    "alt": MeterHeaders(
        error="ERRor?",
        configure="CONFigure:DCV",
        nplc="DCV:INTegration",
        range="DCV:RANGe",
        trigger="TRIGger:MODE",
        read=("DCV?",),
        function="MODE",
        autorange="DCV:ARANge",
        autozero="DCV:AZERo",
    ),
}


class SimSource(ScpiInstrument):
    """An invented RF signal generator (SCPI SOURce / OUTPut subsystems)."""

    idn = f"{MAKER},Simulated RF Source,SIM0001,1.0"

    def __init__(
        self,
        model: BenchModel,
        clock: Clock = time.monotonic,
        log: TextIO | None = None,
        faults: FaultInjector | None = None,
        dialect: str = "scpi",
    ) -> None:
        h = SOURCE_HEADERS[dialect]
        super().__init__(error_header=h.error)
        self.model = model
        self.clock = clock
        self.log = log
        self.faults = faults or FaultInjector([])
        self._limits = model.config.source
        self.add(h.freq, self._set_freq)
        self.add(h.freq + "?", lambda a: f"{self.model.frequency_hz:.6f}")
        self.add(h.level, self._set_level)
        self.add(h.level + "?", lambda a: f"{self.model.level_dbm + self.offset_db:.3f}")
        self.add(h.output, self._set_output)
        self.add(h.output + "?", lambda a: "1" if self.model.output_on else "0")
        # what a previous user left: modulation and a level offset, until set or a *RST
        self.offset_db = self._limits.user_offset_db
        self.modulation = {name: False for name in h.modulation}
        self.modulation["AM"] = self._limits.user_modulation
        self.add(h.offset, self._set_offset)
        self.add(h.offset + "?", lambda a: f"{self.offset_db:g}")
        for name, header in h.modulation.items():
            self.add(header, functools.partial(self._set_modulation, name))
            self.add(header + "?", functools.partial(self._query_modulation, name))
        self._write_log("start")

    def reset(self) -> None:
        """*RST: output off first, then the lowest level (IEEE 488.2 10.32: a safe known state);
        modulation and the level offset off."""
        self.model.set_source(self.clock(), output_on=False)
        self.model.set_source(self.clock(), level_dbm=self._limits.min_dbm)
        self.offset_db = 0.0
        self.modulation = dict.fromkeys(self.modulation, False)
        self._write_log("*RST")

    def power_on(self) -> None:
        """As after a power cycle (the `reboot` fault): output off, and the modulation and level
        offset a previous user saved recalled, as many generators do at power-on."""
        self.model.set_source(self.clock(), output_on=False)
        self.offset_db = self._limits.user_offset_db
        self.modulation = dict.fromkeys(self.modulation, False)
        self.modulation["AM"] = self._limits.user_modulation
        self._write_log("power-on")

    def _set_offset(self, args: list[str]) -> None:
        """A level offset (dB, as an external gain or loss would be entered): the displayed and
        queried level is the delivered level plus the offset; the output itself does not change."""
        self.offset_db = parse_number(one_arg(args), ("DB",), minimum=-100.0, maximum=100.0)

    def _set_modulation(self, name: str, args: list[str]) -> None:
        self.modulation[name] = parse_bool(one_arg(args))

    def _query_modulation(self, name: str, args: list[str]) -> str:
        return "1" if self.modulation[name] else "0"

    def _set_freq(self, args: list[str]) -> None:
        value = parse_number(
            one_arg(args), ("HZ", "KHZ", "MHZ", "MAHZ", "GHZ"), minimum=self._limits.min_hz, maximum=self._limits.max_hz
        )
        self.model.set_source(self.clock(), frequency_hz=value)
        self._write_log("frequency")

    def _set_level(self, args: list[str]) -> None:
        """Level in dBm, or as an rms voltage into 50 ohm with a V/MV/UV suffix."""
        text = one_arg(args).strip()
        upper = text.upper()
        if upper.endswith(("MV", "UV", "V")) and not upper.endswith("DBM"):
            volts = parse_number(text, ("V", "MV", "UV"))
            if volts <= 0:
                raise ScpiCommandError(-222, "a level in volts must be positive")
            value = vrms_to_dbm(volts)
            if not (self._limits.min_dbm <= value <= self._limits.max_dbm):
                raise ScpiCommandError(-222, f"{value:.2f} dBm outside the source's range")
        else:
            value = parse_number(text, ("DBM",), minimum=self._limits.min_dbm, maximum=self._limits.max_dbm)
        refusal = self.faults.refuses_level(value)
        if refusal is not None:
            raise ScpiCommandError(refusal.code or -222, f"level {value:.2f} dBm refused")
        self.model.set_source(self.clock(), level_dbm=value - self.offset_db)  # delivered: set minus offset
        self._write_log("level")

    def _set_output(self, args: list[str]) -> None:
        self.model.set_source(self.clock(), output_on=parse_bool(one_arg(args)))
        self._write_log("output")

    def _write_log(self, what: str) -> None:
        """One JSON line per state change: the instrument log that safety tests read."""
        if self.log is None:
            return
        m = self.model
        t = self.clock()
        with m.lock:  # the chamber writes to the same log from its own thread
            dut = m.dut_dbm()
            self.log.write(
                json.dumps(
                    {
                        "t": t,
                        "event": what,
                        "frequency_hz": m.frequency_hz,
                        "level_dbm": m.level_dbm,
                        "output": m.output_on,
                        "dut_dbm": None if dut == -math.inf else round(dut, 6),
                        "setpoint_c": m.thermal.setpoint_c,
                        "dut_c": round(m.thermal.dut_at(t), 4),
                    }
                )
                + "\n"
            )
            self.log.flush()


class SimMeter(ScpiInstrument):
    """An invented DC voltmeter that integrates over NPLC power-line cycles."""

    idn = f"{MAKER},Simulated DC Meter,SIM0002,1.0"

    def __init__(
        self,
        model: BenchModel,
        clock: Clock = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
        faults: FaultInjector | None = None,
        dialect: str = "scpi",
    ) -> None:
        h = METER_HEADERS[dialect]
        super().__init__(error_header=h.error)
        self.model = model
        self.clock = clock
        self.sleep = sleep
        self.faults = faults or FaultInjector([])
        self.reset()
        self.add(h.configure, self._configure)
        self.add(h.nplc, self._set_nplc)
        self.add(h.nplc + "?", lambda a: f"{self.nplc:g}")
        self.add(h.range, self._set_range)
        self.add(h.range + "?", lambda a: f"{self.range_v:g}")
        self.add(h.trigger, self._set_trigger)
        for header in h.read:
            self.add(header, self._read)
        self.add(h.function, self._set_function)
        self.add(h.function + "?", lambda a: f'"{self.function}"')
        self.add(h.autorange, self._set_autorange)
        self.add(h.autorange + "?", lambda a: "1" if self.autorange else "0")
        self.add(h.autozero, self._set_autozero)
        self.add(h.autozero + "?", lambda a: self.autozero)
        cfg = self.model.config.meter  # what a previous user left, until set or a *RST
        self.autorange = cfg.user_autorange
        self.autozero = "ON" if cfg.user_autozero else "OFF"

    def reset(self) -> None:
        cfg = self.model.config.meter
        self.nplc = cfg.default_nplc
        self.range_v = cfg.default_range_v
        self.function = "VOLT"
        self.autorange = False
        self.autozero = "ON"

    def _set_function(self, args: list[str]) -> None:
        name = one_arg(args).strip().strip("\"'").upper()
        if name not in ("VOLT", "VOLT:DC", "VOLTAGE", "VOLTAGE:DC", "DCV"):
            raise ScpiCommandError(-224, "only DC volts are simulated")
        self.function = "VOLT"

    def _set_autorange(self, args: list[str]) -> None:
        self.autorange = parse_bool(one_arg(args))

    def _set_autozero(self, args: list[str]) -> None:
        word = one_arg(args).strip().upper()
        if word != "ONCE":
            parse_bool(word)
        self.autozero = {"1": "ON", "0": "OFF"}.get(word, word)

    def _configure(self, args: list[str]) -> None:
        self.function = "VOLT"
        if args and args[0].upper() not in ("DEF", "AUTO"):
            self._set_range(args[:1])

    def _set_trigger(self, args: list[str]) -> None:
        if one_arg(args).upper() not in ("IMM", "IMMEDIATE"):
            raise ScpiCommandError(-224, "only IMMediate triggering is simulated")

    def _set_nplc(self, args: list[str]) -> None:
        self.nplc = parse_number(one_arg(args), minimum=0.001, maximum=100.0)

    def _set_range(self, args: list[str]) -> None:
        wanted = parse_number(one_arg(args), ("V", "MV"), minimum=0.0, maximum=max(self.model.config.meter.ranges_v))
        self.range_v = min(r for r in self.model.config.meter.ranges_v if r >= wanted)
        self.autorange = False  # a range set by hand ends autoranging (SCPI-1999 SENSe RANGe:AUTO)

    def read_volts(self) -> float | None:
        """Integrate one reading (takes NPLC/line frequency of real time); None on overload."""
        cfg = self.model.config.meter
        window = self.model.integration_s(self.nplc)
        start = self.clock()
        self.sleep(window)
        value = self.model.reading(start, start + window) + self.model.meter_noise(self.nplc)
        range_v = self.range_v
        if self.autorange:  # the smallest range that holds the reading
            range_v = min((r for r in cfg.ranges_v if abs(value) <= r), default=max(cfg.ranges_v))
        if self.faults.overload("meter") or abs(value) > range_v * cfg.overrange:
            return None
        step = range_v * cfg.resolution_ppm * 1e-6
        return round(value / step) * step

    def _read(self, args: list[str]) -> str:
        if args:
            raise ScpiCommandError(-108)
        value = self.read_volts()
        return OVERRANGE if value is None else f"{value:+.8E}"


class SimAdc:
    """An invented serial ADC board with a terse line protocol (not SCPI): counts, not volts.

    `V` -> identity; `R` -> `R=+00012345` (one conversion, or the mean of `A n` conversions),
    `R=OVER` when clipped; `A n` -> `OK` (average n conversions); anything else -> `ERR 1`.
    """

    idn = f"{MAKER} simulated ADC board, 24 bit, SIM0003, v1.2"

    def __init__(
        self,
        model: BenchModel,
        clock: Clock = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
        faults: FaultInjector | None = None,
    ) -> None:
        self.model = model
        self.clock = clock
        self.sleep = sleep
        self.faults = faults or FaultInjector([])
        self.average = 1

    def push_error(self, code: int, detail: str = "") -> None:
        """The line protocol has no error queue: malformed input just gets `ERR 1` or nothing."""

    def execute(self, message: str) -> str | None:
        words = message.strip().split()
        if not words:
            return None
        cmd = words[0].upper()
        if cmd == "V" and len(words) == 1:
            return self.idn
        if cmd == "A" and len(words) == 2 and words[1].isdigit() and 1 <= int(words[1]) <= 256:
            self.average = int(words[1])
            return "OK"
        if cmd == "R" and len(words) == 1:
            return self._read()
        return "ERR 1"

    def _read(self) -> str:
        cfg = self.model.config.adc
        window = cfg.conversion_s * self.average
        start = self.clock()
        self.sleep(window)
        volts = self.model.reading(start, start + window)
        counts = round(volts / cfg.lsb_v) + cfg.offset_counts
        limit = 2 ** (cfg.bits - 1)
        if self.faults.overload("adc") or not (-limit <= counts < limit):
            return "R=OVER"
        return f"R={counts:+09d}"
