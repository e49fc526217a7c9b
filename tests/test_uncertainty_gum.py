"""The budget's arithmetic against outside references: JCGM 100:2008 Annex H.3 (a straight-line
calibration), JCGM 101:2008 (Monte Carlo) for the mismatch term, and the mismatch limits of common
practice; the plan's mismatch keys as bad input."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from nightbench.analysis.budget import build_budget
from nightbench.analysis.fit import fit_line
from nightbench.analysis.gum import gamma_from_return_loss, mismatch_limits_db, mismatch_u_db
from nightbench.analysis.stated import Stated
from nightbench.analysis.uncertainty import line_u_at
from nightbench.drivers.errors import InputError
from nightbench.plan.load import parse_plan
from tests.conftest import OFFLINE, plan_dict

H3 = Path(__file__).parent / "data" / "gum-h3-thermometer.csv"


def test_straight_line_calibration_matches_gum_annex_h3():
    # JCGM 100:2008 H.3 (data and results from memory, tests/data/README.md): least squares of the
    # corrections b_k against t_k - t0, t0 = 20 degC; every published result must follow from the data.
    rows = [line.split(",") for line in H3.read_text().splitlines() if line and not line.startswith("#")]
    data = np.array([[float(r[1]), float(r[2])] for r in rows[1:]])
    t, b = data[:, 0], data[:, 1]
    assert t.size == 11
    fit = fit_line(t - 20.0, b)
    assert fit.intercept_v == pytest.approx(-0.1712, abs=0.00005)  # y1, degC
    assert fit.slope_v_per_db == pytest.approx(0.00218, abs=0.000005)  # y2
    assert fit.u_intercept_v == pytest.approx(0.0029, abs=0.00005)  # s(y1)
    assert fit.u_slope_v_per_db == pytest.approx(0.00067, abs=0.000005)  # s(y2)
    assert fit.cov_ab / (fit.u_intercept_v * fit.u_slope_v_per_db) == pytest.approx(-0.930, abs=0.0005)  # r
    assert fit.residual_sd_v == pytest.approx(0.0035, abs=0.00005)  # s
    # the predicted correction at 30 degC and its standard uncertainty, H.3.4: the product's line_u_at
    # (the fitted line's u at a point from the points' u, here the residual s at each) gives it
    at = np.array([10.0])
    assert fit.intercept_v + 10.0 * fit.slope_v_per_db == pytest.approx(-0.1494, abs=0.00005)
    assert line_u_at(t - 20.0, np.full(t.size, fit.residual_sd_v), at)[0] == pytest.approx(0.0041, abs=0.00005)


@pytest.mark.parametrize("gs, gl", [(0.1, 0.1), (0.2, 0.05), (1 / 3, 0.3)])
def test_mismatch_limits_are_the_common_practice_formula(gs, gl):
    # common practice: the level differs from the matched case by |1 - Gs Gl|^-1 in voltage, so by
    # 20 log10(1 +/- |Gs||Gl|) dB at the extreme phases; checked at the phases themselves
    low, high = mismatch_limits_db(gs, gl)
    assert low == pytest.approx(20 * math.log10(1 - gs * gl), rel=1e-12)
    assert high == pytest.approx(20 * math.log10(1 + gs * gl), rel=1e-12)
    phases = np.linspace(0, 2 * np.pi, 3601)
    level = 20 * np.log10(np.abs(1 + gs * gl * np.exp(1j * phases)))
    assert level.min() == pytest.approx(low, abs=1e-6) and level.max() == pytest.approx(high, abs=1e-9)


def test_return_loss_converts_to_a_reflection_magnitude():
    # common practice: RL = -20 log10 |Gamma|; 20 dB -> 0.1, 14 dB -> 0.1995
    assert gamma_from_return_loss(20.0) == pytest.approx(0.1)
    assert gamma_from_return_loss(14.0) == pytest.approx(0.19953, abs=1e-5)


@pytest.mark.parametrize("rl_source, rl_dut", [(20.0, 20.0), (14.0, 10.0)])
def test_mismatch_term_against_monte_carlo(rl_source, rl_dut):
    # JCGM 101:2008 (propagation of distributions): |Gs|, |Gl| as stated, the relative phase uniform on
    # [0, 2 pi); 10^6 trials (JCGM 101 7.2.1's default M). The budget's U-shaped term (u = a/sqrt(2))
    # must give the Monte Carlo standard deviation; the Monte Carlo 95.45 % probabilistically symmetric
    # interval lies inside the budget's +/- 2u (a U-shaped term alone is covered conservatively by k = 2).
    gs, gl = gamma_from_return_loss(rl_source), gamma_from_return_loss(rl_dut)
    rng = np.random.default_rng(101)
    phase = rng.uniform(0.0, 2 * np.pi, 1_000_000)
    error_db = 20 * np.log10(np.abs(1 - gs * gl * np.exp(1j * phase)))
    stated = Stated(gamma_source=gs, gamma_dut=gl)
    levels = np.arange(-60.0, -19.0, 2.0)
    budget = build_budget(
        slope_v_per_db=0.025, intercept_v=2.2, residual_sd_v=0.0, x=levels, u_y=[1e-4] * levels.size, stated=stated
    )
    term = next(t for t in budget.terms if t.key == "mismatch")
    assert term.intercept_db == pytest.approx(mismatch_u_db(gs, gl))
    assert term.slope_mv_per_db == 0.0  # one offset at every level of a group: the slope does not move
    assert term.intercept_db == pytest.approx(float(np.std(error_db)), rel=0.01)
    low, high = np.quantile(error_db, [(1 - 0.9545) / 2, (1 + 0.9545) / 2])
    assert -2 * term.intercept_db < low < high < 2 * term.intercept_db
    # and the interval's ends sit near the limits, as an arcsine law's do (sin(pi/2 * 0.9545) = 0.9975)
    limits = mismatch_limits_db(gs, gl)
    assert low == pytest.approx(limits[0], rel=0.03) and high == pytest.approx(limits[1], rel=0.03)


@pytest.mark.parametrize(
    "mismatch, key, words",
    [
        ({"source_gamma": 0.1, "source_return_loss_db": 20, "dut_gamma": 0.1}, "analysis.mismatch", "exactly one"),
        ({"source_gamma": 0.1}, "analysis.mismatch", "dut_gamma or dut_return_loss_db"),
        ({"source_gamma": 1.2, "dut_gamma": 0.1}, "analysis.mismatch.source_gamma", "less than 1"),
        ({"source_gamma": 0.1, "dut_return_loss_db": -3}, "analysis.mismatch.dut_return_loss_db", "greater than 0"),
    ],
)
def test_bad_mismatch_keys_name_the_key(mismatch, key, words):
    plan = plan_dict(OFFLINE, analysis={"fit_dbm": [-60, -20], "mismatch": mismatch})
    text = yaml.safe_dump(plan, sort_keys=False)
    with pytest.raises(InputError) as info:
        parse_plan(text, "p.yaml")
    assert info.value.key == key and words in info.value.message and info.value.line is not None


def test_a_plan_with_mismatch_and_linearity_keys_is_valid():
    analysis = {
        "fit_dbm": [-60, -20],
        "source_linearity_db": 0.05,
        "mismatch": {"source_gamma": 0.1, "dut_return_loss_db": 15},
    }
    loaded = parse_plan(yaml.safe_dump(plan_dict(OFFLINE, analysis=analysis), sort_keys=False), "p.yaml")
    stated = Stated.from_plan(loaded.plan.model_dump(mode="json"))
    assert stated.gamma_source == 0.1 and stated.gamma_dut == pytest.approx(gamma_from_return_loss(15))
    assert stated.accuracy["source_linearity_db"] == 0.05
