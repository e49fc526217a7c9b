"""Calibration-due dates: an instrument past its `calibration_due` is refused before a run starts.

Not part of parsing: whether a date has passed depends on the day, and a stored run's snapshot must
stay readable (a report, a resume) after its instruments' dates pass. `load_plan` (check, run,
submit) and `serve` starting a job call `check_calibration_due`; `allow_overdue: true` on the
instrument lets the run go ahead, and the run record (measure/record.py) notes it.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date
from typing import TYPE_CHECKING

from nightbench.plan.messages import at_key
from nightbench.plan.yamlfile import load_yaml_text

if TYPE_CHECKING:
    from nightbench.plan.load import LoadedPlan
    from nightbench.plan.model import Plan


@dataclass(frozen=True)
class Overdue:
    role: str
    due: date
    allowed: bool

    def note(self, today: date) -> str:
        days = (today - self.due).days
        allowed = "; run anyway (allow_overdue: true)" if self.allowed else ""
        return f"calibration was due on {self.due.isoformat()}, {days} day{'s' * (days != 1)} ago{allowed}"


def overdue(plan: Plan, today: date | None = None) -> list[Overdue]:
    """The instruments whose calibration_due is before `today` (default: the local date)."""
    today = today or date.today()
    found = []
    for role in type(plan.instruments).model_fields:  # every instrument the plan can name
        spec = getattr(plan.instruments, role)
        due = getattr(spec, "calibration_due", None)
        if due is not None and due < today:
            found.append(Overdue(role, due, bool(getattr(spec, "allow_overdue", False))))
    return found


def check_calibration_due(loaded: LoadedPlan, today: date | None = None) -> None:
    """InputError (file, line, key) for the first instrument past its date without allow_overdue."""
    today = today or date.today()
    refused = [o for o in overdue(loaded.plan, today) if not o.allowed]
    if not refused:
        return
    first = refused[0]
    _, lines = load_yaml_text(loaded.text, loaded.file)
    raise at_key(
        f"the {first.role}'s {first.note(today)}; refusing to use it. Have it calibrated and correct the date, "
        "or set allow_overdue: true on that instrument to run anyway",
        ("instruments", first.role, "calibration_due"),
        loaded.file,
        lines,
    )
