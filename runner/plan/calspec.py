"""The plan's `calibration` section: the power sensor and the levels `nightbench calibrate` visits.

Pure data like plan/model.py (which holds the one `calibration` field of Plan and imports this
module; this one imports nothing of the plan package but plan/base.py, so there is no cycle). The run and the
file it writes are measure/calibrate.py and plan/calibration.py; docs/calibration.md.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AfterValidator, Field, model_validator

from nightbench.plan.base import Resource, Strict


def _sensor_commands(value: dict[str, str] | None) -> dict[str, str] | None:
    from nightbench.drivers.dialect import merged
    from nightbench.drivers.sensor import SENSOR_COMMANDS

    merged(SENSOR_COMMANDS, value)
    return value


Finite = Annotated[float, Field(allow_inf_nan=False)]


class SensorSpec(Strict):
    """A SCPI power sensor (drivers/sensor.py), placed where the DUT goes."""

    driver: Literal["scpi-power-sensor"]
    resource: Resource
    timeout_s: Annotated[float, Field(gt=0, allow_inf_nan=False)] = 2.0
    visa_library: str = "@py"
    baud_rate: Annotated[int, Field(gt=0, le=10_000_000)] | None = None
    accuracy_db: Annotated[float, Field(ge=0, allow_inf_nan=False)]  # stated +/- half-width (rectangular)
    commands: Annotated[dict[str, str] | None, AfterValidator(_sensor_commands)] = None


class LevelSpan(Strict):
    """DUT-plane levels, start to stop in steps (endpoints inclusive)."""

    start: Finite
    stop: Finite
    step: Annotated[float, Field(gt=0, allow_inf_nan=False)]

    @model_validator(mode="after")
    def _span(self) -> LevelSpan:
        if self.stop <= self.start:
            raise ValueError("stop must be above start")
        n = (self.stop - self.start) / self.step
        if abs(n - round(n)) > 1e-6:
            raise ValueError("stop is not start plus a whole number of steps (endpoints are inclusive)")
        if round(n) + 1 < 3:
            raise ValueError("a calibration needs at least 3 levels (a line and its scatter)")
        if n > 1000:
            raise ValueError(f"{n:.0f} steps is more than the 1000 allowed")
        return self

    def values(self) -> list[float]:
        n = round((self.stop - self.start) / self.step)
        return [round(self.start + i * self.step, 9) for i in range(n + 1)]


class CalibrationSpec(Strict):
    sensor: SensorSpec
    levels_dbm: LevelSpan
    samples: Annotated[int, Field(ge=1, le=1000)] = 4  # sensor readings averaged per level
