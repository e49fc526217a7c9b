"""Deciding that a point has settled (docs/design.md, "Settling"; docs/settling.md).

A first-order output approaching its final value A after a change, read by an integrating meter,
gives readings y(t) = A + C exp(-t / tau) + noise (integration only rescales C). The detector
fits that model to every reading since the change, for each time constant on a fine log grid
(sufficient statistics, so a reading costs O(grid) whatever the count), and asks one question:
how large could the drift of the next `samples` readings still be? It takes the worst case over
every time constant the data cannot rule out (a profile-likelihood interval) that is also
plausible from what the run has taught it, adds k standard errors of the fitted amplitude, and
accepts when that bound is within 3/4 of the tolerance. Nothing is assumed about step size,
direction or noise: fast readings against a long time constant leave slow time constants in the
interval, and those keep the bound high until the data or the learned prior excludes them.

What it learns across points, per direction of the output (rise, fall): the evidence about tau
of each point that showed a step (its deviance profile over the grid), and the reading noise. Before a direction is
learned the only prior is `max_tau_s`: a drift slower than that which the data cannot see is
not allowed for (no detector can tell a very slow drift from a settled output).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Literal

import numpy as np

from nightbench.measure.tail import ShareEvidence, tail_grid
from nightbench.measure.tailguard import HISTORY_KEEP, PROBE_TAUS, TAIL_KEEP, TAIL_SHARE, TailGuard

Direction = Literal["rise", "fall"]
DIRECTIONS: tuple[Direction, Direction] = ("rise", "fall")

GRID_MIN_S = 1e-5  # faster than any reading cadence: such outputs are done before one reading
GRID_RATIO = 1.04  # 4 % steps in tau: finer than the intervals the data can resolve
DRIFT_SHARE = 0.75  # accept when the drift bound is within this share of the tolerance
MIN_READINGS = 2  # A and C; with no residual left, the learned tau interval decides
DENSE_READINGS = 32  # judge after every reading up to this many, then every n // 32th
PRIOR_NOISE_DOF = 5  # weight (degrees of freedom) of the noise learned from earlier points
COMPAT_SCALE = 2.0  # interval: rss within 2 k^2 s^2 of the best (~99.9 %: many looks per point)
ALONE_DOF = 10  # local degrees of freedom needed before any noise has been learned
LEARN_KEEP = 7  # recent points whose tau evidence is kept per direction
NOISE_FLOOR = 1e-3  # noise below this share of the tolerance counts as this much (clean streams)
NOISE_KEEP = 12  # recent points pooled for the noise prior
STEP_Z = 3.9  # a step is real (has a direction) beyond this many standard errors: the best of the grid's
# time constants is picked, and at 2.33 (one t test at 99 %) about 9 % of pure-noise points showed a "step"

# One-sided 99 % Student t for 1..30 dof (from memory of the table; checked against scipy in tests/test_settle.py)
# fmt: off
_T99 = (
    31.821, 6.965, 4.541, 3.747, 3.365, 3.143, 2.998, 2.896, 2.821, 2.764, 2.718, 2.681, 2.650, 2.624, 2.602,
    2.583, 2.567, 2.552, 2.539, 2.528, 2.518, 2.508, 2.500, 2.492, 2.485, 2.479, 2.473, 2.467, 2.462, 2.457,
)
# fmt: on
_Z99 = 2.3263


def chi2_999(dof: int) -> float:
    """99.9 % quantile of chi-square (Wilson-Hilferty); 0 for no degrees of freedom."""
    if dof < 1:
        return 0.0
    a = 2.0 / (9.0 * dof)
    return dof * (1.0 - a + 3.0902 * math.sqrt(a)) ** 3


def t99(dof: float) -> float:
    """One-sided 99 % Student t quantile; beyond the table, the first Cornish-Fisher term."""
    if dof < 1:
        return math.inf
    if dof <= len(_T99):
        return _T99[int(dof) - 1]
    return _Z99 + (_Z99**3 + _Z99) / (4.0 * dof)


def step_direction(c: float, se_c: float, dof: float) -> Direction | None:
    """The direction of a fitted step (C > 0: the output was above its final value, a fall), or
    None while noise could explain it. Stricter than one t test, since C is the best of a grid."""
    if not math.isfinite(se_c) or abs(c) <= STEP_Z * t99(dof) / _Z99 * se_c:
        return None
    return "fall" if c > 0 else "rise"


@dataclass(frozen=True)
class Assessment:
    """The detector's view after a reading: the reason behind a yes or a no, for logs and tests."""

    n: int
    drift_bound_v: float  # upper bound on the mean drift of the next `samples` readings
    tau_s: float | None  # best-fitting time constant
    tau_hi_s: float | None  # slowest time constant allowed for
    noise_v: float | None  # reading noise used (rms)
    direction: Direction | None  # output direction, if the data or the hint tells it
    tail_v: float = 0.0  # the part of the bound a slow tail could still cause


