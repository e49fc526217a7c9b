"""Conformity decisions per JCGM 106:2012 (the role of measurement uncertainty in conformity
assessment): a measured value against a tolerance interval [low, high] (null: an open side).

- simple acceptance (JCGM 106, 8.2): pass inside [low, high], fail outside;
- guarded acceptance (JCGM 106, 8.3.2): the acceptance zone is the tolerance interval shrunk by
  the expanded uncertainty U on each (closed) side: pass inside [low + U, high - U], fail outside
  [low, high], indeterminate in between (the guard band, where the value alone cannot show
  conformity). Where U is unknown the simple rule is used, and the quantity says so.

A unit's verdict is its worst quantity: fail over indeterminate over pass. A quantity with no
value (a group that could not be fitted, a range that never came within the limit) is
indeterminate: conformity is not shown.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Literal

Verdict = Literal["pass", "fail", "indeterminate"]
RANK: dict[str, int] = {"pass": 0, "indeterminate": 1, "fail": 2}
RULES = ("simple", "guarded")


def decide(
    value: float | None, u: float | None, low: float | None, high: float | None, rule: str
) -> tuple[Verdict, str]:
    """(verdict, rule used) for one value; the rule used is `simple` where `guarded` lacks U."""
    if rule not in RULES:
        raise ValueError(f"unknown decision rule {rule!r} (simple or guarded)")
    used = rule if rule == "simple" or (u is not None and math.isfinite(u)) else "simple (U unknown)"
    if value is None or not math.isfinite(value):
        return "indeterminate", used
    if (low is not None and value < low) or (high is not None and value > high):
        return "fail", used
    if used != "guarded":
        return "pass", used
    assert u is not None
    guard = abs(u)
    if (low is not None and value < low + guard) or (high is not None and value > high - guard):
        return "indeterminate", used
    return "pass", used


def worst(verdicts: Iterable[str | None]) -> str | None:
    """The worst of some verdicts (None where there are none)."""
    given = [v for v in verdicts if v is not None]
    return max(given, key=RANK.__getitem__) if given else None


def dynamic_range_u(low_u_db: float | None, high_u_db: float | None) -> float | None:
    """U of the dynamic range (high end minus low end) from the ends' U, taken as uncorrelated:
    the root sum of squares (JCGM 100:2008, 5.1.2 with both sensitivity coefficients of magnitude 1).
    None if either end has none (an end at the sweep's edge is not a crossing)."""
    if low_u_db is None or high_u_db is None:
        return None
    return math.hypot(low_u_db, high_u_db)
