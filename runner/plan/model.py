"""Plan format v1 as pure data: the pydantic model of a plan's keys, each checked on its own.

Every key of docs/design.md's plan format is accepted as written; unknown keys are errors, because a
typo must not silently change a night's work. What needs more than one section or a file (the path's
loss model, the sweep's axis order, the cross-section checks) is worked out by plan/load.py, so this
module imports nothing of the plan package but what all models share (plan/base.py) and the
section models of calibration and units (plan/calspec.py, plan/units.py).
"""

from __future__ import annotations

import math
from datetime import date
from typing import Annotated, Literal

from pydantic import AfterValidator, Field, field_validator, model_validator

from nightbench.drivers.source import DEFAULT_MAX_DBM, DEFAULT_MIN_DBM
from nightbench.plan.base import Resource, Strict
from nightbench.plan.calspec import CalibrationSpec
from nightbench.plan.units import AcceptSpec, SwitchSpec, UnitSpec

MAX_POINTS = 200_000
Finite = Annotated[float, Field(allow_inf_nan=False)]
Positive = Annotated[float, Field(gt=0, allow_inf_nan=False)]
NonNegative = Annotated[float, Field(ge=0, allow_inf_nan=False)]


class Dut(Strict):
    id: str | None = None
    notes: str | None = None


class _Link(Strict):
    """How to reach an instrument: any VISA resource string, or serial:<port> for plain pyserial."""

    resource: Resource
    timeout_s: Positive = 2.0
    visa_library: str = "@py"  # another VISA library for sites that have one
    baud_rate: Annotated[int, Field(gt=0, le=10_000_000)] | None = None
    calibration_due: date | None = None  # refused past this date unless allow_overdue (plan/due.py)
    allow_overdue: bool = False  # run past calibration_due anyway; the run record notes it


def _source_commands(value: dict[str, str] | None) -> dict[str, str] | None:
    """Command overrides must name known operations and format with their fields."""
    from nightbench.drivers.dialect import SOURCE_COMMANDS, merged

    merged(SOURCE_COMMANDS, value)
    return value


def _chamber_commands(value: dict[str, str] | None) -> dict[str, str] | None:
    from nightbench.drivers.dialect import CHAMBER_COMMANDS, merged

    merged(CHAMBER_COMMANDS, value)
    return value


def _meter_commands(value: dict[str, str] | None) -> dict[str, str] | None:
    from nightbench.drivers.dialect import METER_COMMANDS, merged

    merged(METER_COMMANDS, value)
    return value


class SourceSpec(_Link):
    driver: Literal["scpi-source"]
    min_dbm: Finite = DEFAULT_MIN_DBM  # the source's own level limits (the driver's defaults); plans beyond
    max_dbm: Finite = DEFAULT_MAX_DBM  # them are refused
    preset: bool = False  # a preset (*RST) before each run's record (measure/record.py); RF stays off
    commands: Annotated[dict[str, str] | None, AfterValidator(_source_commands)] = None

    @model_validator(mode="after")
    def _limits(self) -> SourceSpec:
        if self.min_dbm >= self.max_dbm:
            raise ValueError("min_dbm must be below max_dbm")
        return self


class DmmSpec(_Link):
    driver: Literal["scpi-dmm"]
    nplc: Annotated[float, Field(gt=0, le=100, allow_inf_nan=False)] | None = None
    range_v: Positive | None = None
    commands: Annotated[dict[str, str] | None, AfterValidator(_meter_commands)] = None


def _regex(value: str) -> str:
    import re

    try:
        compiled = re.compile(value)
    except re.error as exc:
        raise ValueError(f"not a valid regular expression: {exc}") from None
    if compiled.groups > 1:
        raise ValueError("the pattern may have at most one group (the number)")
    return value


class AdcSpec(_Link):
    """A serial ADC board: volts = counts * scale + offset, counts pulled out by `pattern`."""

    driver: Literal["serial-adc"]
    query: Annotated[str, Field(min_length=1)]
    pattern: Annotated[str, AfterValidator(_regex)]
    scale: Annotated[float, Field(allow_inf_nan=False)]
    offset: Finite = 0.0
    identify: str | None = None  # a query whose reply names the board
    setup: list[str] = Field(default_factory=list)  # queries sent once after opening
    overload: str | None = None  # a reply containing this is an overrange reading

    @field_validator("scale")
    @classmethod
    def _nonzero(cls, value: float) -> float:
        if value == 0:
            raise ValueError("scale must not be zero")
        return value


MeterSpec = Annotated[DmmSpec | AdcSpec, Field(discriminator="driver")]


class ChamberSpec(_Link):
    """A temperature chamber (drivers/chamber.py). `min_c`/`max_c` are the chamber's limits, or
    the DUT's where tighter: setpoints beyond them are refused at plan time and by the driver."""

    driver: Literal["scpi-chamber"]
    min_c: Finite
    max_c: Finite
    commands: Annotated[dict[str, str] | None, AfterValidator(_chamber_commands)] = None

    @model_validator(mode="after")
    def _limits(self) -> ChamberSpec:
        if self.min_c >= self.max_c:
            raise ValueError("min_c must be below max_c")
        return self


