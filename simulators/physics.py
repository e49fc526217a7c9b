"""The physical bench the simulator pretends to be: source -> path -> detector -> meter.

All of it is deterministic given the config and a seed, so a test can ask for the truth the
simulator used (`BenchModel.dut_dbm`, `BenchModel.steady_output_v`) and compare measurements.
Time is passed in explicitly (seconds, any monotonic origin) so the model is testable without
sleeping; the servers pass `time.monotonic()`.
"""

from __future__ import annotations

import math
import random
import threading
from dataclasses import dataclass, field, fields

GHZ = 1e9


@dataclass
class SourceConfig:
    min_hz: float = 100e3
    max_hz: float = 6e9
    min_dbm: float = -130.0
    max_dbm: float = 20.0


@dataclass
class PathConfig:
    """Cable + pad between the source port and the DUT input."""

    loss_db: float = 6.0            # at 0 Hz
    loss_db_per_ghz: float = 0.8    # cable loss grows with frequency

    def loss(self, frequency_hz: float) -> float:
        return self.loss_db + self.loss_db_per_ghz * frequency_hz / GHZ


@dataclass
class DetectorConfig:
    """A log detector: V = slope * (P_eff - intercept), P_eff with a soft floor and soft top."""

    slope_v_per_db: float = 0.0200
    slope_tc_per_ghz: float = -0.03     # relative slope change per GHz
    intercept_dbm: float = -92.0
    intercept_db_per_ghz: float = 2.0
    floor_dbm: float = -82.0            # input-referred noise power (adds to the signal)
    saturation_dbm: float = 4.0         # soft compression toward this input level
    ripple_db: float = 0.0              # log-conformance ripple amplitude
    ripple_period_db: float = 10.0
    tau_rise_s: float = 0.002
    tau_fall_s: float = 0.006
    output_noise_v: float = 0.0001      # rms at a 20 ms integration window

    def slope(self, frequency_hz: float) -> float:
        return self.slope_v_per_db * (1.0 + self.slope_tc_per_ghz * frequency_hz / GHZ)

    def intercept(self, frequency_hz: float) -> float:
        return self.intercept_dbm + self.intercept_db_per_ghz * frequency_hz / GHZ

    def effective_dbm(self, dut_dbm: float) -> float:
        """Input level the log law sees: power sum with the floor, harmonic sum with saturation."""
        signal_mw = 0.0 if dut_dbm == -math.inf else 10.0 ** (dut_dbm / 10.0)
        with_floor = 10.0 * math.log10(signal_mw + 10.0 ** (self.floor_dbm / 10.0))
        compressed = -10.0 * math.log10(10.0 ** (-with_floor / 10.0) + 10.0 ** (-self.saturation_dbm / 10.0))
        if self.ripple_db:
            compressed += self.ripple_db * math.sin(2 * math.pi * compressed / self.ripple_period_db)
        return compressed

    def steady_v(self, dut_dbm: float, frequency_hz: float) -> float:
        return self.slope(frequency_hz) * (self.effective_dbm(dut_dbm) - self.intercept(frequency_hz))


@dataclass
class MeterConfig:
    line_hz: float = 50.0
    default_nplc: float = 0.1
    range_v: float = 10.0
    resolution_v: float = 1e-6


@dataclass
class BenchConfig:
    source: SourceConfig = field(default_factory=SourceConfig)
    path: PathConfig = field(default_factory=PathConfig)
    detector: DetectorConfig = field(default_factory=DetectorConfig)
    meter: MeterConfig = field(default_factory=MeterConfig)
    seed: int = 1

    @classmethod
    def from_dict(cls, data: dict) -> "BenchConfig":
        """Build from a nested dict (a TOML file); unknown keys are errors."""
        config = cls()
        for section, values in data.items():
            if section == "seed":
                config.seed = int(values)
                continue
            part = getattr(config, section, None)
            if part is None or not isinstance(values, dict):
                raise ValueError(f"unknown simulator config section '{section}'")
            names = {f.name for f in fields(part)}
            for key, value in values.items():
                if key not in names:
                    raise ValueError(f"unknown simulator config key '{section}.{key}'")
                setattr(part, key, float(value))
        return config


