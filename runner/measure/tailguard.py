"""The slow-tail guard of the settle detector (docs/settling.md, "Slow tails"): the state it
keeps across points (recent steps, what points proved about a tail's share) and its judgement.
A mixin of SettleDetector, apart so that each file keeps one job; the fits are in tail.py."""

from __future__ import annotations

import math
from collections import deque

import numpy as np

from nightbench.measure.tail import ShareEvidence, exposure, slow_amplitudes, tail_bound

TAIL_SHARE = 0.02  # default: a slow tail may be up to 2 % of a step until the run shows less
TAIL_KEEP = 64  # a probe that fell short holds off the next for this many points (unless steps double)
TAIL_READINGS = 640  # at most this many readings enter a tail fit
LEARN_FROM = 20.0  # a point teaches the shares only if its exposure is at least this many tolerances
HISTORY_AGE = 12.0  # steps older than this many max_tau_s are forgotten (their tail is < 1e-5 of them)
HISTORY_KEEP = 2000
PROBE_TAUS = 1.0  # a probe lasts at most this many max_tau_s (and 0.4 x the timeout) ...
PROBE_TARGET = 0.5  # ... or until the run's evidence, with its readings, allows for at most this much
# of the tolerance at its exposure (0.25, to cover twice the exposure, made bench sweeps slower)