@dataclass(frozen=True)
class Learned:
    """What one point taught: a time constant interval for the direction its output moved."""

    direction: Direction
    tau_s: float
    tau_lo_s: float
    tau_hi_s: float


class SettleDetector(TailGuard):
    """One per run. `begin(hint)` at each change, `feed(t, v)` until True, `record` the samples, `end()`.

    `t` is seconds since the change (any fixed offset is fine: it only rescales C). The hint is
    the direction the output is expected to move ('rise' for a level increase); it only picks the
    prior when the data cannot yet tell the direction, and only once the run has shown that hints
    and observed directions agree (a detector whose output falls with power flips the mapping).
    """

    def __init__(
        self,
        tolerance_v: float,
        *,
        samples: int = 4,
        min_wait_s: float = 0.0,
        max_tau_s: float = 5.0,
        tail_share: float = TAIL_SHARE,
        timeout_s: float | None = None,
    ) -> None:
        if tolerance_v <= 0 or max_tau_s <= 0:
            raise ValueError("tolerance_v and max_tau_s must be positive")
        self.tolerance_v = tolerance_v
        self.samples = max(1, samples)
        self.min_wait_s = min_wait_s
        self.max_tau_s = max_tau_s
        top = 4.0 * max_tau_s
        self.grid = GRID_MIN_S * GRID_RATIO ** np.arange(math.ceil(math.log(top / GRID_MIN_S, GRID_RATIO)) + 1)
        self.learned: dict[Direction, deque[Learned]] = {d: deque(maxlen=LEARN_KEEP) for d in DIRECTIONS}
        self.profiles: dict[Direction, deque[np.ndarray]] = {d: deque(maxlen=LEARN_KEEP) for d in DIRECTIONS}
        self.noise: deque[tuple[float, int]] = deque(maxlen=NOISE_KEEP)  # (rss, dof) per point
        self.polarity = 0  # +1: hints match the output's direction; -1: they are inverted
        self._priors: dict[Direction | None, tuple[float, float]] = {}  # prior() per direction, until end() learns
        self.last: Assessment | None = None
        # slow tails (nightbench.measure.tail): the share allowed for, and what points proved about it
        self.tail_share = tail_share
        self.probe_s = PROBE_TAUS * max_tau_s if timeout_s is None else min(PROBE_TAUS * max_tau_s, 0.4 * timeout_s)
        self.since_probe = TAIL_KEEP  # points since this run's last probe (tailguard.py)
        self.probing = False
        self.tail_taus = tail_grid(max_tau_s)
        self.tail_evidence = ShareEvidence(self.tail_taus, tail_share)  # for the run (tail.py)
        self.settled_v: float | None = None  # the previous point's value: where this step started
        # every recent step (time of the change, signed size): a slow tail sums over all of them
        self.history: deque[tuple[float, float]] = deque(maxlen=HISTORY_KEEP)
        self.t_change, self.n, self.t_first, self.t_last = 0.0, 0, 0.0, 0.0
        self.begin(None)

    # -- one point ------------------------------------------------------------------------
    def begin(self, hint: Direction | None, *, at: float | None = None, from_off: bool = False) -> None:
        """A change has just been made, at time `at` on any steady clock (None: right after the
        previous point's last reading): forget the previous point's readings. `from_off`: RF was
        off before this change, so the previous value says nothing about where this step started."""
        if at is None:
            cadence = (self.t_last - self.t_first) / (self.n - 1) if self.n > 1 else 0.0
            at = self.t_change + self.t_last + cadence
        self.t_change = at
        self._exposure_cache: np.ndarray | None = None
        self.probed = False
        if from_off:
            self.settled_v = None
        self.hint = hint
        self.n = 0
        self.t_first = self.t_last = 0.0
        self.y0 = 0.0
        g = len(self.grid)
        self.sx, self.sxx, self.sxy = np.zeros(g), np.zeros(g), np.zeros(g)
        self.sy = self.syy = 0.0
        self.ts: list[float] = []
        self.ys: list[float] = []
        self.last = None

    def record(self, t: float, v: float) -> None:
        """Add a reading without deciding (the averaged samples: they still teach the fit)."""
        if self.n == 0:
            self.t_first, self.y0 = t, v
        x = np.exp(-(t - self.t_first) / self.grid)
        y = v - self.y0
        self.sx += x
        self.sxx += x * x
        self.sxy += x * y
        self.sy += y
        self.syy += y * y
        self.n += 1
        self.t_last = t
        self.ts.append(t)
        self.ys.append(v)

    def feed(self, t: float, v: float) -> bool:
        """Add a reading taken `t` s after the change; True once the drift bound is small enough."""
        self.record(t, v)
        if self.n < MIN_READINGS or t < self.min_wait_s:
            return False
        if self.n > DENSE_READINGS and self.n % (self.n // DENSE_READINGS):
            return False  # long settles: judge every ~3 % of the elapsed readings (CPU)
        self.last = self._assess()
        return self.last.drift_bound_v <= DRIFT_SHARE * self.tolerance_v and not self.probing

    def end(self) -> Learned | None:
        """The point is done: learn its noise and, if it showed a step, its time constant profile."""
        if self.n < 4:
            value = float(np.mean(self.ys)) if self.ys else None
            if value is not None and self.settled_v is not None:
                self._remember_step(value - self.settled_v)
            self.settled_v = value
            return None
        c, rss, sxx = self._fit()
        best = int(np.argmin(rss))
        dof = self.n - 3
        s0, nu0 = self._noise_prior()
        self.noise.append((float(rss[best]), dof))
        s2 = max((float(rss[best]) + nu0 * s0) / (dof + nu0), (NOISE_FLOOR * self.tolerance_v) ** 2)
        k = t99(dof + nu0)
        self._learn_tail(best, s2, float(c[best]), k)
        if self.probed:
            self.since_probe, self.probe_reach = 0, self.probe_reach_now
        else:
            self.since_probe += 1
        direction = step_direction(c[best], math.sqrt(s2 / sxx[best]) if sxx[best] > 0 else math.inf, dof + nu0)
        if direction is None:
            return None  # no step to learn from (or too small to tell its direction)
        if self.hint is not None:
            self.polarity = max(-3, min(3, self.polarity + (1 if self.hint == direction else -1)))
        profile = (rss - rss[best]) / s2  # deviance of each tau against the best one
        self.profiles[direction].append(profile)
        self._priors.clear()
        inside = np.flatnonzero(profile <= k * k)
        lo, hi = int(inside[0]), int(inside[-1])
        if hi == len(self.grid) - 1:
            return None  # the data cannot tell how slow: no interval of its own
        fact = Learned(direction, float(self.grid[best]), float(self.grid[lo]), float(self.grid[hi]))
        self.learned[direction].append(fact)
        self._priors.clear()
        return fact

    # -- what the run has taught ----------------------------------------------------------
    def tau_s(self, direction: Direction) -> float | None:
        """The learned time constant of a direction (median of recent points), or None."""
        facts = self.learned[direction]
        return float(np.median([f.tau_s for f in facts])) if facts else None

    def level_taus(self) -> tuple[float | None, float | None]:
        """Learned time constants for a level increase and a level decrease (None if unknown)."""
        if self.polarity == 0:
            return None, None
        up: Direction = "rise" if self.polarity > 0 else "fall"
        down: Direction = "fall" if self.polarity > 0 else "rise"
        return self.tau_s(up), self.tau_s(down)

    def prior(self, direction: Direction | None) -> tuple[float, float]:
        """The time constants the run makes plausible for a direction (None: either).

        The recent points' deviance profiles are summed (independent evidence about one tau):
        if one tau fits them all, the joint interval is far tighter than any one point's. If
        they disagree (tau changes with level), the union of the recent points' own intervals.
        """
        if direction not in self._priors:
            self._priors[direction] = self._prior(direction)
        return self._priors[direction]

    def _prior(self, direction: Direction | None) -> tuple[float, float]:
        if direction is None:
            (a, b), (c, d) = self.prior("rise"), self.prior("fall")
            return min(a, c), max(b, d)
        profiles, facts = self.profiles[direction], self.learned[direction]
        if profiles:
            joint = np.sum(profiles, axis=0)
            if joint.min() <= chi2_999(len(profiles) - 1):
                inside = np.flatnonzero(joint <= joint.min() + COMPAT_SCALE * _Z99**2)
                lo = float(self.grid[inside[0]])
                if inside[-1] == len(self.grid) - 1:
                    # the evidence cannot tell how slow: as before anything was learned, max_tau_s
                    # caps it (weak evidence must never widen the prior it was meant to narrow)
                    return lo, max(lo, self.max_tau_s)
                return lo, float(self.grid[inside[-1]])
        if not facts:
            return GRID_MIN_S, self.max_tau_s
        return min(f.tau_lo_s for f in facts), max(f.tau_hi_s for f in facts)

    def _noise_prior(self) -> tuple[float, int]:
        dof = sum(d for _, d in self.noise)
        if dof == 0:
            return 0.0, 0
        return sum(r for r, _ in self.noise) / dof, PRIOR_NOISE_DOF

    # -- the fit --------------------------------------------------------------------------
    def _fit(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Least squares y = A + C x per grid tau: amplitude C, residual sum of squares, Sxx."""
        n = self.n
        xb, yb = self.sx / n, self.sy / n
        sxx = np.maximum(self.sxx - n * xb * xb, 0.0)
        sxy = self.sxy - n * xb * yb
        syy = max(self.syy - n * yb * yb, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            c = np.where(sxx > 0, sxy / sxx, 0.0)
        rss = np.maximum(syy - c * sxy, 0.0)
        return c, rss, sxx

    def _assess(self) -> Assessment:
        self.probing = False
        c, rss, sxx = self._fit()
        best = int(np.argmin(rss))
        s0, nu0 = self._noise_prior()
        dof = max(self.n - 3, 0) + nu0
        if dof < (1 if nu0 else ALONE_DOF):
            return Assessment(self.n, math.inf, None, None, None, None)
        s2 = (float(rss[best]) + nu0 * s0) / dof
        k = t99(dof)
        with np.errstate(divide="ignore", invalid="ignore"):
            se_c = np.where(sxx > 0, np.sqrt(s2 / sxx), np.inf)
        direction = step_direction(c[best], float(se_c[best]), dof)
        if direction is None and self.hint is not None and self.polarity != 0:
            direction = self.hint if self.polarity > 0 else ("fall" if self.hint == "rise" else "rise")
        compatible = rss <= rss[best] + COMPAT_SCALE * k * k * s2
        lo, hi = self.prior(direction)
        plausible = (self.grid >= lo / GRID_RATIO) & (self.grid <= hi * GRID_RATIO)
        allowed = compatible & plausible
        if not allowed.any():  # data and prior disagree: allow for both
            allowed = compatible | plausible
        # mean of exp(-(t_j - t_first)/tau) over the next `samples` readings at the cadence so far
        step = (self.t_last - self.t_first) / (self.n - 1)
        tau = self.grid[allowed]
        ahead = self.t_last - self.t_first + step * np.arange(1, self.samples + 1)[:, None]
        u = np.exp(-ahead / tau).mean(axis=0)
        with np.errstate(invalid="ignore"):
            bound = np.where(u > 0, (np.abs(c[allowed]) + k * se_c[allowed]) * u, 0.0)
        main = float(bound.max())
        tail = 0.0
        if main <= DRIFT_SHARE * self.tolerance_v:  # only then can a tail be what holds the point
            fast = int(np.flatnonzero(allowed)[np.argmin(rss[allowed])])
            tail = self._tail_drift(fast, s2, k, float(c[fast]), ahead[:, 0])
        return Assessment(self.n, main + tail, float(self.grid[best]), float(tau.max()), math.sqrt(s2), direction, tail)
