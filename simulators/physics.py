"""The physical bench the simulator pretends to be: source -> path -> detector -> meter.

All of it is deterministic given the config and a seed, so a test can ask for the truth the
simulator used (`BenchModel.dut_dbm`, `BenchModel.truth_v`) and compare measurements with it.
Time is passed in explicitly (seconds, any monotonic origin) so the model is testable without
sleeping; the servers pass `time.monotonic()`.
"""

from __future__ import annotations

import math
import random
import threading
from dataclasses import dataclass, field, fields

from nightbench.simulators.thermal import ChamberConfig, ThermalModel

GHZ = 1e9
BOLTZMANN = 1.380649e-23  # J/K, exact in the 2019 SI
T0_K = 290.0  # IEEE standard reference temperature for noise
REF_OHM = 50.0


def dbm_to_w(dbm: float) -> float:
    return 1e-3 * 10.0 ** (dbm / 10.0)


def w_to_dbm(watts: float) -> float:
    return 10.0 * math.log10(watts / 1e-3)


def vrms_to_dbm(volts: float, ohms: float = REF_OHM) -> float:
    """Power of a sine of `volts` rms into `ohms`, in dBm (0.2236 V in 50 ohm is 0 dBm)."""
    return w_to_dbm(volts * volts / ohms)


def thermal_noise_dbm_per_hz(kelvin: float = T0_K) -> float:
    """Available thermal noise power density kT, in dBm/Hz."""
    return w_to_dbm(BOLTZMANN * kelvin)


@dataclass
class SourceConfig:
    min_hz: float = 100e3
    max_hz: float = 6e9
    min_dbm: float = -130.0
    max_dbm: float = 20.0
    level_offset_db: float = 0.0  # level accuracy: actual minus set, at 0 Hz
    flatness_db_per_ghz: float = 0.0  # and its change with frequency
    level_settle_s: float = 0.0002  # the output reaches a new level this long after a change
    # a previous user's settings, found at power-on (a *RST clears them): amplitude modulation on,
    # and a level offset (the source then delivers the set level minus the offset)
    user_modulation: bool = False
    user_offset_db: float = 0.0
    # a hidden level error for calibration to find (off by default): actual minus set, dB, at
    # error_hz (interpolated linearly, held beyond the ends), plus error_db_per_10db for every
    # 10 dB the setting lies below error_reference_dbm (an attenuator's small level dependence)
    error_hz: tuple[float, ...] = ()
    error_db: tuple[float, ...] = ()
    error_db_per_10db: float = 0.0
    error_reference_dbm: float = 0.0

    def hidden_error_db(self, frequency_hz: float, level_dbm: float) -> float:
        """The hidden level error (actual minus set) at a frequency and setting."""
        if len(self.error_hz) != len(self.error_db):
            raise ValueError("source.error_hz and source.error_db must have the same length")
        table = 0.0
        if self.error_hz:
            pairs = sorted(zip(self.error_hz, self.error_db))
            if frequency_hz <= pairs[0][0]:
                table = pairs[0][1]
            elif frequency_hz >= pairs[-1][0]:
                table = pairs[-1][1]
            else:
                i = next(k for k, (f, _) in enumerate(pairs) if f >= frequency_hz)
                (f0, e0), (f1, e1) = pairs[i - 1], pairs[i]
                table = e0 + (e1 - e0) * (frequency_hz - f0) / (f1 - f0)
        return table + self.error_db_per_10db * (self.error_reference_dbm - level_dbm) / 10.0


@dataclass
class PathConfig:
    """A fixed pad plus a cable whose loss grows as sqrt(f) (skin effect)."""

    pad_db: float = 6.0
    cable_db_at_1ghz: float = 0.9

    def loss(self, frequency_hz: float) -> float:
        return self.pad_db + self.cable_db_at_1ghz * math.sqrt(max(frequency_hz, 0.0) / GHZ)


