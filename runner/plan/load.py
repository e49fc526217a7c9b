"""Loading a plan: text -> validated model -> what the rest of the code needs from it.

The model (plan/model.py) is pure data. What takes more than one key is worked out here, once,
and travels with the plan in a LoadedPlan: the path's loss model (it may need files the keys only
name), the order of the sweep's axes (the order of its keys in the document), and the checks
across sections. A plan that gets through parse_plan is one the engine can run.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from nightbench.drivers.errors import InputError
from nightbench.plan.checks import check_consistency
from nightbench.plan.files import PlanFiles, PlanProblem
from nightbench.plan.messages import from_problem, from_validation
from nightbench.plan.model import AXES, Plan
from nightbench.plan.path import PathModel, build_path
from nightbench.plan.unitchecks import check_unit_plan
from nightbench.plan.yamlfile import load_yaml_text, read_text


@dataclass(frozen=True)
class LoadedPlan:
    """A validated plan, what the loader worked out from it, and its snapshot.

    `path` is the loss model of the plan's `path` section (`.loss(f)` in dB, `.parts(f)`,
    `.describe()`); `order` names the sweep's axes outermost first. `text` and `files` (the
    referenced files' texts, keyed by the path written in the plan) are what a run stores, so a
    resume or a report never reads the disk again.
    """

    plan: Plan
    text: str
    file: str
    path: PathModel
    order: tuple[str, ...]
    files: dict[str, str] = field(default_factory=dict)
    unit_paths: dict[str, PathModel] = field(default_factory=dict)  # a unit's own path, by unit id (plan/units.py)


def axis_order(data: Mapping[str, Any]) -> tuple[str, ...]:
    """The sweep's axes in the order the document wrote them (YAML mappings keep key order)."""
    return tuple(k for k in data["sweep"] if k in AXES)


def parse_plan(
    text: str, file: str, *, base_dir: Path | None = None, files: Mapping[str, str] | None = None
) -> LoadedPlan:
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
        raise from_validation(exc, file, lines) from None
    refs = PlanFiles(base_dir or Path(file).parent, files)
    try:
        path = build_path(plan.path, refs)
    except PlanProblem as exc:
        raise from_problem(exc, file, lines) from None
    check_consistency(plan, path, file, lines)
    unit_paths = check_unit_plan(plan, path, refs, file, lines)
    return LoadedPlan(plan, text, file, path, axis_order(data), refs.texts, unit_paths)


def load_plan(path: str | Path) -> LoadedPlan:
    """A plan file for a new run (check, run, submit): parsed, and its instruments' calibration
    dates checked (plan/due.py; a stored snapshot is parsed without that check)."""
    from nightbench.plan.due import check_calibration_due

    p = Path(path)
    loaded = parse_plan(read_text(p), str(p))
    check_calibration_due(loaded)
    return loaded
