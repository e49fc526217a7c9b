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

from nightbench.analysis.fit import analyse_group, fit_line
from nightbench.analysis.uncertainty import (
    K_EXPANSION,
    build_budget,
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
    assert term.slope_mv_per_db == 0.0


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


def test_reported_uncertainty_is_k_times_the_root_sum_of_squares_of_the_included_terms():
    rng = np.random.default_rng(1)
    values = law(LEVELS) + rng.normal(0, 0.001, LEVELS.size)
    accuracy = {
        "source_level_accuracy_db": 0.5,
        "path_loss_accuracy_db": 0.1,
        "meter_gain_accuracy_pct": 0.01,
        "meter_offset_accuracy_v": 1e-4,
    }
    g = analyse_group(1e8, rows(LEVELS, values, stdev=0.0004), (-60, -20), 1.0, accuracy)
    used = [t for t in g.budget.terms if t.included]
    assert {t.key for t in g.budget.terms} - {t.key for t in used} == {"reading_scatter"}
    assert g.slope_u_mv_per_db == pytest.approx(2 * math.sqrt(sum(t.slope_mv_per_db**2 for t in used)))
    assert g.intercept_u_db == pytest.approx(2 * math.sqrt(sum(t.intercept_db**2 for t in used)))


def test_only_the_larger_type_a_estimate_is_combined():
    # Perfectly straight points with noisy samples: the residuals say ~0, the samples say more.
    g = analyse_group(1e8, rows(LEVELS, law(LEVELS), stdev=0.002, samples=4), (-60, -20), 1.0)
    terms = {t.key: t for t in g.budget.terms}
    assert terms["reading_scatter"].included and not terms["fit"].included
    expected_u_b, _ = propagate_through_fit(LEVELS, np.full(LEVELS.size, 0.001), 2.2, 0.025)  # 0.002/sqrt(4)
    assert g.slope_u_mv_per_db == pytest.approx(2 * expected_u_b * 1e3, rel=1e-9)


def test_no_reading_scatter_term_without_sample_spread():
    budget = build_budget(
        slope_v_per_db=0.025,
        intercept_v=2.2,
        u_slope_fit=1e-5,
        u_intercept_fit_db=0.01,
        residual_sd_v=1e-3,
        x=LEVELS,
        u_y=[None] * LEVELS.size,
        accuracy={},
    )
    assert [t.key for t in budget.terms if t.type == "A"] == ["fit"]
    assert budget.slope_u_mv_per_db == pytest.approx(1e-2)
