"""The lack of fit of a group's line: a property of the part and of the fit range, not an uncertainty.

A log detector's conformance ripple repeats run after run, so its residuals about the line are
not random: neighbouring residuals move together (lag-1 autocorrelation near 1), where noise
would give about 0. The budget therefore reports them as what they are, in dB, beside the
uncertainties: their rms, their largest size, their lag-1 autocorrelation, and how large the
residuals are against the measured noise (a ratio near 1 means the line fits to within the noise).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def lag1_autocorrelation(residuals: np.ndarray) -> float | None:
    """r1 = sum(e_i e_{i+1}) / sum(e_i^2) of residuals in level order (the usual estimator, numpy's
    correlate as reference); None with fewer than 3 residuals or all zero."""
    e = np.asarray(residuals, dtype=float)
    if e.size < 3:
        return None
    e = e - e.mean()
    denom = float((e * e).sum())
    return None if denom == 0.0 else float((e[:-1] * e[1:]).sum() / denom)


def lack_of_fit(errors_db: np.ndarray, residuals_v: np.ndarray, u_y: np.ndarray | None) -> dict[str, Any]:
    """The fit range's residuals in dB (level order), and against the noise when it was measured."""
    e = np.asarray(errors_db, dtype=float)
    ok = np.isfinite(e)
    rms_noise = None if u_y is None or not len(u_y) else math.sqrt(float((np.asarray(u_y) ** 2).mean()))
    resid_rms_v = math.sqrt(float((np.asarray(residuals_v) ** 2).mean())) if len(residuals_v) else 0.0
    return {
        "rms_db": math.sqrt(float((e[ok] ** 2).mean())) if ok.any() else None,
        "max_abs_db": float(np.abs(e[ok]).max()) if ok.any() else None,
        "lag1_autocorrelation": lag1_autocorrelation(e[ok]),
        "residual_to_noise": None if not rms_noise else resid_rms_v / rms_noise,
        "what": "the part's own deviation from a straight line over the fit range (not a measurement "
        "uncertainty: it repeats from run to run)",
    }
