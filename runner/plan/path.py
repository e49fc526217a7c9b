"""The path from the source port to the DUT input: its loss (dB, positive = loss) at a frequency.

The number that matters is the level at the detector's input, so every source setting is the
DUT level plus this loss. The plan's `path` section (validated keys, plan/model.py) becomes one
of these models when the plan is loaded; the rest of the code only ever asks
`loaded.path.loss(frequency_hz)` (plan/load.py). Only the spec classes are needed from the model.

Tables and Touchstone data are interpolated linearly in dB against frequency and never
extrapolated unless the plan says how (`extrapolate: hold` or `linear`): a loss guessed outside
the measured band is a level error nobody sees. Elements of a chain add in dB (cable + pad +
coupler). Interpolation is a bisection over a sorted tuple, which keeps `check` from importing
numpy for a few dozen lookups.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

from nightbench.drivers.errors import InputError
from nightbench.plan.calibration import Calibration, parse_calibration
from nightbench.plan.files import PlanFiles, PlanProblem

if TYPE_CHECKING:
    from nightbench.plan.model import PathElementSpec, PathSpec

Key = tuple[Any, ...]
REL_SLACK = 1e-9  # a frequency this close to a table's end counts as on it (900e6 vs 9.0e8)


class PathModel(Protocol):
    def loss(self, frequency_hz: float) -> float: ...

    def parts(self, frequency_hz: float) -> list[tuple[str, float, bool]]:
        """(label, loss dB, extrapolated?) per element, for `check` to show."""
        ...

    def describe(self) -> list[str]: ...


def mainline_loss_db(coupling_db: float) -> float:
    """Through loss of an ideal directional coupler: 10 log10(1 / (1 - 10^(-C/10))).

    The coupled arm takes 10^(-C/10) of the power; the mainline keeps the rest (energy balance).
    """
    return -10.0 * math.log10(1.0 - 10.0 ** (-coupling_db / 10.0))


@dataclass(frozen=True)
class Constant:
    label: str
    loss_db: float
    text: str

    def loss(self, frequency_hz: float) -> float:
        return self.loss_db

    def parts(self, frequency_hz: float) -> list[tuple[str, float, bool]]:
        return [(self.label, self.loss_db, False)]

    def describe(self) -> list[str]:
        return [f"{self.label}: {self.text}"]


@dataclass(frozen=True)
class Interpolated:
    """Loss known at frequencies (strictly increasing), linear in dB between them."""

    label: str
    frequency_hz: tuple[float, ...]
    loss_db: tuple[float, ...]
    extrapolate: str
    key: Key
    text: str

    def _outside(self, f: float) -> bool:
        lo, hi = self.frequency_hz[0], self.frequency_hz[-1]
        return f < lo * (1 - REL_SLACK) or f > hi * (1 + REL_SLACK)

    def loss(self, frequency_hz: float) -> float:
        freqs, losses, f = self.frequency_hz, self.loss_db, frequency_hz
        if self._outside(f):
            if self.extrapolate == "none":
                raise PlanProblem(
                    f"{f:g} Hz lies outside {self.label} ({freqs[0]:g} to {freqs[-1]:g} Hz); extend the data "
                    "or allow it with extrapolate: hold (end value) or linear (end slope)",
                    self.key,
                )
            if self.extrapolate == "hold" or len(freqs) == 1:
                return losses[0] if f < freqs[0] else losses[-1]
            i = 1 if f < freqs[0] else len(freqs) - 1
        else:
            if len(freqs) == 1:
                return losses[0]
            f = min(max(f, freqs[0]), freqs[-1])
            i = min(max(bisect.bisect_left(freqs, f), 1), len(freqs) - 1)
        f0, f1, l0, l1 = freqs[i - 1], freqs[i], losses[i - 1], losses[i]
        return l0 + (l1 - l0) * (f - f0) / (f1 - f0)

    def parts(self, frequency_hz: float) -> list[tuple[str, float, bool]]:
        return [(self.label, self.loss(frequency_hz), self._outside(frequency_hz))]

    def describe(self) -> list[str]:
        span = f"{self.frequency_hz[0] / 1e6:g} to {self.frequency_hz[-1] / 1e6:g} MHz"
        more = "" if self.extrapolate == "none" else f", extrapolate: {self.extrapolate}"
        return [f"{self.label}: {self.text}, {len(self.frequency_hz)} frequencies, {span}{more}"]


@dataclass(frozen=True)
class Chain:
    """Elements in cascade: their losses (dB) add."""

    elements: tuple[PathModel, ...]

    def loss(self, frequency_hz: float) -> float:
        return sum(e.loss(frequency_hz) for e in self.elements)

    def parts(self, frequency_hz: float) -> list[tuple[str, float, bool]]:
        return [p for e in self.elements for p in e.parts(frequency_hz)]

    def describe(self) -> list[str]:
        return [line for e in self.elements for line in e.describe()]


@dataclass(frozen=True)
class Calibrated:
    """A measured level calibration (plan/calibration.py): the loss depends on the level too, so
    the source setting and the ceiling go through `source_for`/`dut_for` below; `loss(f)` is the
    correction at the highest calibrated level, for `check` to show."""

    calibration: Calibration
    key: Key

    def _problem(self, exc: ValueError) -> PlanProblem:
        return PlanProblem(f"{exc}; calibrate at this frequency too (nothing is extrapolated)", self.key)

    def correction(self, frequency_hz: float, dut_dbm: float) -> float:
        try:
            return self.calibration.correction(frequency_hz, dut_dbm)
        except ValueError as exc:
            raise self._problem(exc) from None

    def dut_for(self, frequency_hz: float, source_dbm: float) -> float:
        try:
            return self.calibration.dut_for(frequency_hz, source_dbm)
        except ValueError as exc:
            raise self._problem(exc) from None

    def loss(self, frequency_hz: float) -> float:
        try:
            top = self.calibration.highest_dbm(frequency_hz)
        except ValueError as exc:
            raise self._problem(exc) from None
        return self.correction(frequency_hz, top)

    def parts(self, frequency_hz: float) -> list[tuple[str, float, bool]]:
        return [("calibration", self.loss(frequency_hz), False)]

    def describe(self) -> list[str]:
        return self.calibration.describe()


def source_for(path: PathModel, frequency_hz: float, dut_dbm: float) -> float:
    """The source setting that puts `dut_dbm` at the DUT: through a calibration's measured
    relation where the path is one, else DUT level plus loss."""
    if isinstance(path, Calibrated):
        return dut_dbm + path.correction(frequency_hz, dut_dbm)
    return dut_dbm + path.loss(frequency_hz)


def dut_for(path: PathModel, frequency_hz: float, source_dbm: float) -> float:
    """The DUT level a source setting implies (what the ceiling is checked against): with a
    calibration, what the source was measured to deliver, not what it was told."""
    if isinstance(path, Calibrated):
        return path.dut_for(frequency_hz, source_dbm)
    return source_dbm - path.loss(frequency_hz)


def build_path(spec: PathSpec, files: PlanFiles) -> PathModel:
    """The model for a validated `path` section; PlanProblem/InputError for what keys cannot say."""
    if spec.calibration is not None:
        key = ("path", "calibration")
        text, name = files.read(spec.calibration, key)
        try:
            return Calibrated(parse_calibration(text, name), key)
        except InputError as exc:  # the file's own line, and the plan key that named the file
            exc.key = f"path.calibration ({exc.key})" if exc.key else "path.calibration"
            raise
    if spec.elements is not None:
        return Chain(
            tuple(_element(e, files, ("path", "elements", i), f"element {i + 1}") for i, e in enumerate(spec.elements))
        )
    return _element(spec, files, ("path",), "")


def _element(spec: PathElementSpec, files: PlanFiles, key: Key, default_label: str) -> PathModel:
    if spec.loss_db is not None:
        return Constant(spec.name or f"{default_label} loss_db".strip(), spec.loss_db, f"{spec.loss_db:g} dB")
    if spec.coupler is not None:
        c = spec.coupler
        arm_loss = c.coupling_db if c.arm == "coupled" else mainline_loss_db(c.coupling_db)
        loss = arm_loss + c.excess_loss_db
        extra = f" + {c.excess_loss_db:g} dB excess" if c.excess_loss_db else ""
        return Constant(
            spec.name or f"{default_label} coupler".strip(),
            loss,
            f"{c.coupling_db:g} dB coupler, {c.arm} arm{extra} = {loss:.4f} dB",
        )
    if spec.table is not None:
        freqs, losses = _sorted_table(spec.table, key + ("table",))
        return Interpolated(
            spec.name or f"{default_label} table".strip(), freqs, losses, spec.extrapolate, key + ("table",), "table"
        )
    assert spec.touchstone is not None
    from nightbench.plan.touchstone import parse_touchstone

    text, name = files.read(spec.touchstone, key + ("touchstone",))
    try:
        data = parse_touchstone(text, name)
        losses = tuple(data.loss_db())
    except InputError as exc:  # the file's own line, and the plan key that named the file
        exc.key = ".".join(map(str, key + ("touchstone",)))
        raise
    ref = "/".join(f"{r:g}" for r in dict.fromkeys(data.reference_ohm))
    return Interpolated(
        spec.name or spec.touchstone,
        data.frequency_hz,
        losses,
        spec.extrapolate,
        key + ("touchstone",),
        f"Touchstone {data.version}, |S21| at {ref} ohm",
    )


def _sorted_table(rows: list[tuple[float, float]], key: Key) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """Rows sorted by frequency; a repeated row is merged, a frequency with two losses refused."""
    order = sorted(range(len(rows)), key=lambda i: rows[i][0])
    freqs: list[float] = []
    losses: list[float] = []
    first: dict[float, int] = {}
    for i in order:
        f, loss = rows[i]
        if freqs and f == freqs[-1]:
            if loss != losses[-1]:
                j = first[f]
                raise PlanProblem(
                    f"{f:g} Hz appears twice with different losses ({losses[-1]:g} dB in row "
                    f"{j + 1}, {loss:g} dB in row {i + 1})",
                    key + (max(i, j),),
                )
            continue
        first[f] = i
        freqs.append(f)
        losses.append(loss)
    return tuple(freqs), tuple(losses)
