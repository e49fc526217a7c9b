"""Expand a validated plan into the ordered list of points the engine visits."""

from __future__ import annotations

import itertools
from dataclasses import dataclass

from runner.plan import Plan


@dataclass(frozen=True)
class Point:
    index: int
    frequency_hz: float
    power_dbm: float      # at the DUT input
    source_dbm: float     # what the source is set to: DUT level plus path loss


def expand(plan: Plan) -> list[Point]:
    """Cartesian product of the axes, outermost first in the order the plan wrote them."""
    order = plan.sweep.order
    axes = [plan.sweep.axis_values(name) for name in order]
    points = []
    for index, combo in enumerate(itertools.product(*axes)):
        values = dict(zip(order, combo))
        f, p = values["frequency_hz"], values["power_dbm"]
        points.append(Point(index, f, p, round(p + plan.path.loss(f), 6)))
    return points
