"""The uncertainty arithmetic against JCGM 100:2008 (GUM), and its propagation against Monte Carlo.

The Monte Carlo checks follow JCGM 101:2008 (propagation of distributions): draw the inputs from
their stated distributions, repeat the real analysis, and compare the spread of the results
with the budget's first-order (GUM) standard uncertainties. numpy and scipy are the references.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from nightbench.analysis.budget import build_budget
from nightbench.analysis.fit import analyse_group, fit_line
from nightbench.analysis.gum import coverage_factor, welch_satterthwaite
from nightbench.analysis.uncertainty import (
    K_EXPANSION,
    combine,
    expand,
    propagate_through_fit,
    rectangular,
    type_a_of_mean,
)

LEVELS = np.arange(-60.0, -19.0, 2.0)


def law(p: np.ndarray) -> np.ndarray:
    """An invented detector: 25 mV/dB, 0 V at -88 dBm."""
    return 0.025 * (p + 88.0)


def rows(levels: np.ndarray, values: np.ndarray, stdev: float | None = None, samples: int = 4) -> list[dict]:
    return [
        {"power_dbm": float(p), "value_v": float(v), "settled": 1, "overload": 0, "stdev_v": stdev, "samples": samples}
        for p, v in zip(levels, values)
    ]


def test_elementary_formulas_are_the_gum_ones():
    samples = np.array([0.5012, 0.5009, 0.5015, 0.5011, 0.5008])
    # JCGM 100:2008 4.2.2-4.2.3: s(q) with n - 1, s(mean) = s/sqrt(n); numpy/scipy as the reference
    assert type_a_of_mean(float(np.std(samples, ddof=1)), 5) == pytest.approx(stats.sem(samples), rel=1e-12)
    # JCGM 100:2008 4.3.7: rectangular of half-width a has u = a/sqrt(3); scipy's uniform on [-a, a]
    assert rectangular(0.5) == pytest.approx(stats.uniform(loc=-0.5, scale=1.0).std(), rel=1e-12)
    assert rectangular(0.5) == pytest.approx(0.288675, abs=1e-6)
    # JCGM 100:2008 5.1.2 (uncorrelated, sensitivities applied) and 6.2.1 (U = k u_c, k = 2)
    assert combine(0.3, 0.4) == pytest.approx(0.5)
    assert K_EXPANSION == 2.0 and expand(0.5) == pytest.approx(1.0)


def test_reading_scatter_propagation_matches_monte_carlo():
    # JCGM 101 style: points whose means scatter with known u(y_i), refitted many times.
    rng = np.random.default_rng(3)
    u_y = np.linspace(0.0005, 0.002, LEVELS.size)  # noise grows toward one end, as near a floor
    fits = [fit_line(LEVELS, law(LEVELS) + rng.normal(0, u_y)) for _ in range(4000)]
    u_b, u_x0 = propagate_through_fit(LEVELS, u_y, -0.025 * -88.0, 0.025)
    assert u_b == pytest.approx(np.std([f.slope_v_per_db for f in fits]), rel=0.05)
    assert u_x0 == pytest.approx(np.std([f.intercept_dbm for f in fits]), rel=0.05)


def test_equal_point_noise_gives_the_textbook_fit_uncertainty():
    # With equal u(y_i) = s, the propagation is the least-squares formula u(b) = s/sqrt(Sxx).
    s = 0.001
    u_b, _ = propagate_through_fit(LEVELS, np.full(LEVELS.size, s), 2.2, 0.025)
    assert u_b == pytest.approx(s / math.sqrt(((LEVELS - LEVELS.mean()) ** 2).sum()), rel=1e-12)


@pytest.mark.parametrize("key, half_width", [("source_level_accuracy_db", 0.5), ("path_loss_accuracy_db", 0.2)])
def test_level_offsets_move_the_intercept_by_a_over_root_3(key, half_width):
    # Monte Carlo of a level offset common to a group, drawn from the rectangular distribution:
    # the fitted intercept moves one for one, the slope not at all.
    rng = np.random.default_rng(5)
    offsets = rng.uniform(-half_width, half_width, 20000)
    x0 = [fit_line(LEVELS + d, law(LEVELS)).intercept_dbm for d in offsets[:2000]]
    g = analyse_group(1e8, rows(LEVELS, law(LEVELS)), (-60, -20), 1.0, {key: half_width})
    term = next(t for t in g.budget.terms if t.key in key)
    assert term.intercept_db == pytest.approx(np.std(x0), rel=0.05)
    assert term.intercept_db == pytest.approx(half_width / math.sqrt(3))
    assert term.slope_mv_per_db == pytest.approx(0.0, abs=1e-12)  # a straight law: the slope does not move


def test_meter_gain_scales_the_slope_and_offset_moves_the_intercept():
    rng = np.random.default_rng(9)
    gain_pct, offset_v = 0.05, 0.002
    gains = rng.uniform(-gain_pct / 100, gain_pct / 100, 2000)
    slopes = [fit_line(LEVELS, law(LEVELS) * (1 + g)).slope_v_per_db * 1e3 for g in gains]
    offsets = rng.uniform(-offset_v, offset_v, 2000)
    x0 = [fit_line(LEVELS, law(LEVELS) + o).intercept_dbm for o in offsets]
    g = analyse_group(
        1e8,
        rows(LEVELS, law(LEVELS)),
        (-60, -20),
        1.0,
        {"meter_gain_accuracy_pct": gain_pct, "meter_offset_accuracy_v": offset_v},
    )
    terms = {t.key: t for t in g.budget.terms}
    assert terms["meter_gain"].slope_mv_per_db == pytest.approx(np.std(slopes), rel=0.05)
    assert terms["meter_offset"].intercept_db == pytest.approx(np.std(x0), rel=0.05)
    assert terms["meter_gain"].intercept_db == 0.0 and terms["meter_offset"].slope_mv_per_db == 0.0


def test_reported_uncertainty_is_k_times_the_root_sum_of_squares_with_k_from_welch_satterthwaite():
    # issue 14: U = k u_c with k = t_95.45(nu_eff), nu_eff by JCGM 100:2008 G.4.1 (eq. G.2b);
    # scipy.stats.t as the reference for k; the Type B terms have infinite degrees of freedom.
    rng = np.random.default_rng(1)
    values = law(LEVELS) + rng.normal(0, 0.0002, LEVELS.size)
    accuracy = {
        "source_level_accuracy_db": 0.5,
        "path_loss_accuracy_db": 0.1,
        "meter_gain_accuracy_pct": 0.01,
        "meter_offset_accuracy_v": 1e-4,
    }
    g = analyse_group(1e8, rows(LEVELS, values, stdev=0.0004), (-60, -20), 1.0, accuracy)
    used = [t for t in g.budget.terms if t.included and (t.slope_mv_per_db or t.intercept_db)]
    assert {t.key for t in used} == {"reading_scatter", "source_level", "path_loss", "meter_gain", "meter_offset"}
    for quantity, value in (("slope", g.slope_u_mv_per_db), ("intercept", g.intercept_u_db)):
        parts = [t.u(quantity) for t in used if t.u(quantity)]
        dofs = [t.dof for t in used if t.u(quantity)]
        uc = math.sqrt(sum(p * p for p in parts))
        nu = sum(p * p for p in parts) ** 2 / sum(p**4 / d for p, d in zip(parts, dofs) if math.isfinite(d))
        assert value == pytest.approx(stats.t.ppf(0.5 + 0.9545 / 2, nu) * uc, rel=1e-9)
    assert g.slope_nu_eff == pytest.approx(g.budget.nu_eff("slope")) and g.slope_k > 2.0


def test_lack_of_fit_does_not_enter_the_budget():
    # issue 14: a part's own ripple (residuals 10x the noise, lag-1 autocorrelation near 1) is reported,
    # not combined: the slope's U is the reading scatter's alone, as propagate_through_fit gives it.
    ripple = 0.025 * 0.15 * np.sin(2 * np.pi * LEVELS / 10.0)
    g = analyse_group(1e8, rows(LEVELS, law(LEVELS) + ripple, stdev=0.0004, samples=4), (-60, -20), 1.0)
    assert [t.key for t in g.budget.terms if t.type == "A"] == ["reading_scatter"]
    expected_u_b, _ = propagate_through_fit(LEVELS, np.full(LEVELS.size, 0.0002), 2.2, 0.025)  # 0.0004/sqrt(4)
    assert g.budget.uc("slope") == pytest.approx(expected_u_b * 1e3, rel=0.05)
    lof = g.budget.lack_of_fit
    # residuals 10x the noise; neighbours correlated as a sine sampled 5 times a period: cos(2 pi / 5) = 0.31,
    # where white noise would give about -1/n (common practice); numpy's correlate as the estimator's reference
    e = np.array([c["error_db"] for c in g.curve if c["status"] == "in_fit"])
    e = e - e.mean()
    assert lof["residual_to_noise"] > 5
    assert lof["lag1_autocorrelation"] == pytest.approx(np.correlate(e, e, "full")[e.size] / (e @ e), rel=1e-9)
    assert lof["lag1_autocorrelation"] == pytest.approx(math.cos(2 * math.pi / 5), abs=0.05)
    # the ripple's rms over whole periods is 0.15/sqrt(2) dB less what the line absorbs (from the law above)
    assert 0.05 < lof["rms_db"] < 0.15 / math.sqrt(2) + 1e-9


def test_with_no_measured_scatter_the_residuals_stand_in_and_say_so():
    budget = build_budget(
        slope_v_per_db=0.025,
        intercept_v=2.2,
        residual_sd_v=1e-3,
        x=LEVELS,
        u_y=[None] * LEVELS.size,
    )
    assert [t.key for t in budget.terms if t.type == "A"] == ["residual_scatter"]
    u_b, _ = propagate_through_fit(LEVELS, np.full(LEVELS.size, 1e-3), 2.2, 0.025)
    assert budget.uc("slope") == pytest.approx(u_b * 1e3)
    assert budget.nu_eff("slope") == pytest.approx(LEVELS.size - 2)  # n - 2 degrees of freedom of a line's residuals


def test_welch_satterthwaite_and_k_follow_the_gum():
    # JCGM 100:2008 G.4.1, eq. (G.2b), by hand: u = (1, 1), nu = (4, inf) -> nu_eff = 2^2 / (1/4) = 16
    assert welch_satterthwaite([1.0, 1.0], [4.0, math.inf]) == pytest.approx(16.0)
    assert welch_satterthwaite([0.3, 0.4], [math.inf, math.inf]) == math.inf
    # JCGM 100:2008 Table G.2, p = 95.45 % (from memory): nu = 1, 2, 3, 10, 20, 50, inf -> k
    for nu, k in ((1, 13.97), (2, 4.53), (3, 3.31), (10, 2.28), (20, 2.13), (50, 2.05), (math.inf, 2.00)):
        assert coverage_factor(nu) == pytest.approx(k, abs=0.006)
