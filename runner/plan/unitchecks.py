"""Checks of a plan's units across sections, and each unit's own path built (plan/units.py).

A unit's `path` is any form of the plan's `path`, built by the same code (plan/path.py); its
problems are reported under `units.N.path`, and the source must reach every level at every
frequency through it, as checks.py requires of the plan's own path.
"""

from __future__ import annotations

from nightbench.drivers.errors import InputError
from nightbench.plan.files import PlanFiles, PlanProblem
from nightbench.plan.messages import at_key, from_problem
from nightbench.plan.model import MAX_POINTS, Plan
from nightbench.plan.path import PathModel, build_path, source_for
from nightbench.plan.units import check_units
from nightbench.plan.yamlfile import KeyPath


def check_unit_plan(
    plan: Plan, path: PathModel, refs: PlanFiles, file: str, lines: dict[KeyPath, int]
) -> dict[str, PathModel]:
    """Raise InputError (file, line, key) for the first problem; return each unit's own path by id."""

    def fail(message: str, *key: str | int) -> InputError:
        return at_key(message, key, file, lines)

    check_units(plan, fail)
    units = plan.units or []
    if not units:
        return {}
    freqs = plan.sweep.axis_values("frequency_hz")
    levels = plan.sweep.axis_values("power_dbm")
    count = len(freqs) * len(levels) * max(1, len(plan.temperatures())) * len(units) * plan.measure.repeats
    if count > MAX_POINTS:
        raise fail(f"the sweep over {len(units)} units has {count} points; at most {MAX_POINTS} are allowed", "units")
    src = plan.instruments.source
    built: dict[str, PathModel] = {}
    for i, unit in enumerate(units):
        if unit.path is None:
            continue
        prefix: KeyPath = ("units", i)
        try:
            model = build_path(unit.path, refs)
            for f in freqs:
                lo, hi = source_for(model, f, min(levels)), source_for(model, f, max(levels))
                if lo < src.min_dbm or hi > src.max_dbm:
                    raise fail(
                        f"unit {unit.id!r} at {f:g} Hz would need {lo:.2f} to {hi:.2f} dBm from the source, outside "
                        f"its limits [{src.min_dbm:g}, {src.max_dbm:g}] dBm",
                        "units",
                        i,
                        "path",
                    )
        except PlanProblem as exc:
            exc.key = prefix + tuple(exc.key)
            raise from_problem(exc, file, lines) from None
        except InputError as exc:
            if exc.key and not exc.key.startswith("units."):
                exc.key = f"units.{i}.{exc.key}"
            raise
        built[unit.id] = model
    return built
