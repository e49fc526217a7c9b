"""Two runs side by side (the same part twice, or two boards): B minus A per matching group.

The uncertainty of a difference combines both runs' expanded uncertainties as independent
(`*_diff_u_*`, right for two benches). On one bench with the same cables, the Type B terms are
shared and largely cancel in a difference, so the Type A part alone (`*_diff_u_type_a_*`) is the
fairer test of whether two boards differ; both are given, and the reader knows the bench.
Which fields get a difference, and its key, is declared once in store/fields.py (`Field.diff`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from nightbench.analysis.fit import GroupResult
from nightbench.analysis.report import Report
from nightbench.store.fields import FIELDS, Field

DIFFERENCES = tuple(f for f in FIELDS if f.diff)
WITH_U = tuple(f for f in DIFFERENCES if f.with_u)


def u_key(f: Field, type_a: bool = False) -> str:
    """slope_diff_mv_per_db -> slope_diff_u_mv_per_db, or slope_diff_u_type_a_mv_per_db."""
    assert f.diff is not None
    return f.diff.replace("_diff_", "_diff_u_type_a_" if type_a else "_diff_u_", 1)


def group_key(group: GroupResult) -> tuple[float, float | None]:
    return round(group.frequency_hz, 3), group.temperature_c


def _minus(b: float | None, a: float | None) -> float | None:
    return None if a is None or b is None else b - a


def _rss(*values: float | None) -> float | None:
    present = [v for v in values if v is not None]
    return None if len(present) < len(values) else math.sqrt(sum(v * v for v in present))


def type_a_expanded(group: GroupResult, u_field: str) -> float | None:
    """Expanded uncertainty from the included Type A term alone (u_field: slope_u_mv_per_db or intercept_u_db,
    the keys a budget's terms use too)."""
    if group.budget is None:
        return None
    u = group.budget.as_dict()
    a_terms = [t[u_field] for t in u["terms"] if t["type"] == "A" and t["included"]]
    return float(u["k"]) * math.sqrt(sum(x * x for x in a_terms))


@dataclass
class Difference:
    """B minus A for one group found in both runs, with the uncertainties of the differences."""

    a: GroupResult
    b: GroupResult
    values: dict[str, float | None]  # by JSON key: each declared difference, then its uncertainties

    @classmethod
    def of(cls, a: GroupResult, b: GroupResult) -> Difference:
        values: dict[str, float | None] = {
            f.diff: _minus(b.value(f.name), a.value(f.name)) for f in DIFFERENCES if f.diff
        }
        for f in WITH_U:
            assert f.with_u is not None
            values[u_key(f)] = _rss(a.value(f.with_u), b.value(f.with_u))
        for f in WITH_U:
            assert f.with_u is not None
            values[u_key(f, type_a=True)] = _rss(type_a_expanded(a, f.with_u), type_a_expanded(b, f.with_u))
        return cls(a, b, values)

    def to_json(self) -> dict[str, Any]:
        return {"frequency_hz": self.a.frequency_hz, "temperature_c": self.a.temperature_c, **self.values}


@dataclass
class Comparison:
    a: Report
    b: Report
    differences: list[Difference]
    only_in_a_hz: list[float]
    only_in_b_hz: list[float]

    def to_json(self) -> dict[str, Any]:
        """The `report A B --json` object: both reports, the differences B - A, groups found in one run only."""
        return {
            "run_ids": [self.a.run_id, self.b.run_id],
            "runs": [self.a.to_json(), self.b.to_json()],
            "differences": [d.to_json() for d in self.differences],
            "only_in_a_hz": self.only_in_a_hz,
            "only_in_b_hz": self.only_in_b_hz,
        }


def compare_reports(a: Report, b: Report) -> Comparison:
    in_b = {group_key(g): g for g in b.groups}
    rows, only_a = [], []
    for ga in a.groups:
        gb = in_b.pop(group_key(ga), None)
        if gb is None:
            only_a.append(ga.frequency_hz)
        else:
            rows.append(Difference.of(ga, gb))
    return Comparison(a, b, rows, only_a, [g.frequency_hz for g in in_b.values()])
