"""A level calibration: the source at each plan frequency and calibration level, a power sensor
where the DUT goes, and the measured relation (source setting, DUT-plane level) as rows.

Safety is the engine's: the same ceiling rule (the DUT level a setting implies, through the
plan's path, never above limits.dut_max_dbm), RF off first when the source is opened, before
each frequency change and on every way out (completion, a fault, SIGINT/SIGTERM via StopFlag).
Levels are visited upward; each setting starts from the correction measured at the level below,
so a source that delivers more than it is told is found at the lowest level, far below the
ceiling, and never carried up to it. A level is set once more when it landed more than
LANDING_DB off its target, so the calibrated levels are the requested ones and a plan may sweep
up to the top one. The sensor's reading is a second, independent guard: a DUT-plane level above
the ceiling stops the calibration at once (SafetyError). There is no point-level recovery: a
fault ends the calibration with RF off and no file, and it is simply run again.
"""

from __future__ import annotations

import statistics
from collections.abc import Callable
from dataclasses import dataclass

from nightbench.drivers.errors import InstrumentError, NightbenchError, SafetyError
from nightbench.drivers.roles import SensorRole, SourceRole
from nightbench.measure.roles import open_sensor, open_source
from nightbench.measure.signals import StopFlag
from nightbench.measure.sweep import source_level
from nightbench.plan.load import LoadedPlan
from nightbench.plan.path import dut_for, source_for

CEILING_SLACK_DB = 1e-6  # as the engine's
LANDING_DB = 0.005  # a level landing further than this from its target is set once more
READING_SLACK_DB = 0.05  # the sensor's own noise: a reading this far above the ceiling is a breach

Row = tuple[float, float, float]  # frequency_hz, source_dbm, dut_dbm
Progress = Callable[[Row, int, int], None]


class CalibrationInterrupted(NightbenchError):
    """A signal stopped the calibration; RF is off and no file is written."""


@dataclass
class CalibrationResult:
    rows: list[Row]
    sensor_identity: str
    source_identity: str


class Calibrator:
    def __init__(self, loaded: LoadedPlan, stop: StopFlag, progress: Progress | None = None) -> None:
        assert loaded.plan.calibration is not None, "checked by the caller"
        self.loaded = loaded
        self.spec = loaded.plan.calibration
        self.ceiling = loaded.plan.limits.dut_max_dbm
        self.stop = stop
        self.progress = progress
        self.source: SourceRole | None = None
        self.sensor: SensorRole | None = None
        self.doing = "opening the source"

    def run(self) -> CalibrationResult:
        """Every plan frequency at every calibration level; RF off and both closed on every way out."""
        try:
            self._check_stop()
            self.source = open_source(self.loaded.plan.instruments.source)  # RF off first (configure)
            self.doing = "opening the sensor"
            self.sensor = open_sensor(self.spec.sensor)
            freqs = list(dict.fromkeys(self.loaded.plan.sweep.axis_values("frequency_hz")))
            levels = self.spec.levels_dbm.values()
            rows: list[Row] = []
            for f in freqs:
                rows += self._frequency(f, levels, len(rows), len(freqs) * len(levels))
            return CalibrationResult(rows, self.sensor.identity, self.source.identity)
        except InstrumentError as exc:
            exc.add_context(f"calibration failed while {self.doing}")
            raise
        finally:
            self._make_safe()

    def _check_stop(self) -> None:
        if self.stop.is_set():
            raise CalibrationInterrupted(f"calibration stopped by {self.stop.reason}; RF is off, no file written")

    def _check_ceiling(self, setting: float, frequency_hz: float, implied: float | None = None) -> None:
        """The engine's rule: the DUT level a setting implies (through the plan's path, or what the
        levels below measured) never above the ceiling."""
        dut = dut_for(self.loaded.path, frequency_hz, setting) if implied is None else implied
        if dut > self.ceiling + CEILING_SLACK_DB:
            raise SafetyError(
                f"refusing to set {setting:.3f} dBm at {frequency_hz:g} Hz: {dut:.2f} dBm at the DUT plane "
                f"exceeds limits.dut_max_dbm = {self.ceiling:g} dBm"
            )

    def _frequency(self, f: float, levels: list[float], done: int, total: int) -> list[Row]:
        assert self.source is not None and self.sensor is not None
        self.doing = f"setting {f / 1e6:g} MHz on the source and the sensor"
        self.source.rf_off()  # a frequency change with RF off: nothing to step through
        self.source.set(frequency_hz=f)
        self.sensor.set_frequency(f)
        rows: list[Row] = []
        correction: float | None = None  # measured source - dut at the level below
        for target in sorted(levels):
            if correction is None:
                setting = source_level(target, source_for(self.loaded.path, f, target) - target)
                self._check_ceiling(setting, f)
            else:
                setting = source_level(target, correction)
                self._check_ceiling(setting, f, implied=setting - correction)
            dut = self._level(f, setting)
            if abs(dut - target) > LANDING_DB:  # once more, from this level's own measurement
                again = source_level(target, setting - dut)
                self._check_ceiling(again, f, implied=dut + (again - setting))
                setting, dut = again, self._level(f, again)
            correction = setting - dut
            row = (f, setting, dut)
            rows.append(row)
            if self.progress:
                self.progress(row, done + len(rows), total)
        return rows

    def _level(self, f: float, setting: float) -> float:
        """Set the level (RF on), read the sensor `samples` times; the mean, in dBm."""
        assert self.source is not None and self.sensor is not None
        self._check_stop()
        self.doing = f"setting the source to {setting:.3f} dBm at {f / 1e6:g} MHz"
        self.source.set(level_dbm=setting)
        if not self.source.output_on:
            self.source.set(output=True)
        self.doing = f"reading the sensor at {f / 1e6:g} MHz with the source at {setting:.3f} dBm"
        readings = []
        for _ in range(self.spec.samples):
            readings.append(self.sensor.read_dbm())
            self._check_stop()
        dut = statistics.fmean(readings)
        if dut > self.ceiling + READING_SLACK_DB:
            raise SafetyError(
                f"the sensor reads {dut:.3f} dBm at {f:g} Hz with the source at {setting:.3f} dBm, above "
                f"limits.dut_max_dbm = {self.ceiling:g} dBm"
            )
        return dut

    def _make_safe(self) -> None:
        """RF off (a new link if the old one is in doubt), then both closed; a failure is raised."""
        source, sensor, self.source, self.sensor = self.source, self.sensor, None, None
        try:
            if source is not None:
                try:
                    source.flush()
                    source.rf_off()
                except InstrumentError as exc:
                    try:
                        source.reconnect(lambda: False)
                        source.configure()  # RF off first
                    except NightbenchError as again:
                        again.add_context(f"could not switch RF off after '{exc}'")
                        raise
        finally:
            for role in (source, sensor):
                if role is not None:
                    role.close()
