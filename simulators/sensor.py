"""An invented RF power sensor that sits where the DUT goes: it reads the true DUT-plane level.

SCPI-1999 style headers: `[SENSe]:FREQuency[:CW]` (the frequency whose cal factor it applies,
Hz) and its query, `READ?` / `MEASure[:POWer]?` (one reading in dBm), `SYSTem:ERRor[:NEXT]?`.
It reads `BenchModel.dut_dbm()`, the same level the simulated detector sees, plus its own noise:
a relative part (`noise_db`) and the zero's power noise (`zero_noise_dbm`), which dominates near
the lower limit. A set frequency other than the signal's costs `cal_factor_db_per_ghz` per GHz
of difference, as a wrong cal factor would.

Limits, as real sensors behave: below `min_dbm` (or with RF off) it answers the SCPI under-range
value -9.9E37 rather than a number it cannot resolve, and above `max_dbm` +9.9E37 (SCPI-1999
vol. 1, 7.2.1: 9.9E37 stands for infinity, its negative for minus infinity). The noise comes from
its own seeded stream, so a bench whose sensor is unused reads exactly what it did before.
"""

from __future__ import annotations

import math
import random
import time
from collections.abc import Callable

from nightbench.simulators.faults import FaultInjector
from nightbench.simulators.physics import GHZ, BenchModel, dbm_to_w, w_to_dbm
from nightbench.simulators.scpi import MAKER, ScpiCommandError, ScpiInstrument, one_arg, parse_number

OVERRANGE = "+9.90000000E+37"
UNDERRANGE = "-9.90000000E+37"
SEED_OFFSET = 7919  # its own stream: the detector's and meter's readings stay as they were


class SimSensor(ScpiInstrument):
    """A power sensor reading the DUT-plane level of the shared bench model."""

    idn = f"{MAKER},Simulated Power Sensor,SIM0005,1.0"

    def __init__(
        self,
        model: BenchModel,
        clock: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
        faults: FaultInjector | None = None,
    ) -> None:
        super().__init__()
        self.model = model
        self.clock = clock
        self.sleep = sleep
        self.faults = faults or FaultInjector([])
        self.rng = random.Random(model.config.seed + SEED_OFFSET)
        self.reset()
        self.add("[SENSe]:FREQuency[:CW]", self._set_freq)
        self.add("[SENSe]:FREQuency[:CW]?", lambda a: f"{self.frequency_hz:.6f}")
        for header in ("READ?", "MEASure[:POWer]?"):
            self.add(header, self._read)

    def reset(self) -> None:
        self.frequency_hz = 50e6  # a power-on default, rarely the signal's: set it

    def _set_freq(self, args: list[str]) -> None:
        self.frequency_hz = parse_number(one_arg(args), ("HZ", "KHZ", "MHZ", "MAHZ", "GHZ"), minimum=1e6, maximum=40e9)

    def read_dbm(self) -> float:
        """One reading: the true DUT-plane level with the sensor's errors; +/-inf beyond its limits."""
        cfg = self.model.config.sensor
        self.sleep(cfg.reading_s)
        with self.model.lock:
            true = self.model.dut_dbm()
            signal_hz = self.model.frequency_hz
        if self.faults.overload("sensor"):
            return math.inf
        if true == -math.inf:
            return -math.inf
        power_w = dbm_to_w(true) * 10.0 ** (self.rng.gauss(0.0, cfg.noise_db) / 10.0)
        power_w += self.rng.gauss(0.0, dbm_to_w(cfg.zero_noise_dbm))
        if power_w <= 0:
            return -math.inf
        reading = w_to_dbm(power_w) + cfg.cal_factor_db_per_ghz * abs(self.frequency_hz - signal_hz) / GHZ
        if reading < cfg.min_dbm:
            return -math.inf
        return math.inf if reading > cfg.max_dbm else reading

    def _read(self, args: list[str]) -> str:
        if args:
            raise ScpiCommandError(-108)
        value = self.read_dbm()
        if math.isinf(value):
            return OVERRANGE if value > 0 else UNDERRANGE
        return f"{value:+.6E}"
