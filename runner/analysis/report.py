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
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

from nightbench.analysis.fit import GroupResult, analyse_run
from nightbench.analysis.gum import COVERAGE
from nightbench.analysis.laws import LAWS, conformance_db, get_law
from nightbench.analysis.setup import run_setup
from nightbench.analysis.stated import Stated, plan_accuracy
from nightbench.analysis.uncertainty import describe_terms
from nightbench.drivers.errors import InputError
from nightbench.store.db import Store

METHOD = (
    "JCGM 100:2008 (GUM): Type A from the scatter of the readings and of repeated sweeps (the larger), "
    "Type B from what the plan states (rectangular a/sqrt(3); mismatch U-shaped a/sqrt(2); a calibration's "
    "sensor and scatter in place of the source level), combined as a root sum of squares; k from the t "
    "distribution at the Welch-Satterthwaite effective degrees of freedom for 95.45 % (per group: slope_k, "
    "intercept_k); the lack of fit is reported apart (details[].uncertainty.lack_of_fit), not as an uncertainty"
)
RUN_KEYS = ("run_id", "name", "state", "dut_id", "started_at", "finished_at")  # the JSON's run metadata


@dataclass(frozen=True)
class Settings:
    """What the analysis used: the plan's `analysis` section, or the run's latest saved analysis,
    or the options `report` was given (`source` says which), and the plan's Type B terms."""

    fit_dbm: tuple[float, float]
    error_limit_db: float
    accuracy: dict[str, float]
    k: float | None = None  # per group now (slope_k, intercept_k); the JSON's analysis.k is null
    law: str = "log"
    error_limits_db: tuple[float, ...] = ()  # every limit asked for, the first being error_limit_db
    reference_c: float | None = None
    source: str = "plan"

    @property
    def limits(self) -> tuple[float, ...]:
        return self.error_limits_db or (self.error_limit_db,)

    @classmethod
    def from_plan(cls, analysis: Mapping[str, Any]) -> Settings:
        limit = float(analysis["error_limit_db"])
        reference = analysis.get("reference_c")
        return cls(
            (float(analysis["fit_dbm"][0]), float(analysis["fit_dbm"][1])),
            limit,
            plan_accuracy(analysis),
            law=str(analysis.get("law") or "log"),
            error_limits_db=(limit,),
            reference_c=None if reference is None else float(reference),
        )

    def with_choices(
        self,
        *,
        fit_dbm: Sequence[float] | None = None,
        limits: Sequence[float] | None = None,
        law: str | None = None,
        reference_c: float | None = None,
        source: str,
    ) -> Settings:
        """These settings with the given choices instead; a bad choice is an InputError naming it."""
        fit = self.fit_dbm if fit_dbm is None else (float(fit_dbm[0]), float(fit_dbm[1]))
        if not (math.isfinite(fit[0]) and math.isfinite(fit[1]) and fit[0] < fit[1]):
            raise InputError(f"--fit must be LOW HIGH with LOW < HIGH (dBm), got {fit[0]:g} {fit[1]:g}")
        chosen = self.limits if not limits else tuple(float(x) for x in limits)
        if not all(math.isfinite(x) and x > 0 for x in chosen):
            raise InputError(f"--limit must be a positive number of dB, got {', '.join(f'{x:g}' for x in chosen)}")
        law = self.law if law is None else law
        if law not in LAWS:
            raise InputError(f"--law must be one of {', '.join(LAWS)}, got {law!r}")
        if reference_c is not None and not math.isfinite(reference_c):
            raise InputError("--reference-c must be a temperature in degC")
        return replace(
            self,
            fit_dbm=fit,
            error_limit_db=chosen[0],
            error_limits_db=chosen,
            law=law,
            reference_c=self.reference_c if reference_c is None else float(reference_c),
            source=source,
        )

    def stored(self) -> dict[str, Any]:
        """The analyses row's settings (store/db.py save_analysis)."""
        return {
            "law": self.law,
            "fit_dbm": self.fit_dbm,
            "error_limits_db": list(self.limits),
            "reference_c": self.reference_c,
        }

    def to_json(self) -> dict[str, Any]:
        return {
            "fit_dbm": list(self.fit_dbm),
            "error_limit_db": self.error_limit_db,
            "k": self.k,
            "method": METHOD,
            "uncertainty_terms": describe_terms(self.accuracy),
            "law": self.law,
            "error_limits_db": list(self.limits),
            "reference_c": self.reference_c,
            "source": self.source,
            "coverage_probability": COVERAGE,
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
    setup: dict[str, Any] = field(default_factory=dict)  # the run record and settings (analysis/setup.py)
    plan: dict[str, Any] = field(default_factory=dict)  # the run's plan (units, limits.accept: analysis/lot.py)

    def to_json(self) -> dict[str, Any]:
        """The `report --json` object, exactly (a contract: docs/design.md)."""
        out = {
            **{k: getattr(self, k) for k in RUN_KEYS},
            "groups": [g.public() for g in self.groups],
            "analysis": self.settings.to_json(),
            "details": [g.detail() for g in self.groups],
            "instruments": self.setup.get("instruments", []),  # the run record (docs/run-record.md)
        }
        over = self.over_temperature()
        if over is not None:  # runs with a chamber only: a run without keeps its JSON as it was
            out["over_temperature"] = over
        out.update(self.units_and_lot())  # runs with units or limits.accept only (analysis/lot.py)
        return out

    def units_and_lot(self) -> dict[str, Any]:
        """`units`, `lot` and `acceptance` (analysis/lot.py); {} without units and limits.accept."""
        from nightbench.analysis.lot import units_and_lot

        return units_and_lot(self.plan, self.groups, self.dut_id)

    def over_temperature(self) -> dict[str, Any] | None:
        """Error vs the reference-temperature line and the drift of the line (analysis/temperature.py)."""
        from nightbench.analysis.temperature import over_temperature

        s = self.settings
        return over_temperature(self.groups, s.reference_c, s.error_limit_db, s.fit_dbm)


def analyse(
    run: Mapping[str, Any],
    points: Sequence[Mapping[str, Any]],
    settings: Settings | None = None,
    files: Mapping[str, str] | None = None,
) -> Report:
    """The report of a run from its `runs` row (id, name, state, dut_id, times, plan_json), its
    point rows and its snapshotted files (for a calibration), with the plan's settings unless
    others are given; touches nothing else."""
    plan = json.loads(run["plan_json"])
    if settings is None:
        settings = Settings.from_plan(plan["analysis"])
    row = dict(run)
    stated = Stated.from_plan(plan, files, {"source": row.get("source_idn"), "meter": row.get("meter_idn")})
    groups = analyse_run(points, settings.fit_dbm, settings.limits, stated, law=settings.law)
    return Report(
        run_id=int(run["id"]),
        name=run["name"],
        state=run["state"],
        dut_id=run["dut_id"],
        started_at=run["started_at"],
        finished_at=run["finished_at"],
        settings=settings,
        groups=groups,
        plan=plan,
    )


def run_settings(store: Store, run_id: int) -> Settings:
    """The run's analysis: its latest stored one (the run's own or a `report --save`), else its plan's."""
    plan = Settings.from_plan(json.loads(store.run(run_id)["plan_json"])["analysis"])
    saved = store.analyses(run_id)
    if not saved:
        return plan
    last = saved[-1]
    return plan.with_choices(
        fit_dbm=last["fit_dbm"],
        limits=last["error_limits_db"],
        law=last["law"],
        reference_c=last["reference_c"],
        source=f"saved analysis {last['id']} ({last['origin']}, {last['analysed_at']})",
    )


def build_report(
    store: Store, run_id: int, choices: Mapping[str, Any] | None = None, unit: str | None = None
) -> Report:
    """Analyse a stored run with its own analysis (run_settings), or with `choices` (fit_dbm, limits,
    law, reference_c: any left None keep the run's); only one unit's points with `unit`. Reads only:
    a read-only store will do."""
    run = dict(store.run(run_id))
    points = [dict(r) for r in store.points(run_id) if unit is None or r["unit_id"] == unit]
    settings = run_settings(store, run_id)
    if choices and any(v is not None and v != () for v in choices.values()):
        settings = settings.with_choices(**{k: v for k, v in choices.items() if v != ()}, source="report options")
        levels = {round(float(p["power_dbm"]), 9) for p in points}
        inside = [p for p in levels if settings.fit_dbm[0] - 1e-9 <= p <= settings.fit_dbm[1] + 1e-9]
        if points and len(inside) < 3:
            raise InputError(
                f"--fit {settings.fit_dbm[0]:g} {settings.fit_dbm[1]:g} holds {len(inside)} of the run's levels: "
                "a fit needs at least three"
            )
    files = store.run_files(run_id) if (json.loads(run["plan_json"]).get("path") or {}).get("calibration") else None
    report = analyse(run, points, settings, files)
    report.setup = run_setup(store, run_id)
    return report


def _point_errors(report: Report) -> list[tuple[int, float | None]]:
    """Each stored point's error; a repeated level's points each against the line fitted to the levels' means."""
    out: list[tuple[int, float | None]] = []
    for g in report.groups:
        for c in g.curve:
            if c.get("members") and g.line is not None:
                law, line = get_law(g.law), g.line
                for idx, value in (m for m in c["members"] if m[0] is not None):
                    err = float(
                        conformance_db(law, line.intercept_v, line.slope_v_per_db, [c["power_dbm"]], [value])[0]
                    )
                    out.append((int(idx), err if math.isfinite(err) else None))
            elif c.get("idx") is not None:
                out.append((int(c["idx"]), c["error_db"]))
    return out


def save_fits(store: Store, report: Report) -> None:
    """Store this report as the run's own analysis (at completion), replacing the previous one."""
    store.save_analysis(
        report.run_id, report.settings.stored(), [g.stored() for g in report.groups], _point_errors(report)
    )


def save_analysis(store: Store, report: Report) -> int:
    """`report --save`: store this report as one more analysis of its run; the views show the latest."""
    return store.save_analysis(
        report.run_id,
        report.settings.stored(),
        [g.stored() for g in report.groups],
        _point_errors(report),
        origin="report",
    )
