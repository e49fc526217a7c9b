"""Problems with a plan as messages that point at the text: file, line and key path.

Pydantic reports problems by location inside the data; a person edits lines of a file. The YAML
loader's line map (plan/yamlfile.py) joins the two, so every refusal names where to look.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from pydantic import ValidationError

from nightbench.drivers.errors import InputError
from nightbench.plan.files import PlanProblem
from nightbench.plan.yamlfile import KeyPath

if TYPE_CHECKING:
    from pydantic_core import ErrorDetails

# a union (a list of values, or a {start, stop, step} span) reports each branch; a branch whose
# shape the input did not have only says "should be a list"
SHAPE_ERRORS = {"list_type", "model_type", "model_attributes_type", "dict_type", "tuple_type"}
MAX_ALSO = 5  # further problems listed after the first


def line_for(path: KeyPath, lines: dict[KeyPath, int]) -> int | None:
    """The line of `path`, else of its nearest enclosing key that has one."""
    for n in range(len(path), -1, -1):
        if path[:n] in lines:
            return lines[path[:n]]
    return None


def key_text(path: KeyPath) -> str:
    return ".".join(map(str, path))


def at_key(message: str, path: KeyPath, file: str, lines: dict[KeyPath, int]) -> InputError:
    return InputError(message, file=file, line=line_for(path, lines), key=key_text(path) or None)


def from_problem(problem: PlanProblem, file: str, lines: dict[KeyPath, int]) -> InputError:
    return at_key(str(problem), problem.key, file, lines)


def _key_path(loc: tuple[Any, ...]) -> KeyPath:
    """Drop pydantic's union-branch labels ('list[...]', 'Span', ...) from an error location."""
    return tuple(p for p in loc if isinstance(p, int) or (isinstance(p, str) and "[" not in p and p[:1].islower()))


def _friendly(err: ErrorDetails) -> str:
    kind, msg = err.get("type", ""), err.get("msg", "")
    if kind == "union_tag_invalid":
        given = err.get("input")
        driver = given.get("driver") if isinstance(given, dict) else None
        return f"unknown driver {driver!r} (expected {(err.get('ctx') or {}).get('expected_tags')})"
    if kind == "extra_forbidden":
        return "unknown key (check the spelling; unknown keys are refused)"
    if kind == "missing":
        return "required key is missing"
    if kind == "finite_number":
        return "must be a finite number (NaN and infinity are refused)"
    return msg.removeprefix("Value error, ")


def from_validation(exc: ValidationError, file: str, lines: dict[KeyPath, int]) -> InputError:
    """The first problem as the error (its line and key), up to MAX_ALSO more in the message."""
    located = [(_key_path(tuple(e["loc"])), e) for e in exc.errors()]
    # drop a shape complaint when another branch has something to say about the same key
    errors = [
        e
        for p, e in located
        if e.get("type") not in SHAPE_ERRORS
        or not any(q[: len(p)] == p and o.get("type") not in SHAPE_ERRORS for q, o in located if o is not e)
    ]
    # the same location may be reported once per union branch: keep the first of each
    seen: dict[KeyPath, str] = {}
    for err in errors:
        path = _key_path(tuple(err["loc"]))
        if err.get("type") in ("union_tag_invalid", "union_tag_not_found"):
            path += ("driver",)
        seen.setdefault(path, _friendly(err))
    (first_path, first_msg), *rest = seen.items()
    also = []
    for path, msg in rest[:MAX_ALSO]:
        line = line_for(path, lines)
        where = f"line {line}, " if line else ""
        also.append(f"\n  also {where}key '{key_text(path) or '(top)'}': {msg}")
    return at_key(first_msg + "".join(also), first_path, file, lines)
