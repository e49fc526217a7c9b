"""The uncertainty budget as text: in `report`'s output and in summary.md (docs/uncertainty.md).

Per quantity (slope, intercept) one row per group: each term's standard uncertainty (* = combined,
- = cannot move this quantity, a 'c' after a common term: the same at every frequency), u_c, the
effective degrees of freedom, k and U; then the part of u_c that does not cancel between two
frequencies of the run, the lack of fit (a property of the part, not an uncertainty) and, for
repeated sweeps, their scatter and hysteresis.
"""

from __future__ import annotations

from typing import Any

from nightbench.analysis.report import Report
from nightbench.analysis.uncertainty import AFFECTS, TERMS
from nightbench.output.table import group_label, key_fields


def _num(value: float | None, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def _cell(term: dict[str, Any] | None, key: str, fmt: str, affects: bool) -> str:
    if term is None:
        return "n/a "
    if not affects:
        return "- "
    mark = "*" if term["included"] else " "
    return _num(term[key], fmt) + mark + ("c" if term["common"] and term["included"] else "")


def _shown_keys(budgets: list[dict[str, Any]]) -> list[str]:
    """The terms that some group has and that are non-zero somewhere (in TERMS' order): a term the plan
    does not state is listed under 'terms:' as not stated, not as a column of zeros."""
    present = {t["key"] for u in budgets for t in u["terms"] if t["slope_u_mv_per_db"] or t["intercept_u_db"]}
    return [k for k in TERMS if k in present]


def _dof(nu: float | None) -> str:
    return "inf" if nu is None else ">999" if nu > 999 else format(nu, ".0f")


def render_budget_tables(report: Report) -> list[str]:
    groups = [g for g in report.groups if g.budget is not None]
    if not groups:
        return []
    budgets = [g.budget.as_dict() for g in groups if g.budget is not None]
    keys = _shown_keys(budgets)
    group_keys = key_fields(report)
    labels = [group_label(g, group_keys) for g in groups]
    lw = max(10, *(len(label) for label in labels))
    out = []
    for quantity, unit, fmt, uk in (
        ("slope", "mV/dB", ".4f", "slope_u_mv_per_db"),
        ("intercept", "dB", ".3f", "intercept_u_db"),
    ):
        suffix = "mv_per_db" if quantity == "slope" else "db"
        out.append(f"{quantity} budget: standard uncertainties in {unit} (* = combined, c = common to all frequencies)")
        widths = [max(len(k), 8) + 1 for k in keys]
        out.append(
            f"{'group' if group_keys else 'freq':>{lw}} "
            + " ".join(f"{k:>{w}}" for k, w in zip(keys, widths))
            + f" {'u_c':>8} {'nu_eff':>7} {'k':>5} {'U':>8} {'u_c f-f':>8}"
        )
        for label, u in zip(labels, budgets):
            terms = {t["key"]: t for t in u["terms"]}
            cells = [f"{_cell(terms.get(k), uk, fmt, quantity in AFFECTS[k]):>{w}}" for k, w in zip(keys, widths)]
            nu = u[f"{quantity}_nu_eff"]
            out.append(
                f"{label:>{lw}} " + " ".join(cells) + f" {u[f'{quantity}_uc_{suffix}']:8{fmt}} {_dof(nu):>7}"
                f" {u[f'{quantity}_k']:5.2f} {u[f'{quantity}_U_{suffix}']:8{fmt}}"
                f" {u[f'{quantity}_uc_between_frequencies_{suffix}']:8{fmt}}"
            )
    out.append(
        "u_c f-f: the combined standard uncertainty without the common terms, for comparing two frequencies of this run"
    )
    out += _lack_of_fit(budgets, labels)
    return out


def _lack_of_fit(budgets: list[dict[str, Any]], labels: list[str]) -> list[str]:
    out = ["lack of fit over the fit range (the part's own ripple: reported, not an uncertainty):"]
    for label, u in zip(labels, budgets):
        lof = u.get("lack_of_fit") or {}
        ratio = lof.get("residual_to_noise")
        out.append(
            f"  {label}: rms {_num(lof.get('rms_db'), '.3f')} dB, max {_num(lof.get('max_abs_db'), '.3f')} dB, "
            f"lag-1 autocorrelation {_num(lof.get('lag1_autocorrelation'), '.2f')}, "
            f"residuals / noise {_num(ratio, '.1f')}"
        )
        rep = u.get("repeats")
        if rep:
            hyst = rep.get("hysteresis") or {}
            out.append(
                f"  {label}: {rep['repeats']} sweeps, pooled sd between them "
                f"{_num(None if rep['pooled_sd_v'] is None else rep['pooled_sd_v'] * 1e3, '.3f')} mV "
                f"({rep['dof']} dof); hysteresis up - down: mean {_num(hyst.get('mean_db'), '+.3f')} dB, "
                f"max {_num(hyst.get('max_abs_db'), '.3f')} dB"
            )
    return out


def render_terms(report: Report) -> list[str]:
    out = ["terms:"]
    for t in report.settings.to_json()["uncertainty_terms"]:
        stated = ""
        if "plan_key" in t:
            stated = (
                f", ±{t['half_width']:g} from {t['plan_key']}"
                if t["half_width"]
                else f", not stated ({t['plan_key']} = 0)"
            )
        out.append(f"  {t['key']} (Type {t['type']}{stated}): {t['what']}")
    return out
