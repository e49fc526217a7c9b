"""Expand a validated plan into the ordered list of points the engine visits."""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from nightbench.plan.load import LoadedPlan


@dataclass(frozen=True)
class Point:
    index: int
    frequency_hz: float
    power_dbm: float  # at the DUT input
    source_dbm: float  # what the source is set to: DUT level plus path loss, on the grid below
    temperature_c: float | None = None  # the chamber setpoint (runs with a chamber), else None


LEVEL_STEP_DB = 0.001  # the source level is commanded with three decimals


def source_level(power_dbm: float, loss_db: float) -> float:
    """DUT level plus loss, rounded DOWN to the commanded resolution: rounding to nearest could
    put up to half a step more than asked on the DUT, and above the ceiling at the top level."""
    steps = math.floor((power_dbm + loss_db) / LEVEL_STEP_DB + 1e-6)
    return round(steps * LEVEL_STEP_DB, 3)


def expand(loaded: LoadedPlan) -> list[Point]:
    """Cartesian product of the axes, outermost first in the order the plan wrote them; with a
    chamber, temperature is outside them all (a transition takes tens of minutes), in written order."""
    order = loaded.order
    axes = [loaded.plan.sweep.axis_values(name) for name in order]
    temps: list[float | None] = list(loaded.plan.temperatures()) or [None]
    points = []
    for index, (temp, combo) in enumerate(itertools.product(temps, itertools.product(*axes))):
        values = dict(zip(order, combo))
        f, p = values["frequency_hz"], values["power_dbm"]
        points.append(Point(index, f, p, source_level(p, loaded.path.loss(f)), temp))
    return points