class TailGuard:
    """State and judgement of the tail guard; SettleDetector sets every attribute below."""

    tolerance_v: float
    samples: int
    max_tau_s: float
    grid: np.ndarray
    n: int
    y0: float
    sx: np.ndarray
    sy: float
    ts: list[float]
    ys: list[float]
    t_change: float
    t_first: float
    t_last: float
    tail_share: float
    tail_taus: np.ndarray
    tail_evidence: ShareEvidence
    history: deque[tuple[float, float]]
    settled_v: float | None
    probe_s: float
    since_probe: int
    probing: bool
    probed: bool
    _last_step: float = 0.0
    probe_reach: float = 0.0  # the largest exposure at the last probe
    probe_reach_now: float = 0.0
    _exposure_cache: np.ndarray | None

    def _step_v(self, c_best: float, i: int) -> float:
        """This point's step, signed: from the previous point's value to the fitted final value
        (on the first point, what the readings themselves have shown: at least their own span)."""
        final = self.y0 + (self.sy - c_best * self.sx[i]) / self.n if self.n else self.y0
        span = abs(self.ys[-1] - self.ys[0]) if self.ys else 0.0
        if self.settled_v is None:  # what happened before the first reading is unknown: span and C
            return -math.copysign(span + abs(c_best), c_best)  # C > 0: the output is above its final value, a fall
        if abs(final - self.settled_v) < max(span, abs(c_best)):  # the previous value is stale
            return -math.copysign(max(span, abs(c_best)), c_best)
        return final - self.settled_v

    def forget_steps(self) -> None:
        """RF went off (a resume, a reconnect): the earlier steps' tails are gone, and so is the value."""
        self.history.clear()
        self.settled_v = None

    def _remember_step(self, step_v: float) -> None:
        self.history.append((self.t_change, step_v))
        while self.history and self.history[0][0] < self.t_change - HISTORY_AGE * self.max_tau_s:
            self.history.popleft()

    def _exposure(self, step_v: float) -> np.ndarray:
        """Per tail time constant, the rises and the falls of this step and the recent ones, each
        decayed to the first reading (m, 2): a tail is now rho_r times the first plus rho_f times
        the second (linear superposition). The earlier steps' part is fixed for the point."""
        if self._exposure_cache is None:
            t_ref = self.t_change + self.t_first
            self._exposure_cache = exposure(list(self.history), t_ref, self.tail_taus)
        x = self._exposure_cache.copy()
        x[:, 0 if step_v > 0 else 1] += step_v * np.exp(-self.t_first / self.tail_taus)
        return x

    def _tail_caps(self, k: float, x: np.ndarray) -> np.ndarray:
        """Per tail time constant, the largest tail amplitude allowed for at exposure x: the plan's
        share of every recent step, or less where the run's evidence proves less."""
        cap = self.tail_share * np.abs(x).sum(axis=1)
        return np.minimum(cap, self.tail_evidence.bound(x, k))

    def _tail_drift(self, fast: int, s2: float, k: float, c_fast: float, ahead: np.ndarray) -> float:
        if self.tail_share <= 0:
            return 0.0
        fast_tau_s = float(self.grid[fast])
        self._last_step = self._step_v(c_fast, fast)
        x = self._exposure(self._last_step)
        caps = self._tail_caps(k, x)
        remaining = np.exp(-ahead[:, None] / self.tail_taus[None, :]).mean(axis=0)
        remaining = np.where(self.tail_taus >= fast_tau_s * 3.0, remaining, 0.0)
        if float((caps * remaining).max(initial=0.0)) <= 0.05 * self.tolerance_v:
            return 0.0  # the largest tail allowed for is negligible: no fit needed
        t, y = self._tail_readings()
        amp, se = slow_amplitudes(t, y, fast_tau_s, self.tail_taus, s2)
        self.probing = self._probe(amp, se, k, remaining > 0, x)
        self.probed |= self.probing
        return tail_bound(amp, se, k, caps, remaining)

    def _probe(self, amp: np.ndarray, se: np.ndarray, k: float, live: np.ndarray, x: np.ndarray) -> bool:
        """Keep this point open until its own readings, with the run's evidence, bound the tail at
        its exposure to the probe target, when the guard is what holds it: for at most probe_s,
        and not again within TAIL_KEEP points of a probe that fell short unless the steps have
        grown to twice what it saw. One long look proves far more than many short ones: within a
        short point a slow tail is a straight line, its amplitude known only to tau x the slope's
        error, which shrinks as the window to the power 1.5. Waiting never makes a point less
        accurate."""
        if self.t_last >= self.probe_s:
            return False
        reach = np.abs(x).sum(axis=1)
        self.probe_reach_now = float(reach.max())
        if not self.probed and self.since_probe < TAIL_KEEP and self.probe_reach_now <= 2.0 * self.probe_reach:
            return False  # a recent probe fell short at steps this large: not again so soon
        usable = live & (reach >= LEARN_FROM * self.tolerance_v)
        if not usable.any() or ((np.abs(amp) - k * se) > 0)[usable].any():
            return False  # nothing to learn a share from, or a tail shows: the guard, not a probe
        _, future = self.tail_evidence.predict(x, extra=(x, se))
        return bool((k * future[usable]).max() > PROBE_TARGET * self.tolerance_v)

    def new_conditions(self) -> None:
        """The part's conditions changed (a new chamber temperature): what was proven about its
        tail held for the old ones, so it is forgotten and the next held point may probe again."""
        self.tail_evidence.clear()
        self.since_probe, self.probe_reach = TAIL_KEEP, 0.0

    def proven_allowance(self, rise_v: float, fall_v: float, *, slower_than_s: float = 0.0, k: float = 2.5) -> float:
        """The largest tail amplitude (V) the guard would now allow for, over the tail time
        constants slower than `slower_than_s`, after rises summing to rise_v and falls to fall_v
        (negative), just made: the plan's share of their sizes, or less where the run's evidence
        proves less. (Faster tails are over within a few readings: the main fit sees them.)"""
        x = np.column_stack([np.full(len(self.tail_taus), rise_v), np.full(len(self.tail_taus), fall_v)])
        caps = self._tail_caps(k, x)
        return float(caps[self.tail_taus > slower_than_s].max(initial=0.0))

    def _tail_readings(self, after_s: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
        """The readings for a tail fit (from `after_s` on): all of them, or an even subset of a
        long point (a subset knows less, so the bound only grows: safe, and the cost per
        judgement stays flat)."""
        ts = np.asarray(self.ts) - self.t_first
        first = int(np.searchsorted(ts, after_s))
        stride = max(1, (len(ts) - first) // TAIL_READINGS)
        return ts[first::stride], np.asarray(self.ys[first::stride]) - self.y0

    def _learn_tail(self, best: int, s2: float, c_best: float, k: float) -> None:
        """Add what this point's readings prove about the tail's shares (its fitted slow amplitude
        against its exposure) to the run's evidence, and keep its value."""
        fast_tau_s = float(self.grid[best])
        step = self._step_v(c_best, best)
        x = self._exposure(step) if self.tail_share > 0 else None
        self._remember_step(step)
        self.settled_v = float(np.mean(self.ys[-self.samples :]))
        if x is None:
            return  # no tail allowed for: nothing to learn about one (CPU: no exposure sums)
        usable = np.abs(x).sum(axis=1) >= LEARN_FROM * self.tolerance_v
        if not usable.any():
            return
        # Only the readings after the main part has come within the noise: the main fit's time
        # constant is known to a 4 % grid step, and its misfit early on, the same sign point after
        # point, would add up in the pooled shares as a tail that is not there.
        after = fast_tau_s * math.log(max(abs(c_best) / math.sqrt(s2), 1.0))
        t, y = self._tail_readings(after)
        amp, se = slow_amplitudes(t, y, fast_tau_s, self.tail_taus, s2)
        self.tail_evidence.add(x, amp, np.where(usable, se, math.inf))