class FirstOrderOutput:
    """A first-order approach to a target with different rise and fall time constants."""

    def __init__(self, value: float, t: float) -> None:
        self.start_v = value
        self.target_v = value
        self.t0 = t
        self.tau = 1.0

    def value(self, t: float) -> float:
        dt = max(0.0, t - self.t0)
        return self.target_v + (self.start_v - self.target_v) * math.exp(-dt / self.tau)

    def mean(self, t_a: float, t_b: float) -> float:
        """Exact mean of the output over [t_a, t_b] (what an integrating meter sees)."""
        if t_b <= t_a:
            return self.value(t_a)
        a, b = max(0.0, t_a - self.t0), max(0.0, t_b - self.t0)
        if b <= 0.0:
            return self.start_v
        gap = self.start_v - self.target_v
        integral = self.target_v * (b - a) + gap * self.tau * (math.exp(-a / self.tau) - math.exp(-b / self.tau))
        return integral / (b - a)

    def retarget(self, target: float, t: float, tau_rise: float, tau_fall: float) -> None:
        current = self.value(t)
        self.start_v, self.t0 = current, t
        self.tau = tau_rise if target >= current else tau_fall
        self.target_v = target


class BenchModel:
    """The state of the simulated bench; thread-safe, shared by the instrument servers."""

    def __init__(self, config: BenchConfig | None = None, *, t: float = 0.0) -> None:
        self.config = config or BenchConfig()
        self.lock = threading.RLock()
        self.rng = random.Random(self.config.seed)
        self.frequency_hz = 100e6
        self.level_dbm = self.config.source.min_dbm
        self.output_on = False
        self.output = FirstOrderOutput(self.steady_output_v(), t)

    # -- truth --------------------------------------------------------------------------
    def dut_dbm(self, frequency_hz: float | None = None, level_dbm: float | None = None,
                output_on: bool | None = None) -> float:
        """DUT-plane level for a source state (the current one by default)."""
        f = self.frequency_hz if frequency_hz is None else frequency_hz
        level = self.level_dbm if level_dbm is None else level_dbm
        on = self.output_on if output_on is None else output_on
        return level - self.config.path.loss(f) if on else -math.inf

    def steady_output_v(self) -> float:
        return self.config.detector.steady_v(self.dut_dbm(), self.frequency_hz)

    def truth_v(self, dut_dbm: float, frequency_hz: float) -> float:
        """Noiseless settled detector output for a DUT-plane level: what a test compares to."""
        return self.config.detector.steady_v(dut_dbm, frequency_hz)

    # -- source side --------------------------------------------------------------------
    def set_source(self, t: float, *, frequency_hz: float | None = None, level_dbm: float | None = None,
                   output_on: bool | None = None) -> None:
        with self.lock:
            if frequency_hz is not None:
                self.frequency_hz = frequency_hz
            if level_dbm is not None:
                self.level_dbm = level_dbm
            if output_on is not None:
                self.output_on = output_on
            det = self.config.detector
            self.output.retarget(self.steady_output_v(), t, det.tau_rise_s, det.tau_fall_s)

    # -- meter side ---------------------------------------------------------------------
    def integration_s(self, nplc: float) -> float:
        return nplc / self.config.meter.line_hz

    def reading(self, t_start: float, t_end: float) -> float:
        """A meter reading integrated over [t_start, t_end]: the mean output plus noise."""
        with self.lock:
            mean = self.output.mean(t_start, t_end)
            window = max(t_end - t_start, 1e-5)
            sigma = self.config.detector.output_noise_v * math.sqrt(0.02 / window)
            value = mean + self.rng.gauss(0.0, sigma)
        resolution = self.config.meter.resolution_v
        return round(value / resolution) * resolution