@dataclass
class DetectorConfig:
    """A power detector of one of three laws, each with a noise floor and a soft top:

    - `log` (log amplifier, RSSI): V = slope * (P_eff - intercept), P_eff in dBm;
    - `square` (diode in its square-law region): V = responsivity * P_mW, output proportional to
      power, i.e. to V rms squared into the load (common practice);
    - `linear` (RMS-responding detector with a linear output): V = gain * v_rms of the input
      into 50 ohm (0 dBm = 223.6 mV rms, common practice).
    """

    law: str = "log"  # log | square | linear
    responsivity_v_per_mw: float = 0.5  # square law: output volts per milliwatt
    gain_v_per_v: float = 4.0  # linear law: output volts per input volt rms

    slope_v_per_db: float = 0.0200
    slope_change_per_ghz: float = -0.03  # relative slope change per GHz
    intercept_dbm: float = -92.0
    intercept_db_per_ghz: float = 2.0
    noise_bandwidth_hz: float = 10e6  # input-referred noise: kT * B * F adds to the signal
    noise_figure_db: float = 22.0
    saturation_dbm: float = 4.0  # soft compression toward this input level
    ripple_db: float = 0.15  # log-conformance ripple of successive-detection stages,
    ripple_period_db: float = 10.0  # with a period equal to the stage gain
    tau_rise_s: float = 0.002
    tau_fall_s: float = 0.006
    tail_share: float = 0.0  # a slow part of every step (e.g. 0.01: 1 %, a thermal tail),
    tau_tail_s: float = 0.2  # with its own time constant, the same both ways
    output_noise_v: float = 0.0001  # rms at a 20 ms integration window, strong signal
    floor_noise_v: float = 0.0004  # extra rms (20 ms window) as the input nears the floor
    slope_tc_per_c: float = -2e-4  # relative slope change per degree from 25 C
    intercept_tc_db_per_c: float = 0.01  # intercept shift per degree from 25 C
    floor_tc_db_per_c: float = 0.02  # noise-floor shift per degree from 25 C (noise figure grows warm)

    @property
    def floor_dbm(self) -> float:
        return thermal_noise_dbm_per_hz() + 10 * math.log10(self.noise_bandwidth_hz) + self.noise_figure_db

    def floor_at(self, temperature_c: float) -> float:
        return self.floor_dbm + self.floor_tc_db_per_c * (temperature_c - 25.0)

    def slope(self, frequency_hz: float, temperature_c: float = 25.0) -> float:
        return (
            self.slope_v_per_db
            * (1.0 + self.slope_change_per_ghz * frequency_hz / GHZ)
            * (1.0 + self.slope_tc_per_c * (temperature_c - 25.0))
        )

    def intercept(self, frequency_hz: float, temperature_c: float = 25.0) -> float:
        return (
            self.intercept_dbm
            + self.intercept_db_per_ghz * frequency_hz / GHZ
            + self.intercept_tc_db_per_c * (temperature_c - 25.0)
        )

    def noise_share(self, dut_dbm: float) -> float:
        """N / (S + N) at the input: 0 for a strong signal, 1 with no signal."""
        noise = dbm_to_w(self.floor_dbm)
        signal = 0.0 if dut_dbm == -math.inf else dbm_to_w(dut_dbm)
        return noise / (signal + noise)

    def effective_dbm(self, dut_dbm: float, temperature_c: float = 25.0) -> float:
        """Input level the log law sees: power sum with the floor (at the DUT temperature), harmonic
        sum with saturation."""
        signal_w = 0.0 if dut_dbm == -math.inf else dbm_to_w(dut_dbm)
        with_floor = w_to_dbm(signal_w + dbm_to_w(self.floor_at(temperature_c)))
        compressed = -10.0 * math.log10(10.0 ** (-with_floor / 10.0) + 10.0 ** (-self.saturation_dbm / 10.0))
        if self.ripple_db:
            compressed += self.ripple_db * math.sin(2 * math.pi * compressed / self.ripple_period_db)
        return compressed

    def steady_v(self, dut_dbm: float, frequency_hz: float, temperature_c: float = 25.0) -> float:
        effective = self.effective_dbm(dut_dbm, temperature_c)
        if self.law == "square":
            return self.responsivity_v_per_mw * dbm_to_w(effective) * 1e3
        if self.law == "linear":
            return self.gain_v_per_v * math.sqrt(dbm_to_w(effective) * REF_OHM)
        if self.law != "log":
            raise ValueError(f"unknown detector law {self.law!r} (log, square or linear)")
        return self.slope(frequency_hz, temperature_c) * (effective - self.intercept(frequency_hz, temperature_c))

    def noise_v(self, dut_dbm: float, window_s: float) -> float:
        """Output noise rms seen by a meter integrating over `window_s` (white noise: 1/sqrt(T))."""
        at_20ms = self.output_noise_v + self.floor_noise_v * self.noise_share(dut_dbm)
        return at_20ms * math.sqrt(0.02 / max(window_s, 1e-5))


@dataclass
class MeterConfig:
    line_hz: float = 50.0
    default_nplc: float = 0.1
    noise_v: float = 2e-6  # the meter's own rms noise at 1 NPLC
    ranges_v: tuple[float, ...] = (0.1, 1.0, 10.0, 100.0)
    default_range_v: float = 10.0
    overrange: float = 1.2  # readings beyond range * overrange are overloads
    resolution_ppm: float = 1.0  # of range
    # a previous user's settings, found at power-on: autorange on, autozero off
    user_autorange: bool = False
    user_autozero: bool = True


