"""Expand a validated plan into the ordered list of points the engine visits."""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

from nightbench.plan.path import source_for

if TYPE_CHECKING:
    from nightbench.plan.load import LoadedPlan


@dataclass(frozen=True)
class Point:
    index: int
    frequency_hz: float
    power_dbm: float  # at the DUT input
    source_dbm: float  # what the source is set to: DUT level plus path loss, on the grid below
    temperature_c: float | None = None  # the chamber setpoint (runs with a chamber), else None
    repeat: int = 0  # the pass over the levels (measure.repeats), 0 first
    direction: str | None = None  # 'up' or 'down' with measure.repeats > 1; None without repeats
    unit_id: str | None = None  # the unit (plan `units`, measure/units.py), else None


LEVEL_STEP_DB = 0.001  # the source level is commanded with three decimals


def source_level(power_dbm: float, loss_db: float) -> float:
    """DUT level plus loss, rounded DOWN to the commanded resolution: rounding to nearest could
    put up to half a step more than asked on the DUT, and above the ceiling at the top level."""
    steps = math.floor((power_dbm + loss_db) / LEVEL_STEP_DB + 1e-6)
    return round(steps * LEVEL_STEP_DB, 3)


LEVEL_AXIS = "power_dbm"


def expand(loaded: LoadedPlan) -> list[Point]:
    """Cartesian product of the axes, outermost first in the order the plan wrote them; with a
    chamber, temperature is outside them all (a transition takes tens of minutes), in written order.

    With `measure.repeats: N` > 1 the levels of each group (the points sharing the axes outside
    the level axis) are swept N times, pass 0 upward, pass 1 downward, and so on, the axes inside
    the level axis in planned order at each level. `index` is the position in this list, so it is
    a function of the plan alone: a resume finds the same points under the same indices.
    """
    order = loaded.order
    axes = [loaded.plan.sweep.axis_values(name) for name in order]
    temps: list[float | None] = list(loaded.plan.temperatures()) or [None]
    repeats = loaded.plan.measure.repeats
    combos: list[tuple[float | None, dict[str, float], int, str | None]] = []
    if repeats == 1:
        for temp, combo in itertools.product(temps, itertools.product(*axes)):
            combos.append((temp, dict(zip(order, combo)), 0, None))
    else:
        at = order.index(LEVEL_AXIS)
        outer, inner = order[:at], order[at + 1 :]
        levels = sorted(axes[at])
        for temp, head in itertools.product(temps, itertools.product(*axes[:at])):
            for repeat in range(repeats):
                up = repeat % 2 == 0
                for level in levels if up else levels[::-1]:
                    for tail in itertools.product(*axes[at + 1 :]):
                        values = {**dict(zip(outer, head)), LEVEL_AXIS: level, **dict(zip(inner, tail))}
                        combos.append((temp, values, repeat, "up" if up else "down"))
    points = []
    for index, (temp, values, repeat, direction) in enumerate(combos):
        f, p = values["frequency_hz"], values[LEVEL_AXIS]
        points.append(Point(index, f, p, source_level(p, source_for(loaded.path, f, p) - p), temp, repeat, direction))
    if loaded.plan.units:  # an axis inside temperature, outside the sweep's own axes
        from nightbench.measure.units import per_unit

        return per_unit(loaded, points)
    return points