class Instruments(Strict):
    source: SourceSpec
    meter: MeterSpec
    chamber: ChamberSpec | None = None
    switch: SwitchSpec | None = None  # several units, one route each (plan/units.py)


Extrapolate = Literal["none", "hold", "linear"]
PATH_FORMS = ("loss_db", "table", "touchstone", "coupler")


class CouplerSpec(Strict):
    """A directional coupler in the path, by its coupling factor; the DUT is on `arm`."""

    coupling_db: Positive
    arm: Literal["mainline", "coupled"]
    excess_loss_db: NonNegative = 0.0


class PathElementSpec(Strict):
    """One piece of the path, in exactly one form; plan/path.py works out its loss."""

    name: Annotated[str, Field(min_length=1, max_length=80)] | None = None
    loss_db: Finite | None = None
    table: Annotated[list[tuple[Positive, Finite]], Field(min_length=1)] | None = None
    touchstone: Annotated[str, Field(min_length=1)] | None = None  # relative to the plan file
    coupler: CouplerSpec | None = None
    extrapolate: Extrapolate = "none"  # beyond a table or file: refused unless hold or linear

    @model_validator(mode="after")
    def _one_form(self) -> PathElementSpec:
        forms = PATH_FORMS + tuple(k for k in ("elements", "calibration") if k in type(self).model_fields)
        given = [k for k in forms if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError(f"give exactly one of {', '.join(forms)}")
        if self.extrapolate != "none" and given[0] not in ("table", "touchstone"):
            raise ValueError("extrapolate applies to a table or a touchstone file only")
        return self


class PathSpec(PathElementSpec):
    """Loss from the source port to the DUT input (positive = loss); `elements` add in dB."""

    elements: Annotated[list[PathElementSpec], Field(min_length=1)] | None = None
    calibration: Annotated[str, Field(min_length=1)] | None = None  # a `calibrate` file (plan/calibration.py)


class Limits(Strict):
    dut_max_dbm: Finite
    accept: AcceptSpec | None = None  # acceptance limits and decision rule (analysis/accept.py)


class Span(Strict):
    start: Finite
    stop: Finite
    step: Finite | None = None
    points: Annotated[int, Field(ge=1, le=MAX_POINTS)] | None = None

    @model_validator(mode="after")
    def _one_of(self) -> Span:
        if (self.step is None) == (self.points is None):
            raise ValueError("give exactly one of step or points")
        if self.step is not None:
            if self.step == 0:
                raise ValueError("step must not be zero")
            if (self.stop - self.start) * self.step < 0:
                raise ValueError("step points away from stop")
            n = (self.stop - self.start) / self.step
            if n > MAX_POINTS:
                raise ValueError(f"{n:.0f} steps is more than the {MAX_POINTS} allowed")
            if abs(n - round(n)) > 1e-6:
                raise ValueError("stop is not start plus a whole number of steps (endpoints are inclusive)")
        if self.points == 1 and self.start != self.stop:
            raise ValueError("one point needs start equal to stop")
        return self

    def values(self) -> list[float]:
        if self.step is not None:
            n = round((self.stop - self.start) / self.step)
            return [round(self.start + i * self.step, 9) for i in range(n + 1)]
        assert self.points is not None
        if self.points == 1:
            return [self.start]
        width = (self.stop - self.start) / (self.points - 1)
        return [round(self.start + i * width, 9) for i in range(self.points)]


Axis = list[Finite] | Span
AXES = ("frequency_hz", "power_dbm")


class Sweep(Strict):
    """The axes. Their nesting order is the order of the keys in the file (outermost first): the
    loader reads it from the document (LoadedPlan.order), as a model field could be set by a key."""

    frequency_hz: Axis
    power_dbm: Axis
    # with a chamber: always the outermost axis, visited in the written order (measure/sweep.py)
    temperature_c: Annotated[list[Finite], Field(min_length=1)] | None = None

    @field_validator("frequency_hz")
    @classmethod
    def _positive_freq(cls, value: Axis) -> Axis:
        values = value.values() if isinstance(value, Span) else value
        if not values:
            raise ValueError("needs at least one frequency")
        if any(v <= 0 for v in values):
            raise ValueError("frequencies must be positive")
        return value

    @field_validator("power_dbm")
    @classmethod
    def _nonempty(cls, value: Axis) -> Axis:
        if isinstance(value, list) and not value:
            raise ValueError("needs at least one level")
        return value

    def axis_values(self, name: str) -> list[float]:
        axis = getattr(self, name)
        return axis.values() if isinstance(axis, Span) else list(axis)


class Settle(Strict):
    """How a point is judged settled (measure/settle.py; docs/settling.md)."""

    tolerance_v: Positive
    timeout_s: Positive
    min_wait_s: NonNegative = 0.0  # never accept sooner after a change (a DUT with a known dead time)
    max_tau_s: Positive | None = None  # slowest time constant allowed for before one is learned
    level_order: Literal["planned", "fast-edge"] = "planned"  # fast-edge: sweep levels toward the faster edge
    # the share of a step a slow tail may have until the readings bound it (measure/tail.py);
    # 0 for a part known to have none: large steps then settle as fast as their main response
    tail_share: Annotated[float, Field(ge=0, le=0.5, allow_inf_nan=False)] = 0.02

    @property
    def prior_tau_s(self) -> float:
        """max_tau_s, by default timeout_s / ln(100): an output any slower could not settle a step
        of 100 tolerances before the timeout, so such a plan would time out anyway."""
        return self.max_tau_s if self.max_tau_s is not None else self.timeout_s / math.log(100.0)


class Soak(Strict):
    """When a temperature counts as reached (measure/soak.py, docs/temperature.md)."""

    tolerance_c: Positive  # the chamber's reading within this of the setpoint,
    stable_s: Positive  # without a break for this long, before the first point at that temperature
    timeout_s: Positive  # not reached by then: the run fails (RF off, chamber to end_c)
    end_c: Finite  # where the chamber is left at the end and on every way out

    @model_validator(mode="after")
    def _fits(self) -> Soak:
        if self.stable_s >= self.timeout_s:
            raise ValueError("timeout_s must be longer than stable_s")
        return self


class Measure(Strict):
    samples: Annotated[int, Field(ge=1, le=10_000)] = 4
    repeats: Annotated[int, Field(ge=1, le=100)] = 1  # level passes per group, alternately up and down


class Mismatch(Strict):
    """Stated reflections of the source side and of the DUT input, each as |Gamma| or a return loss
    (dB): the budget's U-shaped mismatch term (analysis/gum.py, docs/uncertainty.md)."""

    source_gamma: Annotated[float, Field(ge=0, lt=1, allow_inf_nan=False)] | None = None
    source_return_loss_db: Positive | None = None
    dut_gamma: Annotated[float, Field(ge=0, lt=1, allow_inf_nan=False)] | None = None
    dut_return_loss_db: Positive | None = None

    @model_validator(mode="after")
    def _one_each(self) -> Mismatch:
        for side in ("source", "dut"):
            given = [k for k in (f"{side}_gamma", f"{side}_return_loss_db") if getattr(self, k) is not None]
            if len(given) != 1:
                raise ValueError(f"give exactly one of {side}_gamma or {side}_return_loss_db")
        return self


class Analysis(Strict):
    fit_dbm: tuple[Finite, Finite]
    error_limit_db: Positive = 1.0
    # the temperature whose fit line is the reference for error over temperature (Plan.reference_c)
    reference_c: Finite | None = None
    # the detector's law (analysis/laws.py): log (output linear in dBm), linear (in input volts),
    # square (in input mW); `report --law` may choose another
    law: Literal["log", "linear", "square"] = "log"
    # What the bench's data sheets promise, as half-widths of rectangular distributions (the
    # Type B inputs of JCGM 100:2008, 4.3.7). 0 = not stated: the term is shown as 0, not guessed.
    source_level_accuracy_db: NonNegative = 0.0  # absolute level accuracy of the source, +/- dB
    path_loss_accuracy_db: NonNegative = 0.0  # calibration of the path loss, +/- dB
    meter_gain_accuracy_pct: NonNegative = 0.0  # meter accuracy, +/- % of reading
    meter_offset_accuracy_v: NonNegative = 0.0  # meter offset (the "% of range" part), +/- V
    source_linearity_db: NonNegative = 0.0  # with a calibration: +/- dB per 10 dB beyond the calibrated levels
    mismatch: Mismatch | None = None  # stated reflections: the U-shaped mismatch term

    @field_validator("fit_dbm")
    @classmethod
    def _ordered(cls, value: tuple[float, float]) -> tuple[float, float]:
        if value[0] >= value[1]:
            raise ValueError("fit_dbm must be [low, high] with low < high")
        return value


class Plan(Strict):
    name: Annotated[str, Field(min_length=1, max_length=80, pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")]
    description: str | None = None
    dut: Dut = Dut()
    instruments: Instruments
    path: PathSpec
    limits: Limits
    sweep: Sweep
    settle: Settle
    soak: Soak | None = None
    measure: Measure = Measure()
    analysis: Analysis
    units: Annotated[list[UnitSpec[PathSpec]], Field(min_length=1)] | None = None  # an axis inside temperature
    calibration: CalibrationSpec | None = None  # what `nightbench calibrate` runs (plan/calspec.py)

    def temperatures(self) -> list[float]:
        """The chamber setpoints in visiting order; [] for a plan without a chamber."""
        return list(self.sweep.temperature_c or [])

    def reference_c(self) -> float | None:
        """analysis.reference_c, else 25 if swept, else the first temperature; None without any."""
        temps = self.temperatures()
        if not temps:
            return None
        if self.analysis.reference_c is not None:
            return self.analysis.reference_c
        return 25.0 if 25.0 in temps else temps[0]
