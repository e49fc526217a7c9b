"""Repeated sweeps of one group: one mean per level, their pooled scatter, and the hysteresis.

With `measure.repeats: N` a level is measured N times, sweeping up and down in turn; the points
carry `repeat` (0..N-1) and `direction` ('up'/'down'). The fit uses each level's mean. The scatter
between the repeats at a level, pooled over the levels (GUM 4.2.4: one standard deviation with
sum(N_i - 1) degrees of freedom), is the Type A term `repeat_scatter`; it contains any hysteresis,
which is also reported on its own: the mean of the up sweeps minus the mean of the down sweeps.
Points stored before repeats existed read as repeat 0: one sweep, nothing to collapse.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np


def _usable(row: Mapping[str, Any]) -> bool:
    return not row.get("overload") and bool(row.get("settled")) and row.get("value_v") is not None


def collapse(rows: Sequence[Mapping[str, Any]]) -> tuple[list[Mapping[str, Any]], dict[str, Any] | None]:
    """The rows with each level's repeats replaced by their mean (a single sweep comes back as it is),
    and what the repeats say: their number, the pooled standard deviation, its degrees of freedom."""
    if len({int(r.get("repeat") or 0) for r in rows}) < 2:
        return list(rows), None
    by_level: dict[float, list[Mapping[str, Any]]] = {}
    for r in rows:
        by_level.setdefault(round(float(r["power_dbm"]), 9), []).append(r)
    out: list[Mapping[str, Any]] = []
    ss, dof = 0.0, 0
    hysteresis: dict[float, float] = {}
    for level, group in by_level.items():
        ok = [r for r in group if _usable(r)]
        if not ok:
            out.append(group[0])  # nothing usable at this level: its first row says why
            continue
        values = np.array([r["value_v"] for r in ok], dtype=float)
        mean = float(values.mean())
        ss += float(((values - mean) ** 2).sum())
        dof += len(ok) - 1
        stdevs = [r.get("stdev_v") for r in ok]
        samples = [int(r.get("samples") or 0) for r in ok]
        known = all(s is not None for s in stdevs) and min(samples) >= 2
        row = dict(ok[0])
        row.update(
            value_v=mean,
            stdev_v=math.sqrt(float(np.mean(np.square(np.asarray(stdevs, dtype=float))))) if known else None,
            samples=sum(samples),
            dof=sum(n - 1 for n in samples),
            repeats=len(ok),
            members=[(r.get("idx"), r["value_v"]) for r in ok],
        )
        out.append(row)
        up = [r["value_v"] for r in ok if r.get("direction") == "up"]
        down = [r["value_v"] for r in ok if r.get("direction") == "down"]
        if up and down:
            hysteresis[level] = float(np.mean(up) - np.mean(down))
    info: dict[str, Any] = {
        "repeats": len({int(r.get("repeat") or 0) for r in rows}),
        "pooled_sd_v": math.sqrt(ss / dof) if dof else None,
        "dof": dof,
        "hysteresis_v": hysteresis,
    }
    return out, info


def hysteresis_db(info: dict[str, Any], slope_v_per_db: float, fit_dbm: Sequence[float]) -> dict[str, Any] | None:
    """Up minus down per level in dB of input (volts / slope), and over the fit range its mean and largest size."""
    by_level = info.get("hysteresis_v") or {}
    if not by_level:
        return None
    levels = sorted(by_level)
    db = [by_level[p] / slope_v_per_db for p in levels]
    inside = [v for p, v in zip(levels, db) if fit_dbm[0] - 1e-9 <= p <= fit_dbm[1] + 1e-9]
    return {
        "mean_db": float(np.mean(inside)) if inside else None,
        "max_abs_db": float(np.max(np.abs(inside))) if inside else None,
        "by_level": [{"power_dbm": p, "up_minus_down_db": v} for p, v in zip(levels, db)],
    }
