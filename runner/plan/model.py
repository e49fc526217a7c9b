"""Plan format v1: the validated model, loading from a file, and messages that point at the text.

Every key of DESIGN.md's plan format is accepted as written; unknown keys are errors, because a
typo must not silently change a night's work. Numbers may be written `70e6` (see yamlfile).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationError,
    field_validator,
    model_validator,
)

from nightbench.drivers.errors import InputError
from nightbench.plan.files import PlanFiles, PlanProblem
from nightbench.plan.path import build_path
from nightbench.plan.yamlfile import KeyPath, load_yaml_text, read_text

MAX_POINTS = 200_000
Finite = Annotated[float, Field(allow_inf_nan=False)]
Positive = Annotated[float, Field(gt=0, allow_inf_nan=False)]
NonNegative = Annotated[float, Field(ge=0, allow_inf_nan=False)]


def _valid_resource(value: str) -> str:
    """Resource strings are checked at plan time, without opening anything."""
    from nightbench.drivers.transport import check_resource

    problem = check_resource(value)
    if problem:
        raise ValueError(problem)
    return value.strip()


Resource = Annotated[str, AfterValidator(_valid_resource)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True)


class Dut(_Strict):
    id: str | None = None
    notes: str | None = None


class _Link(_Strict):
    """How to reach an instrument: any VISA resource string, or serial:<port> for plain pyserial."""

    resource: Resource
    timeout_s: Positive = 2.0
    visa_library: str = "@py"          # another VISA library for sites that have one
    baud_rate: Annotated[int, Field(gt=0, le=10_000_000)] | None = None


def _source_commands(value: dict[str, str] | None) -> dict[str, str] | None:
    """Command overrides must name known operations and format with their fields."""
    from nightbench.drivers.dialect import SOURCE_COMMANDS, merged

    merged(SOURCE_COMMANDS, value)
    return value


def _meter_commands(value: dict[str, str] | None) -> dict[str, str] | None:
    from nightbench.drivers.dialect import METER_COMMANDS, merged

    merged(METER_COMMANDS, value)
    return value


class SourceSpec(_Link):
    driver: Literal["scpi-source"]
    min_dbm: Finite = -130.0          # the source's own level limits; plans beyond them are refused
    max_dbm: Finite = 20.0
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
    identify: str | None = None        # a query whose reply names the board
    setup: list[str] = []              # queries sent once after opening
    overload: str | None = None        # a reply containing this is an overrange reading

    @field_validator("scale")
    @classmethod
    def _nonzero(cls, value: float) -> float:
        if value == 0:
            raise ValueError("scale must not be zero")
        return value


MeterSpec = Annotated[DmmSpec | AdcSpec, Field(discriminator="driver")]


class Instruments(_Strict):
    source: SourceSpec
    meter: MeterSpec


Extrapolate = Literal["none", "hold", "linear"]
PATH_FORMS = ("loss_db", "table", "touchstone", "coupler")


class CouplerSpec(_Strict):
    """A directional coupler in the path, by its coupling factor; the DUT is on `arm`."""

    coupling_db: Positive
    arm: Literal["mainline", "coupled"]
    excess_loss_db: NonNegative = 0.0


class PathElementSpec(_Strict):
    """One piece of the path, in exactly one form; runner/path.py works out its loss."""

    name: Annotated[str, Field(min_length=1, max_length=80)] | None = None
    loss_db: Finite | None = None
    table: Annotated[list[tuple[Positive, Finite]], Field(min_length=1)] | None = None
    touchstone: Annotated[str, Field(min_length=1)] | None = None   # relative to the plan file
    coupler: CouplerSpec | None = None
    extrapolate: Extrapolate = "none"   # beyond a table or file: refused unless hold or linear

    @model_validator(mode="after")
    def _one_form(self) -> PathElementSpec:
        forms = PATH_FORMS + (("elements",) if "elements" in type(self).model_fields else ())
        given = [k for k in forms if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError(f"give exactly one of {', '.join(forms)}")
        if self.extrapolate != "none" and given[0] not in ("table", "touchstone"):
            raise ValueError("extrapolate applies to a table or a touchstone file only")
        return self


class PathSpec(PathElementSpec):
    """Loss from the source port to the DUT input (positive = loss); `elements` add in dB."""

    elements: Annotated[list[PathElementSpec], Field(min_length=1)] | None = None
    _model: Any = PrivateAttr(None)

    def attach(self, model: Any) -> None:
        """Set the loss model built by nightbench.plan.path (it may need files the keys only name)."""
        self._model = model

    def loss_model(self) -> Any:
        if self._model is None:
            self._model = build_path(self, PlanFiles(None, {}, "a plan not loaded from a file"))
        return self._model

    def loss(self, frequency_hz: float) -> float:
        """Loss at a frequency (dB); PlanProblem for a frequency the data does not cover."""
        return float(self.loss_model().loss(frequency_hz))


class Limits(_Strict):
    dut_max_dbm: Finite


class Span(_Strict):
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


class Sweep(_Strict):
    """Axes, outermost first: the order of the keys in the file is the nesting order."""

    frequency_hz: Axis
    power_dbm: Axis
    order: tuple[str, ...] = AXES

    @model_validator(mode="before")
    @classmethod
    def _record_order(cls, data: Any) -> Any:
        if isinstance(data, dict):
            data = dict(data)
            data["order"] = tuple(k for k in data if k in AXES)
        return data

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


class Settle(_Strict):
    """How a point is judged settled (runner/settle.py; docs/settling.md)."""

    tolerance_v: Positive
    timeout_s: Positive
    min_wait_s: NonNegative = 0.0     # never accept sooner after a change (a DUT with a known dead time)
    max_tau_s: Positive | None = None  # slowest time constant allowed for before one is learned
    level_order: Literal["planned", "fast-edge"] = "planned"   # fast-edge: sweep levels toward the faster edge

    @property
    def prior_tau_s(self) -> float:
        """max_tau_s, by default timeout_s / ln(100): an output any slower could not settle a step
        of 100 tolerances before the timeout, so such a plan would time out anyway."""
        return self.max_tau_s if self.max_tau_s is not None else self.timeout_s / math.log(100.0)


class Measure(_Strict):
    samples: Annotated[int, Field(ge=1, le=10_000)] = 4


class Analysis(_Strict):
    fit_dbm: tuple[Finite, Finite]
    error_limit_db: Positive = 1.0
    # What the bench's data sheets promise, as half-widths of rectangular distributions (the
    # Type B inputs of JCGM 100:2008, 4.3.7). 0 = not stated: the term is shown as 0, not guessed.
    source_level_accuracy_db: NonNegative = 0.0   # absolute level accuracy of the source, +/- dB
    path_loss_accuracy_db: NonNegative = 0.0      # calibration of the path loss, +/- dB
    meter_gain_accuracy_pct: NonNegative = 0.0    # meter accuracy, +/- % of reading
    meter_offset_accuracy_v: NonNegative = 0.0    # meter offset (the "% of range" part), +/- V

    @field_validator("fit_dbm")
    @classmethod
    def _ordered(cls, value: tuple[float, float]) -> tuple[float, float]:
        if value[0] >= value[1]:
            raise ValueError("fit_dbm must be [low, high] with low < high")
        return value


class Plan(_Strict):
    name: Annotated[str, Field(min_length=1, max_length=80, pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")]
    description: str | None = None
    dut: Dut = Dut()
    instruments: Instruments
    path: PathSpec
    limits: Limits
    sweep: Sweep
    settle: Settle
    measure: Measure = Measure()
    analysis: Analysis


class LoadedPlan:
    """A validated plan with its source text and the texts of the files it refers to, keyed by
    the path written in the plan: together, the snapshot stored with a run."""

    def __init__(self, plan: Plan, text: str, file: str, files: dict[str, str] | None = None) -> None:
        self.plan = plan
        self.text = text
        self.file = file
        self.files = files or {}


def _key_path(loc: tuple[Any, ...]) -> tuple[Any, ...]:
    """Drop pydantic's union-branch labels ('list[...]', 'Span', ...) from an error location."""
    return tuple(p for p in loc if isinstance(p, int) or (isinstance(p, str) and "[" not in p and p[:1].islower()))


