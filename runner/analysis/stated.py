"""What a run's plan states about its bench: the Type B inputs of the budget, and what each rests on.

Read from the run's stored plan (and, for a calibration, the file's text from the run's snapshot),
never from the files on disk now, so a report is the same whenever it is made. `bases` names the
things a term depends on (the source, the meter, the path, the calibration file, as written in the
plan): two runs with the same basis and the same stated value share that term, and it cancels in a
difference between them (analysis/compare.py).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from nightbench.analysis.gum import gamma_from_return_loss

ACCURACY_KEYS = (
    "source_level_accuracy_db",
    "path_loss_accuracy_db",
    "meter_gain_accuracy_pct",
    "meter_offset_accuracy_v",
    "source_linearity_db",
)


def plan_accuracy(analysis: Mapping[str, Any]) -> dict[str, float]:
    """The plan's Type B half-widths; runs stored before these keys existed read as 0 (not stated)."""
    return {k: float(analysis.get(k) or 0.0) for k in ACCURACY_KEYS}


def _gamma(spec: Mapping[str, Any], side: str) -> float:
    if spec.get(f"{side}_gamma") is not None:
        return float(spec[f"{side}_gamma"])
    if spec.get(f"{side}_return_loss_db") is not None:
        return gamma_from_return_loss(float(spec[f"{side}_return_loss_db"]))
    return 0.0


def _digest(value: Any) -> str:
    return hashlib.sha256(json.dumps(value, sort_keys=True, default=str).encode()).hexdigest()[:16]


@dataclass(frozen=True)
class Stated:
    accuracy: dict[str, float] = field(default_factory=dict)
    gamma_source: float = 0.0
    gamma_dut: float = 0.0
    calibration: Any = None  # nightbench.plan.calibration's parsed file, or None
    calibration_file: str | None = None
    bases: dict[str, str] = field(default_factory=dict)  # basis name -> identity of what it rests on

    @classmethod
    def of(cls, value: Stated | Mapping[str, float] | None) -> Stated:
        """A Stated from itself, or from bare half-widths by plan key (the analysis functions' older form)."""
        if isinstance(value, Stated):
            return value
        return cls(accuracy={k: float(v) for k, v in (value or {}).items()})

    @classmethod
    def from_plan(
        cls,
        plan: Mapping[str, Any],
        files: Mapping[str, str] | None = None,
        identities: Mapping[str, str | None] | None = None,
    ) -> Stated:
        """From a run's stored plan (plan_json), its snapshotted files (path as written -> text) and the
        identities its instruments gave (role -> *IDN? reply): another instrument at the same address
        is another instrument."""
        ids = identities or {}
        analysis = plan.get("analysis") or {}
        instruments = plan.get("instruments") or {}
        path = plan.get("path") or {}
        mismatch = analysis.get("mismatch") or {}
        calibration, cal_file = None, path.get("calibration") if isinstance(path, Mapping) else None
        if cal_file is not None:
            from nightbench.plan.calibration import parse_calibration

            text = (files or {}).get(cal_file)
            if text is not None:
                calibration = parse_calibration(text, cal_file)
        bases = {
            **{
                role: _digest([*((instruments.get(role) or {}).get(k) for k in ("driver", "resource")), ids.get(role)])
                for role in ("source", "meter")
            },
            "path": _digest({k: v for k, v in dict(path).items() if k != "calibration"}),
        }
        if cal_file is not None:
            bases["calibration"] = _digest((files or {}).get(cal_file, cal_file))
        return cls(
            accuracy=plan_accuracy(analysis),
            gamma_source=_gamma(mismatch, "source"),
            gamma_dut=_gamma(mismatch, "dut"),
            calibration=calibration,
            calibration_file=cal_file,
            bases=bases,
        )

    def basis(self, name: str, stated: Any) -> str | None:
        """The identity of a term resting on `name` with this stated value (None: nothing known to share)."""
        where = self.bases.get(name)
        return None if where is None else f"{name}:{where}:{stated!r}"
