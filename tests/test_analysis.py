"""The straight-line fit and what is derived from it, against outside references."""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from nightbench.analysis.fit import analyse_group, fit_line, range_within

DATA = Path(__file__).parent / "data"


def _norris():
    lines = [line for line in (DATA / "nist-strd-norris.csv").read_text().splitlines() if not line.startswith("#")]
    rows = list(csv.DictReader(lines))
    return [float(r["x"]) for r in rows], [float(r["y"]) for r in rows]


def test_fit_matches_nist_strd_norris_certified_values():
    # Certified values: NIST StRD, linear regression, "Norris" (tests/data/nist-strd-norris.csv).
    x, y = _norris()
    fit = fit_line(x, y)
    assert fit.intercept_v == pytest.approx(-0.262323073774029, rel=1e-9)
    assert fit.slope_v_per_db == pytest.approx(1.00211681802045, rel=1e-12)
    assert fit.u_intercept_v == pytest.approx(0.232818234301152, rel=1e-9)
    assert fit.u_slope_v_per_db == pytest.approx(0.429796848199937e-03, rel=1e-9)
    assert fit.residual_sd_v == pytest.approx(0.884796396144373, rel=1e-9)


def test_fit_matches_scipy_linregress():
    # Reference library: scipy.stats.linregress on noisy detector-like data.
    rng = np.random.default_rng(7)
    p = np.arange(-80, -9, 1.0)
    v = 0.02 * (p + 90) + rng.normal(0, 0.002, p.size)
    ref = stats.linregress(p, v)
    fit = fit_line(p, v)
    assert fit.slope_v_per_db == pytest.approx(ref.slope, rel=1e-12)
    assert fit.intercept_v == pytest.approx(ref.intercept, rel=1e-10)
    assert fit.u_slope_v_per_db == pytest.approx(ref.stderr, rel=1e-10)
    assert fit.u_intercept_v == pytest.approx(ref.intercept_stderr, rel=1e-10)


def test_ideal_detector_slope_trade_check():
    # Common practice: an output rising 2.0 V over a 110 dB input span is 2000/110 = 18.18 mV/dB.
    p = np.linspace(-100, 10, 111)
    v = 2.0 * (p + 100) / 110
    rows = [{"power_dbm": a, "value_v": b, "settled": 1, "overload": 0} for a, b in zip(p, v)]
    g = analyse_group(1e9, rows, (-90, 0), 1.0)
    assert round(g.slope_mv_per_db, 2) == 18.18
    assert g.intercept_dbm == pytest.approx(-100, abs=1e-9)  # where the line reaches 0 V
    assert g.dynamic_range_db == pytest.approx(110.0)
    assert g.max_abs_error_db == pytest.approx(0, abs=1e-9)


def test_intercept_uncertainty_follows_gum_propagation():
    # JCGM 100:2008 eq. (13): u^2(x0) = sum (df/dxi)^2 u^2(xi) + 2 df/da df/db u(a,b), x0 = -a/b;
    # checked against a Monte Carlo of the same fit (JCGM 101 idea, numpy as the reference).
    rng = np.random.default_rng(11)
    p = np.arange(-60, -19, 2.0)
    sigma = 0.003
    fits = [fit_line(p, 0.025 * (p + 88) + rng.normal(0, sigma, p.size)) for _ in range(4000)]
    spread = np.std([f.intercept_dbm for f in fits])
    mean_u = np.mean([f.u_intercept_dbm for f in fits])
    assert mean_u == pytest.approx(spread, rel=0.05)


def test_range_ends_are_interpolated_to_a_tenth_of_a_db():
    levels = np.array([-50, -40, -30, -20, -10, 0.0])
    errors = np.array([2.0, 0.5, 0.0, 0.0, 0.25, 1.25])
    low, high = range_within(levels, errors, (-30, -20), 1.0)
    assert low == pytest.approx(-40 - 10 * 0.5 / 1.5, abs=0.05)  # |e| crosses 1.0 a third of the way
    assert high == pytest.approx(-10 + 10 * 0.75 / 1.0, abs=0.05)
    assert math.isclose(low, round(low, 1)) and math.isclose(high, round(high, 1))


def test_points_that_did_not_settle_or_overloaded_are_left_out_and_named():
    # An ideal 20 mV/dB law; the bad points carry garbage that would bend the fit if it were used.
    p = np.arange(-70.0, 1.0, 2.0)
    rows = [{"power_dbm": a, "value_v": 0.02 * (a + 90), "settled": 1, "overload": 0} for a in p]
    rows[10].update(value_v=9.9, settled=0)  # -50 dBm: timed out while settling
    rows[-1].update(value_v=None, settled=0, overload=1)  # 0 dBm: meter over range
    g = analyse_group(1e8, rows, (-60, -20), 1.0)
    assert g.slope_mv_per_db == pytest.approx(20.0) and g.intercept_dbm == pytest.approx(-90.0)
    assert (g.points, g.unsettled_points, g.overload_points) == (36, 1, 1)
    assert g.excluded == [{"power_dbm": -50.0, "reason": "unsettled"}, {"power_dbm": 0.0, "reason": "overload"}]
    # the range runs to the last usable point and says it is the end of the sweep, not a crossing
    assert (g.range_low_dbm, g.range_high_dbm) == (-70.0, -2.0)
    assert g.range_low_at_sweep_end and g.range_high_at_sweep_end


def test_conformance_error_is_the_voltage_residual_divided_by_the_slope():
    # Definition (common practice): error_dB = (V - V_fit) / slope. 10 mV above a 20 mV/dB line = +0.5 dB.
    p = np.arange(-60.0, -19.0, 5.0)
    rows = [{"power_dbm": a, "value_v": 0.02 * (a + 90), "settled": 1, "overload": 0} for a in p]
    rows.append({"power_dbm": -10.0, "value_v": 0.02 * 80 + 0.010, "settled": 1, "overload": 0})
    g = analyse_group(1e8, rows, (-60, -20), 1.0)
    assert dict(g.errors_db)[-10.0] == pytest.approx(0.5)
    assert g.max_abs_error_db == pytest.approx(0.0, abs=1e-9)  # only the fit range counts