@dataclass
class AdcConfig:
    """A serial ADC board: bipolar input, counts out."""

    full_scale_v: float = 5.0
    bits: int = 24
    conversion_s: float = 0.005
    offset_counts: int = 37  # a small zero offset the plan's offset key removes

    @property
    def lsb_v(self) -> float:
        return 2 * self.full_scale_v / 2**self.bits


@dataclass
class SensorConfig:
    """A power sensor where the DUT goes (simulators/sensor.py): it reads the true DUT-plane level."""

    min_dbm: float = -60.0  # below: the SCPI under-range value (-9.9E37), as the sensor cannot resolve it
    max_dbm: float = 20.0  # above: overrange (+9.9E37)
    noise_db: float = 0.004  # rms of one reading, strong signal
    zero_noise_dbm: float = -80.0  # rms power noise of the zero: grows the scatter toward min_dbm
    cal_factor_db_per_ghz: float = 0.3  # reading error per GHz between its set frequency and the signal's
    reading_s: float = 0.002  # time one reading takes


@dataclass
class BenchConfig:
    source: SourceConfig = field(default_factory=SourceConfig)
    path: PathConfig = field(default_factory=PathConfig)
    detector: DetectorConfig = field(default_factory=DetectorConfig)
    meter: MeterConfig = field(default_factory=MeterConfig)
    adc: AdcConfig = field(default_factory=AdcConfig)
    chamber: ChamberConfig = field(default_factory=ChamberConfig)
    sensor: SensorConfig = field(default_factory=SensorConfig)
    temperature_c: float = 25.0  # the room, where the chamber's air and the DUT start
    seed: int = 1
    faults: list[dict] = field(default_factory=list)
    units: list[dict] = field(default_factory=list)  # [[unit]] tables: a detector per switch route (switch.py)

    @classmethod
    def from_dict(cls, data: dict) -> BenchConfig:
        """Build from a nested dict (a TOML file); unknown keys are errors."""
        config = cls()
        for section, values in data.items():
            if section in ("seed", "temperature_c"):
                setattr(config, section, type(getattr(config, section))(values))
                continue
            if section == "fault":
                config.faults = list(values)
                continue
            if section == "unit":
                config.units = [dict(v) for v in values]
                continue
            part = getattr(config, section, None)
            if part is None or not isinstance(values, dict) or section == "faults":
                raise ValueError(f"unknown simulator config section '{section}'")
            kinds = {f.name: f for f in fields(part)}
            for key, value in values.items():
                if key not in kinds:
                    raise ValueError(f"unknown simulator config key '{section}.{key}'")
                current = getattr(part, key)
                setattr(
                    part, key, tuple(float(v) for v in value) if isinstance(current, tuple) else type(current)(value)
                )
        return config


@dataclass
class _Segment:
    t0: float
    start_v: float
    target_v: float
    tau: float


class FirstOrderOutput:
    """A first-order approach to a target, with different rise and fall time constants.

    Kept as segments so a change scheduled slightly in the future (the source's own level
    settling) and an integrating reading across a change are both exact.
    """

    def __init__(self, value: float, t: float) -> None:
        self.segments = [_Segment(t, value, value, 1.0)]

    def _at(self, seg: _Segment, t: float) -> float:
        return seg.target_v + (seg.start_v - seg.target_v) * math.exp(-max(0.0, t - seg.t0) / seg.tau)

    def value(self, t: float) -> float:
        seg = self.segments[0]
        for s in self.segments:
            if s.t0 <= t:
                seg = s
        return self._at(seg, t)

    def mean(self, t_a: float, t_b: float) -> float:
        """Exact mean of the output over [t_a, t_b] (what an integrating meter sees)."""
        if t_b <= t_a:
            return self.value(t_a)
        total = 0.0
        for i, seg in enumerate(self.segments):
            end = self.segments[i + 1].t0 if i + 1 < len(self.segments) else math.inf
            lo, hi = max(t_a, seg.t0 if i else -math.inf), min(t_b, end)
            if hi <= lo:
                continue
            a, b = max(0.0, lo - seg.t0), max(0.0, hi - seg.t0)
            gap = seg.start_v - seg.target_v
            flat = max(0.0, min(hi, seg.t0) - lo)  # before the first segment's start
            total += seg.start_v * flat
            total += seg.target_v * (b - a) + gap * seg.tau * (math.exp(-a / seg.tau) - math.exp(-b / seg.tau))
        return total / (t_b - t_a)

    def retarget(self, target: float, t: float, tau_rise: float, tau_fall: float) -> None:
        """From time t on, approach `target` (t may lie slightly in the future)."""
        current = self.value(t)
        self.segments = [s for s in self.segments if s.t0 < t]
        tau = tau_rise if target >= current else tau_fall
        self.segments.append(_Segment(t, current, target, tau))
        while len(self.segments) > 2 and self.segments[1].t0 < t - 10.0:
            self.segments.pop(0)


