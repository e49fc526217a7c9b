"""The slow-tail guard of the settle detector (docs/settling.md, "Slow tails"): the state it
keeps across points (recent steps, what points proved about a tail's share) and its judgement.
A mixin of SettleDetector, apart so that each file keeps one job; the fits are in tail.py."""

from __future__ import annotations

import math
from collections import deque

import numpy as np

from nightbench.measure.tail import exposure, pooled_share, slow_amplitudes, tail_bound

TAIL_SHARE = 0.02  # default: a slow tail may be up to 2 % of a step until the run shows less
TAIL_KEEP = 64  # recent points whose tail evidence is pooled; a probe at most once per this many
TAIL_READINGS = 160  # at most this many readings enter a tail fit
HISTORY_AGE = 12.0  # steps older than this many max_tau_s are forgotten (their tail is < 1e-5 of them)
HISTORY_KEEP = 2000
PROBE_TAUS = 1.0  # a probe lasts at most this many max_tau_s (and 0.4 x the timeout) ...
PROBE_TARGET = 0.5  # ... or until the share it proves allows for at most this much of the tolerance at
# its exposure (0.25, to cover twice the exposure, made bench sweeps slower: longer probes that ran out of time)
PROOF_KEEP = 16  # points whose evidence met PROBE_TARGET: kept for the run, not rolled off with the others


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
    tail_evidence: deque[tuple[np.ndarray, np.ndarray]]
    proofs: deque[tuple[np.ndarray, np.ndarray, float]]  # (share, its se, the exposure it covers)
    history: deque[tuple[float, float]]
    settled_v: float | None
    probe_s: float
    since_probe: int
    probing: bool
    probed: bool
    _last_step: float = 0.0
    probe_reach: float = 0.0  # the largest exposure at the last probe: its proof covers this much
    probe_reach_now: float = 0.0
    _exposure_cache: tuple[np.ndarray, np.ndarray] | None

    def _step_v(self, c_best: float, i: int) -> float:
        """This point's step, signed: from the previous point's value to the fitted final value
        (on the first point, what the readings themselves have shown: at least their own span)."""
        final = self.y0 + (self.sy - c_best * self.sx[i]) / self.n if self.n else self.y0
        seen = abs(self.ys[-1] - self.ys[0]) + abs(c_best) if self.ys else 0.0
        if self.settled_v is None or abs(final - self.settled_v) < seen:
            return -math.copysign(seen, c_best)  # C > 0: the output is above its final value, a fall
        return final - self.settled_v

    def forget_steps(self) -> None:
        """RF went off (a resume, a reconnect): the earlier steps' tails are gone, and so is the value."""
        self.history.clear()
        self.settled_v = None

    def _remember_step(self, step_v: float) -> None:
        self.history.append((self.t_change, step_v))
        while self.history and self.history[0][0] < self.t_change - HISTORY_AGE * self.max_tau_s:
            self.history.popleft()

    def _exposure(self, step_v: float) -> tuple[np.ndarray, np.ndarray]:
        """Per tail time constant, the signed and the absolute sum of this step and the recent
        ones, each decayed to the first reading: a tail of share rho is now rho times the signed
        sum (linear superposition), and at most rho times the absolute one if rises and falls
        have different tails. The earlier steps' part is fixed for the point: computed once."""
        if self._exposure_cache is None:
            t_ref = self.t_change + self.t_first
            self._exposure_cache = exposure(list(self.history), t_ref, self.tail_taus)
        past_signed, past_abs = self._exposure_cache
        now = np.exp(-self.t_first / self.tail_taus)
        return past_signed + step_v * now, past_abs + abs(step_v) * now

    def _tail_caps(self, k: float) -> np.ndarray:
        """Per tail time constant, the share of a step allowed for: the plan's, or less once the
        pooled evidence of recent points proves less."""
        proven = pooled_share(list(self.tail_evidence) + [(r, s) for r, s, _ in self.proofs], k)
        caps = np.full(len(self.tail_taus), self.tail_share)
        return np.minimum(caps, proven) if proven.size else caps

    def _tail_drift(self, fast: int, s2: float, k: float, c_fast: float, ahead: np.ndarray) -> float:
        if self.tail_share <= 0:
            return 0.0
        fast_tau_s = float(self.grid[fast])
        self._last_step = self._step_v(c_fast, fast)
        _, reach = self._exposure(self._last_step)
        caps = self._tail_caps(k) * reach
        remaining = np.exp(-ahead[:, None] / self.tail_taus[None, :]).mean(axis=0)
        remaining = np.where(self.tail_taus >= fast_tau_s * 3.0, remaining, 0.0)
        if float((caps * remaining).max(initial=0.0)) <= 0.05 * self.tolerance_v:
            return 0.0  # the largest tail allowed for is negligible: no fit needed
        t, y = self._tail_readings()
        amp, se = slow_amplitudes(t, y, fast_tau_s, self.tail_taus, s2)
        self.probing = self._probe(amp, se, k, remaining > 0)
        self.probed |= self.probing
        return tail_bound(amp, se, k, caps, remaining)

    def _probe(self, amp: np.ndarray, se: np.ndarray, k: float, live: np.ndarray) -> bool:
        """Keep this point open until its own readings prove the tail small, when the run has not
        yet (the guard is what holds the point): at most once every TAIL_KEEP points, or when the
        steps have grown to twice what the last probe saw, and for at most probe_s. One long look
        proves far more than many short ones: within a short point a slow tail is a straight line,
        its amplitude known only to tau x the slope's error, which shrinks as the window to the
        power 1.5. Waiting never makes a point less accurate."""
        if self.t_last >= self.probe_s:
            return False
        signed, reach = self._exposure(self._last_step)
        self.probe_reach_now = float(reach.max())
        covered = max(self.proof_reach(), self.probe_reach if self.since_probe < TAIL_KEEP else 0.0)
        if not self.probed and self.probe_reach_now <= 2.0 * covered:
            return False  # a proof of this run, or a recent probe, covers steps this large
        usable = live & (np.abs(signed) >= 20 * self.tolerance_v)
        if not usable.any() or ((np.abs(amp) - k * se) > 0)[usable].any():
            return False  # nothing to learn a share from, or a tail shows: the guard, not a probe
        with np.errstate(divide="ignore", invalid="ignore"):
            future = k * se[usable] * reach[usable] / np.abs(signed[usable])
        return bool(future.max() > PROBE_TARGET * self.tolerance_v)

    def new_conditions(self) -> None:
        """The part's conditions changed (a new chamber temperature): what was proven about its
        tail held for the old ones, so it is forgotten and the next held point may probe again."""
        self.proofs.clear()
        self.tail_evidence.clear()
        self.since_probe, self.probe_reach = TAIL_KEEP, 0.0

    def proof_reach(self) -> float:
        """The largest exposure a kept proof covers: the part is the same all run (every frequency,
        and a resumed run, whose replay keeps the proofs again), so one long look serves them all."""
        return max((reach for _, _, reach in self.proofs), default=0.0)

    def _tail_readings(self) -> tuple[np.ndarray, np.ndarray]:
        """The readings for a tail fit: all of them, or an even subset of a long point (a subset
        knows less, so the bound only grows: safe, and the cost per judgement stays flat)."""
        stride = max(1, len(self.ts) // TAIL_READINGS)
        t = np.asarray(self.ts[::stride]) - self.t_first
        return t, np.asarray(self.ys[::stride]) - self.y0

    def _learn_tail(self, best: int, s2: float, c_best: float, k: float) -> None:
        """Keep what this point's readings prove about a tail's share of its step, and its value.
        Evidence precise enough to meet the probe target at this exposure (a probe's, or any long
        point's) is a proof: kept for the run rather than rolled off after TAIL_KEEP points."""
        fast_tau_s = float(self.grid[best])
        step = self._step_v(c_best, best)
        signed, reach = self._exposure(step) if self.tail_share > 0 else (None, None)
        self._remember_step(step)
        self.settled_v = float(np.mean(self.ys[-self.samples :]))
        if signed is None or reach is None:
            return  # no tail allowed for: nothing to learn about one (CPU: no exposure sums)
        # a share is learned only from a large exposure of one sign (rises and falls may differ)
        usable = (np.abs(signed) >= 20 * self.tolerance_v) & (np.abs(signed) >= 0.5 * reach)
        if not usable.any():
            return
        t, y = self._tail_readings()
        amp, se = slow_amplitudes(t, y, fast_tau_s, self.tail_taus, s2)
        with np.errstate(divide="ignore", invalid="ignore"):
            share = np.where(usable, amp / signed, 0.0)
            share_se = np.where(usable, se / np.abs(signed), math.inf)
            future = np.where(usable, k * share_se * reach, math.inf)
        if float(future[usable].max()) <= PROBE_TARGET * self.tolerance_v:
            self.proofs.append((share, share_se, float(reach.max())))
        else:
            self.tail_evidence.append((share, share_se))
