"""The order points are visited in: as planned, or with the level axis swept toward the fast edge.

Order does not change the physics of a point, only the time spent getting there: a step in the
direction of the faster edge (say, a fast rise and a slow fall) settles sooner, so sweeping the
levels upward costs one slow step per group (the return to the bottom) instead of one per point.
`settle.level_order: fast-edge` allows it; the default keeps the documented nesting order.

A group is every point sharing the axes outside the level axis (a frequency, when levels are
innermost); a block is every point sharing a level within a group (the inner axes, in planned
order). Within each group the next level is the nearest unvisited one in the current direction,
wrapping to the far end when none is left; the direction starts as planned and turns only when
the run has learned both edges and one is faster by `HYSTERESIS` (turning costs one long step).

With `measure.repeats` > 1 the direction of every pass is imposed by the plan (pass 0 up, pass 1
down, ...: measure/sweep.py), because the difference between the passes is what is measured
(hysteresis, and the scatter between sweeps); `fast-edge` then leaves the order as expanded. The
DUT ceiling and the frequency-change rule are the engine's and hold in either order.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator

from nightbench.measure.sweep import LEVEL_AXIS, Point

HYSTERESIS = 1.5

# learned time constants (level up, level down), None where not yet learned
Taus = Callable[[], tuple[float | None, float | None]]


def faster_direction(current: int, tau_up: float | None, tau_down: float | None) -> int:
    """+1 (upward) or -1: keep `current` unless both edges are known and one is clearly faster."""
    if tau_up is None or tau_down is None:
        return current
    if tau_up * HYSTERESIS < tau_down:
        return 1
    if tau_down * HYSTERESIS < tau_up:
        return -1
    return current


def next_level(levels: list[float], current: float | None, direction: int) -> float:
    """The nearest remaining level beyond `current` in `direction`, else the far end."""
    if direction > 0:
        ahead = [lv for lv in levels if current is None or lv > current]
        return min(ahead) if ahead else min(levels)
    ahead = [lv for lv in levels if current is None or lv < current]
    return max(ahead) if ahead else max(levels)


def visit_order(points: list[Point], order: tuple[str, ...], taus: Taus, *, fast_edge: bool) -> Iterable[Point]:
    """The points still to do, in the order the engine visits them: as expanded (planned, or the
    imposed up/down passes of repeats), or toward the fast edge where the plan allows it."""
    if fast_edge and not any(p.direction for p in points):
        return fast_edge_order(points, order, taus)
    return points


def fast_edge_order(points: list[Point], order: tuple[str, ...], taus: Taus) -> Iterator[Point]:
    """Yield `points` (planned order) group by group, each group's levels toward the fast edge.

    A generator: each choice is made after the previous point was measured, so what the run has
    just learned counts.
    """
    outer = order[: order.index(LEVEL_AXIS)]
    groups: dict[tuple[float | None, ...], dict[float, list[Point]]] = {}
    for p in points:
        key = (p.temperature_c, p.unit_id, *(getattr(p, axis) for axis in outer))  # temperature, unit: outermost
        groups.setdefault(key, {}).setdefault(p.power_dbm, []).append(p)
    planned = [p.power_dbm for p in points]
    direction = 1 if not planned or planned[-1] >= planned[0] else -1
    current: float | None = None
    for blocks in groups.values():
        while blocks:
            direction = faster_direction(direction, *taus())
            level = next_level(list(blocks), current, direction)
            yield from blocks.pop(level)
            current = level
