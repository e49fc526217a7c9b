"""A stored run's report, typed: its metadata, the analysis settings, and one result per group.

Building a report only reads (the run and its points); storing its fits is a separate, explicit
step (`save_fits`), taken when a run completes, so the commands that show a report never write.
`Report.to_json()` is the `report --json` contract (docs/design.md): `groups` holds exactly the
public fields (store/fields.py); what a reader needs besides (the uncertainty budget and what each
term is, every point's conformance error, the points left out and why) sits in `analysis` and
`details`. Rendering lives in output/.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from nightbench.analysis.fit import GroupResult, analyse_run
from nightbench.analysis.uncertainty import K_EXPANSION, TERMS, describe_terms
from nightbench.store.db import Store

ACCURACY_KEYS = tuple(plan_key for _, plan_key, _ in TERMS.values() if plan_key)
METHOD = (
    "JCGM 100:2008 (GUM): Type A from the fit and the reading scatter (the larger), Type B from "
    "the plan's analysis.*_accuracy_* half-widths as rectangular distributions (a/sqrt(3)), "
    "combined as a root sum of squares, expanded with k = 2"
)
RUN_KEYS = ("run_id", "name", "state", "dut_id", "started_at", "finished_at")  # the JSON's run metadata


def plan_accuracy(analysis: Mapping[str, Any]) -> dict[str, float]:
    """The plan's Type B half-widths; runs stored before these keys existed read as 0 (not stated)."""
    return {k: float(analysis.get(k) or 0.0) for k in ACCURACY_KEYS}


@dataclass(frozen=True)
class Settings:
    """The plan's `analysis` section as the report used it."""

    fit_dbm: tuple[float, float]
    error_limit_db: float
    accuracy: dict[str, float]
    k: float = K_EXPANSION

    @classmethod
    def from_plan(cls, analysis: Mapping[str, Any]) -> Settings:
        return cls(
            (float(analysis["fit_dbm"][0]), float(analysis["fit_dbm"][1])),
            float(analysis["error_limit_db"]),
            plan_accuracy(analysis),
        )

    def to_json(self) -> dict[str, Any]:
        return {
            "fit_dbm": list(self.fit_dbm),
            "error_limit_db": self.error_limit_db,
            "k": self.k,
            "method": METHOD,
            "uncertainty_terms": describe_terms(self.accuracy),
        }


@dataclass
class Report:
    run_id: int
    name: str
    state: str
    dut_id: str | None
    started_at: str | None
    finished_at: str | None
    settings: Settings
    groups: list[GroupResult]

    def to_json(self) -> dict[str, Any]:
        """The `report --json` object, exactly (a contract: docs/design.md)."""
        return {
            **{k: getattr(self, k) for k in RUN_KEYS},
            "groups": [g.public() for g in self.groups],
            "analysis": self.settings.to_json(),
            "details": [g.detail() for g in self.groups],
        }


def analyse(run: Mapping[str, Any], points: Sequence[Mapping[str, Any]]) -> Report:
    """The report of a run from its `runs` row (id, name, state, dut_id, times, plan_json) and
    its point rows; touches nothing else."""
    settings = Settings.from_plan(json.loads(run["plan_json"])["analysis"])
    groups = analyse_run(points, settings.fit_dbm, settings.error_limit_db, settings.accuracy)
    return Report(
        run_id=int(run["id"]),
        name=run["name"],
        state=run["state"],
        dut_id=run["dut_id"],
        started_at=run["started_at"],
        finished_at=run["finished_at"],
        settings=settings,
        groups=groups,
    )


def build_report(store: Store, run_id: int) -> Report:
    """Analyse a stored run. Reads only: a read-only store will do (Store.open_readonly)."""
    return analyse(dict(store.run(run_id)), [dict(r) for r in store.points(run_id)])


def save_fits(store: Store, report: Report) -> None:
    """Replace the run's rows in the fits table (what v_fits shows) with this report's groups."""
    store.replace_fits(report.run_id, [g.stored() for g in report.groups])
