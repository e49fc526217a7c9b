"""A slow tail behind a fast step: how much of it the readings since the change can still hide.

Real detectors often settle in two parts: a fast main response and a small slow part (a thermal
tail of a percent or so, tenths of a second long). Once the run has learned a fast time constant,
a single-exponential fit explains the first few readings of a large step perfectly well, while a
1 % tail of a 100 mV step (1 mV) is still twice a 0.5 mV tolerance away. No fit of a few
milliseconds of data can see that tail; only watching longer can. So, for every slow time
constant up to `max_tau_s`, the readings are fitted with both parts,

    y(t) = A + C_f exp(-t / tau_f) + C_s exp(-t / tau_s),

and the slow amplitude C_s is bounded by what the data allow (|C_s| + k se(C_s)), but never
above `share` of the step unless the data show more. Large steps relative to the tolerance keep
the point open until the tail is bounded or has decayed; small steps, whose largest plausible
tail is within the tolerance anyway, cost nothing.
"""

from __future__ import annotations

import math

import numpy as np

TAIL_SEPARATION = 3.0  # a tail is at least this much slower than the main part's time constant
TAIL_GRID_RATIO = 1.25  # coarse steps in tau_s: the bound varies slowly with it
TAIL_GRID_MIN_S = 1e-3  # tails faster than this are done within a few readings: the main fit sees them
COLLINEAR = 1e-10  # a slow column with less than this share of its spread left after projection: no evidence


def tail_grid(max_tau_s: float) -> np.ndarray:
    """The slow time constants allowed for, fixed per run (so evidence from points can be pooled)."""
    if max_tau_s <= TAIL_GRID_MIN_S:
        return np.array([max_tau_s])
    n = math.ceil(math.log(max_tau_s / TAIL_GRID_MIN_S, TAIL_GRID_RATIO))
    return max_tau_s / TAIL_GRID_RATIO ** np.arange(n, -1, -1)


def slow_amplitudes(
    t: np.ndarray, y: np.ndarray, fast_tau_s: float, taus: np.ndarray, s2: float
) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares C_s and its standard error for each tau_s (t from the first reading).

    Columns 1, exp(-t/tau_f), exp(-t/tau_s). The first two are projected out in closed form
    (centre, then remove the fast column), leaving one regression per tau_s: C_s = <x, y> / <x, x>
    with se = sqrt(s2 / <x, x>) over the projected x and y (the same numbers as the 3 x 3 normal
    equations, without a matrix inverse and its condition number per tau_s, which cost most of a
    judgement). Where the slow column is nearly a combination of the other two (a window short
    against tau_s), or tau_s is not clearly slower than tau_f, se is infinite: no evidence.
    """
    amp = np.zeros(len(taus))
    se = np.full(len(taus), math.inf)
    use = taus >= fast_tau_s * TAIL_SEPARATION
    if len(t) < 4 or not use.any():
        return amp, se
    xf = np.exp(-t / fast_tau_s)
    xf -= xf.mean()
    yc = y - y.mean()
    xs = np.exp(-t[None, :] / taus[use][:, None])  # (m, n)
    xs -= xs.mean(axis=1, keepdims=True)
    ss = np.einsum("mn,mn->m", xs, xs)
    sff = float(xf @ xf)
    sf = xs @ xf
    sy = xs @ yc
    if sff > 0:
        d = ss - sf * sf / sff
        num = sy - sf * float(xf @ yc) / sff
    else:  # the fast part is over before the first reading: nothing to project out
        d, num = ss, sy
    ok = d > COLLINEAR * ss
    a, s = np.zeros(len(d)), np.full(len(d), math.inf)
    a[ok] = num[ok] / d[ok]
    s[ok] = np.sqrt(s2 / d[ok])
    amp[use], se[use] = a, s
    return amp, se


def tail_bound(amp: np.ndarray, se: np.ndarray, k: float, cap_v: np.ndarray, remaining: np.ndarray) -> float:
    """Upper bound on the mean drift a slow tail could still cause over the next readings.

    Per tau_s: the amplitude the data allow (|C_s| + k se), but no more than `cap_v` (the share
    of the step a tail may plausibly have) unless the data show more than that; times the share
    of it still to come (`remaining`, the mean of exp(-t/tau_s) over the readings ahead).
    """
    hi = np.abs(amp) + k * se
    shown = (np.abs(amp) - k * se) > cap_v  # the data show more tail than the cap: believe them
    bounded = np.where(shown, hi, np.minimum(hi, cap_v))
    with np.errstate(invalid="ignore"):
        drift = np.where(remaining > 0, bounded * remaining, 0.0)
    return float(drift.max()) if drift.size else 0.0


def exposure(history: list[tuple[float, float]], t_ref: float, taus: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per tau_s, the signed and the absolute sum of earlier steps (time of the change, size),
    each decayed to t_ref by exp(-(t_ref - t)/tau_s): a tail of share rho is rho times the signed
    sum behind its final value at t_ref."""
    if not history:
        return np.zeros(len(taus)), np.zeros(len(taus))
    at, size = np.array(history).T
    decay = np.exp(-np.maximum(t_ref - at, 0.0)[:, None] / taus[None, :])
    return size @ decay, np.abs(size) @ decay


def pooled_share(evidence: list[tuple[np.ndarray, np.ndarray]], k: float) -> np.ndarray:
    """What recent points prove about the tail's share of a step, per tau_s: the inverse-variance
    mean of their estimates C_s/step plus k standard errors (inf where none could tell)."""
    if not evidence:
        return np.full(0, math.inf)
    r = np.array([e[0] for e in evidence])
    s = np.array([e[1] for e in evidence])
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(np.isfinite(s) & (s > 0), 1.0 / (s * s), 0.0)
        total = w.sum(axis=0)
        mean = np.where(total > 0, (w * np.where(w > 0, r, 0.0)).sum(axis=0) / total, 0.0)
        se = np.where(total > 0, 1.0 / np.sqrt(total), math.inf)
    return np.abs(mean) + k * se