class BenchModel:
    """The state of the simulated bench; thread-safe, shared by the instrument servers."""

    def __init__(self, config: BenchConfig | None = None, *, t: float = 0.0) -> None:
        self.config = config or BenchConfig()
        self.lock = threading.RLock()
        self.rng = random.Random(self.config.seed)
        self.frequency_hz = 100e6
        self.level_dbm = self.config.source.min_dbm
        self.output_on = False
        self.connected = True  # False while a switch has every route open: the meter sees no detector
        self.thermal = ThermalModel(self.config.chamber, self.config.temperature_c, self.config.seed)
        self.temperature_c = self.config.temperature_c  # the DUT's, as of the last source change
        share = self.config.detector.tail_share
        self.output = FirstOrderOutput(self.steady_output_v() * (1.0 - share), t)
        self.tail = FirstOrderOutput(self.steady_output_v() * share, t)  # zero unless tail_share is set
        self._input_dbm = self.dut_dbm()

    # -- truth --------------------------------------------------------------------------
    def source_error_db(self, frequency_hz: float, level_dbm: float | None = None) -> float:
        """Actual minus set level; the hidden error's level-dependent part needs the setting."""
        s = self.config.source
        hidden = s.hidden_error_db(frequency_hz, self.level_dbm if level_dbm is None else level_dbm)
        return s.level_offset_db + s.flatness_db_per_ghz * frequency_hz / GHZ + hidden

    def dut_dbm(
        self, frequency_hz: float | None = None, level_dbm: float | None = None, output_on: bool | None = None
    ) -> float:
        """True DUT-plane level for a source state (the current one by default)."""
        f = self.frequency_hz if frequency_hz is None else frequency_hz
        level = self.level_dbm if level_dbm is None else level_dbm
        on = self.output_on if output_on is None else output_on
        return level + self.source_error_db(f, level) - self.config.path.loss(f) if on else -math.inf

    def steady_output_v(self) -> float:
        if not self.connected:
            return 0.0
        return self.truth_v(self.dut_dbm(), self.frequency_hz)

    def truth_v(self, dut_dbm: float, frequency_hz: float) -> float:
        """Noiseless settled detector output for a true DUT-plane level: what tests compare to."""
        return self.config.detector.steady_v(dut_dbm, frequency_hz, self.temperature_c)

    # -- source side --------------------------------------------------------------------
    def set_source(
        self,
        t: float,
        *,
        frequency_hz: float | None = None,
        level_dbm: float | None = None,
        output_on: bool | None = None,
    ) -> None:
        with self.lock:
            if frequency_hz is not None:
                self.frequency_hz = frequency_hz
            if level_dbm is not None:
                self.level_dbm = level_dbm
            if output_on is not None:
                self.output_on = output_on
            det = self.config.detector
            self.temperature_c = self.thermal.dut_at(t)  # drifts slowly against a point's duration
            self._input_dbm = self.dut_dbm()
            target, at = self.steady_output_v(), t + self.config.source.level_settle_s
            self.output.retarget(target * (1.0 - det.tail_share), at, det.tau_rise_s, det.tau_fall_s)
            self.tail.retarget(target * det.tail_share, at, det.tau_tail_s, det.tau_tail_s)

    # -- meter side ---------------------------------------------------------------------
    def integration_s(self, nplc: float) -> float:
        """An integrating DMM's aperture: NPLC power-line cycles."""
        return nplc / self.config.meter.line_hz

    def reading(self, t_start: float, t_end: float) -> float:
        """Detector output integrated over [t_start, t_end]: the exact mean plus noise."""
        with self.lock:
            mean = self.output.mean(t_start, t_end) + self.tail.mean(t_start, t_end)
            window = max(t_end - t_start, 1e-5)
            sigma = self.config.detector.noise_v(self._input_dbm, window)
            return mean + self.rng.gauss(0.0, sigma)

    def meter_noise(self, nplc: float) -> float:
        with self.lock:
            return self.rng.gauss(0.0, self.config.meter.noise_v / math.sqrt(max(nplc, 1e-3)))
