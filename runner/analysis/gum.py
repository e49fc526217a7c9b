"""The JCGM 100:2008 (GUM) arithmetic the budgets share: distributions, combination, coverage.

Kept apart from the budgets so each formula is written once and tested against the GUM on its
own: standard uncertainties of the usual distributions (4.2.3, 4.3.7, 4.3.9), the root sum of
squares of uncorrelated contributions (5.1.2), the Welch-Satterthwaite effective degrees of
freedom (G.4.1) and the coverage factor from the t distribution (G.3.2, G.6.4).

The coverage probability is 95.45 %: the GUM's own choice in Table G.2, where k = 2.00 for
infinite degrees of freedom, so a budget of Type B terms alone keeps the k = 2 reports had before,
and a budget with few degrees of freedom gets the larger t-based k it needs (G.6.4).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

COVERAGE = 0.9545
INFINITE = math.inf
DB_PER_NEPER = 20.0 / math.log(10.0)  # 8.686 dB of voltage ratio per unit of ln


def type_a_of_mean(stdev: float, n: int) -> float:
    """Experimental standard deviation of the mean of n samples, GUM 4.2.3: s/sqrt(n)."""
    return stdev / math.sqrt(n)


def rectangular(half_width: float) -> float:
    """Standard uncertainty of a rectangular distribution of half-width a, GUM 4.3.7: a/sqrt(3)."""
    return half_width / math.sqrt(3.0)


def u_shaped(half_width: float) -> float:
    """Standard uncertainty of a U-shaped (arcsine) distribution of half-width a: a/sqrt(2)
    (GUM 4.3.9's note on other distributions; the law of a cosine of a uniform phase)."""
    return half_width / math.sqrt(2.0)


def combine(*contributions: float) -> float:
    """Combined standard uncertainty of uncorrelated contributions, GUM 5.1.2 (root sum of squares)."""
    return math.sqrt(sum(c * c for c in contributions))


def expand(u: float, k: float = 2.0) -> float:
    """Expanded uncertainty U = k u, GUM 6.2.1."""
    return k * u


def welch_satterthwaite(contributions: Sequence[float], dofs: Sequence[float]) -> float:
    """Effective degrees of freedom of u_c = rss(contributions), GUM G.4.1 (eq. G.2b):
    nu_eff = u_c^4 / sum(u_i^4 / nu_i); terms with infinite nu_i add nothing to the sum."""
    uc4 = sum(c * c for c in contributions) ** 2
    denom = sum(c**4 / nu for c, nu in zip(contributions, dofs) if c and math.isfinite(nu))
    if uc4 == 0.0 or denom == 0.0:
        return INFINITE
    return uc4 / denom


def coverage_factor(nu_eff: float, p: float = COVERAGE) -> float:
    """k = t_p(nu_eff), GUM G.3.2 and G.6.4: the t distribution's two-sided p quantile (scipy as the
    reference implementation); the normal one for infinite degrees of freedom. A fractional
    nu_eff is used as it is (scipy's t accepts it) rather than truncated: GUM G.6.4 truncates,
    which only rounds k up slightly for small nu_eff."""
    return float(coverage_factors(nu_eff, p))


def coverage_factors(nu_eff: Any, p: float = COVERAGE) -> Any:
    """coverage_factor for an array of degrees of freedom at once (inf: the normal quantile).

    scipy.special's quantiles (stdtrit, ndtri) are the ones scipy.stats' t and norm use, without
    scipy.stats' import (about 1 s of CPU in every `run` and `report` process)."""
    import numpy as np
    from scipy import special

    q = 0.5 + p / 2.0
    nu = np.asarray(nu_eff, dtype=float)
    finite = np.clip(np.nan_to_num(nu, posinf=1.0), 1.0, None)
    return np.where(np.isfinite(nu), special.stdtrit(finite, q), special.ndtri(q))


def mismatch_limits_db(gamma_source: float, gamma_dut: float) -> tuple[float, float]:
    """The mismatch limits 20 log10(1 -/+ |Gs||Gl|) in dB (common practice): the level delivered
    differs from the matched case by a factor |1 - Gs Gl|^-1 in voltage, whose phase is unknown."""
    product = gamma_source * gamma_dut
    return 20.0 * math.log10(1.0 - product), 20.0 * math.log10(1.0 + product)


def mismatch_u_db(gamma_source: float, gamma_dut: float) -> float:
    """Standard uncertainty of the mismatch term in dB: U-shaped of half-width the mean of the two
    limits' sizes (to first order 8.686 |Gs||Gl|), u = a/sqrt(2)."""
    low, high = mismatch_limits_db(gamma_source, gamma_dut)
    return u_shaped((high - low) / 2.0)


def gamma_from_return_loss(return_loss_db: float) -> float:
    """|Gamma| = 10^(-RL/20) (common practice)."""
    return 10.0 ** (-return_loss_db / 20.0)
