"""Two runs side by side (the same part twice, or two boards): B minus A per matching group.

The uncertainty of a difference is tested against what actually differs between the runs
(`*_diff_u_unshared_*`): a Type B term both runs share (the same basis: source, meter, path or
calibration file, and the same stated value; analysis/stated.py) is fully correlated between them,
so it enters as the difference of its two contributions (GUM 5.2.2 with r = 1), nearly nothing;
everything else (both runs' Type A, unshared Type B) enters from both, and k follows from the
Welch-Satterthwaite degrees of freedom. Also given: both runs' U as independent (`*_diff_u_*`,
two benches with nothing in common) and the Type A part alone (`*_diff_u_type_a_*`).
Which fields get a difference, and its key, is declared once in store/fields.py (`Field.diff`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from nightbench.analysis.fit import GroupResult
from nightbench.analysis.gum import coverage_factor, welch_satterthwaite
from nightbench.analysis.report import Report
from nightbench.store.fields import FIELDS, Field

DIFFERENCES = tuple(f for f in FIELDS if f.diff)
WITH_U = tuple(f for f in DIFFERENCES if f.with_u)


def u_key(f: Field, type_a: bool = False, kind: str = "") -> str:
    """slope_diff_mv_per_db -> slope_diff_u_mv_per_db, slope_diff_u_type_a_mv_per_db (type_a) or
    slope_diff_u_unshared_mv_per_db (kind='unshared')."""
    assert f.diff is not None
    kind = "type_a" if type_a else kind
    return f.diff.replace("_diff_", f"_diff_u_{kind}_" if kind else "_diff_u_", 1)


def group_key(group: GroupResult) -> tuple[float, float | None, str | None]:
    """What pairs a group of A with one of B: frequency, temperature and unit (each unit is its own part)."""
    return round(group.frequency_hz, 3), group.temperature_c, group.unit_id


def _minus(b: float | None, a: float | None) -> float | None:
    return None if a is None or b is None else b - a


def _rss(*values: float | None) -> float | None:
    present = [v for v in values if v is not None]
    return None if len(present) < len(values) else math.sqrt(sum(v * v for v in present))


def type_a_expanded(group: GroupResult, u_field: str) -> float | None:
    """Expanded uncertainty from the included Type A term alone (u_field: slope_u_mv_per_db or intercept_u_db,
    the keys a budget's terms use too), with the k of its degrees of freedom."""
    if group.budget is None:
        return None
    a_terms = [t for t in group.budget.terms if t.type == "A" and t.included]
    contributions = [t.slope_mv_per_db if u_field.startswith("slope") else t.intercept_db for t in a_terms]
    k = coverage_factor(welch_satterthwaite(contributions, [t.dof for t in a_terms]))
    return k * math.sqrt(sum(x * x for x in contributions))


def unshared_expanded(a: GroupResult, b: GroupResult, u_field: str) -> tuple[float | None, list[str]]:
    """U of B - A from what differs between the runs, and the keys of the terms that cancelled."""
    if a.budget is None or b.budget is None:
        return None, []
    slope = u_field.startswith("slope")
    in_b = {t.key: t for t in b.budget.terms if t.included}
    contributions, dofs, shared = [], [], []
    for ta in (t for t in a.budget.terms if t.included):
        tb = in_b.pop(ta.key, None)
        ua = ta.slope_mv_per_db if slope else ta.intercept_db
        if tb is not None and ta.basis is not None and ta.basis == tb.basis:
            ub = tb.slope_mv_per_db if slope else tb.intercept_db
            contributions.append(abs(ua - ub))  # fully correlated: c_A u - c_B u
            dofs.append(min(ta.dof, tb.dof))
            shared.append(ta.key)
            continue
        contributions.append(ua)
        dofs.append(ta.dof)
        if tb is not None:
            in_b[ta.key] = tb
    for tb in in_b.values():
        contributions.append(tb.slope_mv_per_db if slope else tb.intercept_db)
        dofs.append(tb.dof)
    k = coverage_factor(welch_satterthwaite(contributions, dofs))
    return k * math.sqrt(sum(x * x for x in contributions)), shared


@dataclass
class Difference:
    """B minus A for one group found in both runs, with the uncertainties of the differences."""

    a: GroupResult
    b: GroupResult
    values: dict[str, float | None]  # by JSON key: each declared difference, then its uncertainties
    shared_terms: list[str]  # the Type B terms both runs share, cancelled in `*_diff_u_unshared_*`

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
        shared: list[str] = []
        for f in WITH_U:
            assert f.with_u is not None
            values[u_key(f, kind="unshared")], cancelled = unshared_expanded(a, b, f.with_u)
            shared += [k for k in cancelled if k not in shared]
        return cls(a, b, values, shared)

    def to_json(self) -> dict[str, Any]:
        unit = {} if self.a.unit_id is None else {"unit_id": self.a.unit_id}
        return {
            **unit,
            "frequency_hz": self.a.frequency_hz,
            "temperature_c": self.a.temperature_c,
            **self.values,
            "shared_terms": self.shared_terms,
        }


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
