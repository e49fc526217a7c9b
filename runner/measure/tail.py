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

    Columns 1, exp(-t/tau_f), (t/tau_f) exp(-t/tau_f), exp(-t/tau_s). The third is the derivative
    of the second in tau_f: the main part's time constant is known only to the detector's grid
    step (4 %), and on a large step that small misfit looks like a slow tail of the same sign
    point after point (measured on the simulated bench: 0.7 mV, ten standard errors, after a
    1.2 V fall with tau_f 0.7 % off the grid). The first three are projected out (an orthonormal
    basis of their centred columns), leaving one regression per tau_s: C_s = <x, y> / <x, x> with
    se = sqrt(s2 / <x, x>) over the projected x and y (the same numbers as the 4 x 4 normal
    equations). Where the slow column is nearly a combination of the others (a window short
    against tau_s), or tau_s is not clearly slower than tau_f, se is infinite: no evidence.
    """
    amp = np.zeros(len(taus))
    se = np.full(len(taus), math.inf)
    use = taus >= fast_tau_s * TAIL_SEPARATION
    if len(t) < 5 or not use.any():
        return amp, se
    ef = np.exp(-t / fast_tau_s)
    fast = np.column_stack([ef, (t / fast_tau_s) * ef])
    fast -= fast.mean(axis=0)
    keep = np.linalg.norm(fast, axis=0) > 0
    basis = np.linalg.qr(fast[:, keep])[0] if keep.any() else np.zeros((len(t), 0))
    yc = y - y.mean()
    yc = yc - basis @ (basis.T @ yc)
    xs = np.exp(-t[None, :] / taus[use][:, None])  # (m, n)
    xs -= xs.mean(axis=1, keepdims=True)
    ss = np.einsum("mn,mn->m", xs, xs)
    xs = xs - (xs @ basis) @ basis.T
    d = np.einsum("mn,mn->m", xs, xs)
    num = xs @ yc
    ok = d > COLLINEAR * ss
    a, s = np.zeros(len(d)), np.full(len(d), math.inf)
    a[ok] = num[ok] / d[ok]
    s[ok] = np.sqrt(s2 / d[ok])
    amp[use], se[use] = a, s
    return amp, se


def tail_bound(amp: np.ndarray, se: np.ndarray, k: float, cap_v: np.ndarray, remaining: np.ndarray) -> float:
    """Upper bound on the mean drift a slow tail could still cause over the next readings.

    Per tau_s: the amplitude the data allow (|C_s| + k se), but no more than `cap_v` (the plan's
    share of the recent steps, or less where the run's evidence proves less) unless the data show
    more than that; times the share of it still to come (`remaining`, the mean of exp(-t/tau_s)
    over the readings ahead).
    """
    hi = np.abs(amp) + k * se
    shown = (np.abs(amp) - k * se) > cap_v  # the data show more tail than the cap: believe them
    bounded = np.where(shown, hi, np.minimum(hi, cap_v))
    with np.errstate(invalid="ignore"):
        drift = np.where(remaining > 0, bounded * remaining, 0.0)
    return float(drift.max()) if drift.size else 0.0


def exposure(history: list[tuple[float, float]], t_ref: float, taus: np.ndarray) -> np.ndarray:
    """Per tau_s, the rises and the falls among earlier steps (time of the change, signed size),
    each decayed to t_ref by exp(-(t_ref - t)/tau_s), as columns (m, 2): a tail whose share of a
    rise is rho_r and of a fall rho_f is now rho_r times the first plus rho_f times the second
    behind its final value (linear superposition; rises and falls may have different tails)."""
    out = np.zeros((len(taus), 2))
    if not history:
        return out
    at, size = np.array(history).T
    decay = np.exp(-np.maximum(t_ref - at, 0.0)[:, None] / taus[None, :])
    out[:, 0] = np.where(size > 0, size, 0.0) @ decay
    out[:, 1] = np.where(size < 0, size, 0.0) @ decay
    return out


class ShareEvidence:
    """What the run's points prove about a tail's share of a rise and of a fall, per tau_s.

    Each point that had a large exposure x = (rises, falls) fitted a slow amplitude C_s (se) over
    its own readings; C_s = -(rho_r x_r + rho_f x_f) + noise. Pooled over points this is a
    weighted least-squares regression through the origin, kept as its sums (M = sum x x^T/se^2,
    v = sum x C_s/se^2), so it lasts the run at a fixed cost and a long look at one point counts
    for every later one. A point's own mix of rises and falls does not matter: any two points with
    different mixes tell both shares apart. The next point's tail, at its exposure x', is then
    bounded by |x'.beta| + k sqrt(x'^T M^-1 x'), widened by the Birge ratio when the points
    disagree with one pair of shares by more than their errors allow (the fit's chi^2 over its
    degrees of freedom; common practice in pooling measurements).
    """

    RIDGE_SHARES = 10.0  # a direction no point has seen has a share uncertainty of 10 x the plan's cap

    def __init__(self, taus: np.ndarray, share: float) -> None:
        self.m = len(taus)
        self.share = share
        self.clear()

    def clear(self) -> None:
        self.info = np.zeros((self.m, 2, 2))
        self.vec = np.zeros((self.m, 2))
        self.ssq = np.zeros(self.m)
        self.points = np.zeros(self.m)

    def __len__(self) -> int:
        return int(self.points.max(initial=0.0))

    def add(self, x: np.ndarray, amp: np.ndarray, se: np.ndarray) -> None:
        """One point's evidence: its exposure x (m, 2), fitted slow amplitude and its se (m,)."""
        ok = np.isfinite(se) & (se > 0)
        w = np.where(ok, 1.0 / np.where(ok, se, 1.0) ** 2, 0.0)
        a = np.where(ok, amp, 0.0)
        self.info += w[:, None, None] * x[:, :, None] * x[:, None, :]
        self.vec += (w * a)[:, None] * x
        self.ssq += w * a * a
        self.points += ok

    def _solve(self, extra: tuple[np.ndarray, np.ndarray] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Per tau_s: the shares beta (m, 2) and their covariance (m, 2, 2), widened by the Birge
        ratio (the fit's chi^2 over its degrees of freedom). `extra` (x, se) adds one more point's
        precision, not its value."""
        ridge = (self.RIDGE_SHARES * max(self.share, 1e-6)) ** -2
        info = self.info + ridge * np.eye(2)[None, :, :]
        if extra is not None:
            xe, se = extra
            ok = np.isfinite(se) & (se > 0)
            w = np.where(ok, 1.0 / np.where(ok, se, 1.0) ** 2, 0.0)
            info = info + w[:, None, None] * xe[:, :, None] * xe[:, None, :]
        cov = np.linalg.inv(info)
        beta = np.einsum("mij,mj->mi", cov, self.vec)
        chi2 = np.maximum(self.ssq - np.einsum("mi,mi->m", beta, self.vec), 0.0)
        dof = self.points - 2
        birge = np.where(dof > 0, np.maximum(1.0, chi2 / np.maximum(dof, 1.0)), 1.0)
        return beta, cov * birge[:, None, None]

    def predict(
        self, x: np.ndarray, extra: tuple[np.ndarray, np.ndarray] | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Per tau_s, the slow amplitude the evidence predicts at exposure x (m, 2), x.beta (signed,
        as C_s), and its standard error (Birge ratio included). `extra` (x, se) adds one more
        point's precision, not its value: how far its readings would narrow it (a probe)."""
        beta, cov = self._solve(extra)
        return np.einsum("mi,mi->m", x, beta), np.sqrt(np.einsum("mi,mij,mj->m", x, cov, x))

    def bound(self, x: np.ndarray, k: float) -> np.ndarray:
        """Per tau_s, the largest slow amplitude allowed for at exposure x: the smaller of the
        joint bound |x.beta| + k se and the sum over rises and falls of each one's share bound
        (|beta_i| + k se_i, but at most the plan's share) times its exposure. The second keeps a
        well-proven direction tight when the other has not been seen (its share then unknown
        within the plan's cap, not within the ridge's ten times that)."""
        beta, cov = self._solve()
        joint = np.abs(np.einsum("mi,mi->m", x, beta)) + k * np.sqrt(np.einsum("mi,mij,mj->m", x, cov, x))
        marginal = np.abs(beta) + k * np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
        per_direction = (np.minimum(marginal, self.share) * np.abs(x)).sum(axis=1)
        return np.minimum(joint, per_direction)
