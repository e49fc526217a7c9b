"""Several units in one night: the unit axis of the points, and the one way a route changes.

Units are an axis inside temperature and outside the sweep's own axes, so every unit shares a
chamber soak. Indexes are positions in the expanded list, a function of the plan alone, so a
resume finds each unit's points under the same indexes. The route changes only with RF off:
RF off, every route opened, the unit's route closed and read back (drivers/switch.py); a route
that does not read back closed stops the run (the engine's way out: RF off, chamber to end_c),
naming the unit and its channel. After the change the engine's usual rules hold: RF comes on at
the point's level, checked against the ceiling through the unit's own path.
"""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

from nightbench.drivers.errors import NightbenchError
from nightbench.measure.sweep import Point, source_level
from nightbench.plan.path import source_for

if TYPE_CHECKING:
    from nightbench.measure.roles import Bench
    from nightbench.plan.load import LoadedPlan
    from nightbench.plan.path import PathModel


def unit_path(loaded: LoadedPlan, unit_id: str | None) -> PathModel:
    """The path to a unit's input: its own where the plan gives one, else the plan's."""
    if unit_id is None:
        return loaded.path
    return loaded.unit_paths.get(unit_id, loaded.path)


def per_unit(loaded: LoadedPlan, points: list[Point]) -> list[Point]:
    """The points of a plan without units, once per unit inside each temperature, re-indexed;
    a unit with its own path gets its own source levels."""
    units = loaded.plan.units or []
    if not units:
        return points
    temps: dict[float | None, list[Point]] = {}
    for p in points:
        temps.setdefault(p.temperature_c, []).append(p)
    out: list[Point] = []
    for group in temps.values():
        for unit in units:
            own = loaded.unit_paths.get(unit.id)
            for p in group:
                src = (
                    p.source_dbm
                    if own is None
                    else source_level(p.power_dbm, source_for(own, p.frequency_hz, p.power_dbm) - p.power_dbm)
                )
                out.append(replace(p, index=len(out), source_dbm=src, unit_id=unit.id))
    return out


def route_to(bench: Bench | None, loaded: LoadedPlan, unit_id: str) -> str:
    """RF off, then the unit's route alone closed and read back; returns the unit id. A fault is
    an InstrumentError naming the unit and channel (the engine stops the run safely)."""
    unit = next(u for u in loaded.plan.units or [] if u.id == unit_id)
    assert bench is not None and bench.switch is not None
    bench.source.rf_off()  # the route never moves with RF on
    try:
        bench.switch.select(unit.channel)
    except NightbenchError as exc:
        exc.add_context(f"unit {unit.id} (switch channel {unit.channel})")
        raise
    return unit.id