def _line_for(path: tuple[Any, ...], lines: dict[KeyPath, int]) -> int | None:
    for n in range(len(path), -1, -1):
        if path[:n] in lines:
            return lines[path[:n]]
    return None


def _friendly(err: dict[str, Any]) -> str:
    kind, msg = err.get("type", ""), err.get("msg", "")
    if kind == "union_tag_invalid":
        return f"unknown driver {err.get('input', {}).get('driver')!r} (expected {err['ctx']['expected_tags']})"
    if kind == "extra_forbidden":
        return "unknown key (check the spelling; unknown keys are refused)"
    if kind == "missing":
        return "required key is missing"
    if kind in ("finite_number",):
        return "must be a finite number (NaN and infinity are refused)"
    return msg.removeprefix("Value error, ")


def parse_plan(text: str, file: str, *, base_dir: Path | None = None,
               files: Mapping[str, str] | None = None) -> LoadedPlan:
    """Validate plan text; raise InputError naming file, line and key path of the first problem.

    Referenced files are read relative to `base_dir` (default: the plan file's folder), or, when
    `files` is given (a run's snapshot), from those texts only.
    """
    data, lines = load_yaml_text(text, file)
    if not isinstance(data, dict):
        raise InputError("a plan is a mapping of keys (name, instruments, sweep, ...)", file=file, line=1)
    try:
        plan = Plan.model_validate(data)
    except ValidationError as exc:
        errors = exc.errors()
        # A union (a list of values, or a {start, stop, step} span) reports each branch; the
        # branch whose shape the input did not have only says "should be a list": drop those
        # when the other branch has something to say about the same key.
        shape = {"list_type", "model_type", "model_attributes_type", "dict_type", "tuple_type"}
        located = [(_key_path(tuple(e["loc"])), e) for e in errors]
        errors = [e for p, e in located
                  if e.get("type") not in shape
                  or not any(q[:len(p)] == p and o.get("type") not in shape for q, o in located if o is not e)]
        problems = []
        for err in errors:
            path = _key_path(tuple(err["loc"]))
            if err.get("type") in ("union_tag_invalid", "union_tag_not_found"):
                path += ("driver",)
            problems.append((path, _friendly(err)))
        # the same location may be reported once per union branch: keep the first of each
        seen: dict[tuple[Any, ...], str] = {}
        for path, message in problems:
            seen.setdefault(path, message)
        first_path, first_msg = next(iter(seen.items()))
        also = []
        for path, msg in list(seen.items())[1:6]:
            line = _line_for(path, lines)
            where = f"line {line}, " if line else ""
            also.append(f"\n  also {where}key '{'.'.join(map(str, path)) or '(top)'}': {msg}")
        raise InputError(first_msg + "".join(also), file=file, line=_line_for(first_path, lines),
                         key=".".join(map(str, first_path)) or None) from None
    refs = PlanFiles(base_dir or Path(file).parent, files)
    try:
        plan.path.attach(build_path(plan.path, refs))
    except PlanProblem as exc:
        _raise_at(exc, file, lines)
    check_consistency(plan, file, lines)
    return LoadedPlan(plan, text, file, refs.texts)


def _raise_at(problem: PlanProblem, file: str, lines: dict[KeyPath, int]) -> None:
    raise InputError(str(problem), file=file, line=_line_for(problem.key, lines),
                     key=".".join(map(str, problem.key))) from None


def check_consistency(plan: Plan, file: str, lines: dict[KeyPath, int]) -> None:
    """Checks across sections: point count, the DUT ceiling, path coverage, source limits."""
    def fail(message: str, *key: Any) -> None:
        raise InputError(message, file=file, line=_line_for(tuple(key), lines), key=".".join(map(str, key)))

    freqs = plan.sweep.axis_values("frequency_hz")
    levels = plan.sweep.axis_values("power_dbm")
    if len(freqs) * len(levels) > MAX_POINTS:
        fail(f"the sweep has {len(freqs) * len(levels)} points; at most {MAX_POINTS} are allowed", "sweep")
    ceiling = plan.limits.dut_max_dbm
    top = max(levels)
    if top > ceiling:
        fail(f"level {top:g} dBm exceeds the DUT ceiling limits.dut_max_dbm = {ceiling:g} dBm",
             "sweep", "power_dbm")
    src = plan.instruments.source
    for f in freqs:
        try:
            loss = plan.path.loss(f)
        except PlanProblem as exc:
            _raise_at(exc, file, lines)
        lo, hi = min(levels) + loss, top + loss
        if lo < src.min_dbm or hi > src.max_dbm:
            fail(f"at {f:g} Hz the source would need {lo:.2f} to {hi:.2f} dBm, outside its limits "
                 f"[{src.min_dbm:g}, {src.max_dbm:g}] dBm", "sweep", "power_dbm")


def load_plan(path: str | Path) -> LoadedPlan:
    p = Path(path)
    return parse_plan(read_text(p), str(p))
