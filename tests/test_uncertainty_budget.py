"""The budget's parts (issue 14): repeats and hysteresis, a calibration in place of the source's
accuracy, uncertainties on every point's error and on the range ends, and differences between runs
tested against what the runs do not share. In process; numpy and scipy as the references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from nightbench.analysis.compare import Difference
from nightbench.analysis.fit import analyse_group
from nightbench.analysis.gum import rectangular
from nightbench.analysis.report import build_report
from nightbench.analysis.stated import Stated
from nightbench.analysis.uncertainty import level_sensitivity, line_u_at, propagate_through_fit
from nightbench.plan.calibration import format_calibration
from nightbench.store.db import Store
from tests.conftest import store_run

LEVELS = np.arange(-60.0, -19.0, 2.0)
BENCH = {"source": {"driver": "scpi-source", "resource": "TCPIP::10.0.0.1::5025::SOCKET"}}


def law(p):
    """An invented detector: 25 mV/dB, 0 V at -88 dBm."""
    return 0.025 * (np.asarray(p, dtype=float) + 88.0)


def rows(values, *, repeat=0, direction=None, stdev=0.0004, levels=LEVELS):
    return [
        {
            "power_dbm": float(p),
            "value_v": float(v),
            "settled": 1,
            "overload": 0,
            "stdev_v": stdev,
            "samples": 4,
            "repeat": repeat,
            "direction": direction,
        }
        for p, v in zip(levels, values)
    ]


def test_repeats_are_averaged_per_level_with_their_pooled_scatter_and_hysteresis():
    rng = np.random.default_rng(4)
    shift = 0.0005  # the up sweeps read 0.5 mV high: hysteresis of 2 x 0.5 mV / 25 mV/dB = 0.04 dB
    sweeps = [law(LEVELS) + (shift if r % 2 == 0 else -shift) + rng.normal(0, 0.002, LEVELS.size) for r in range(4)]
    points = [row for r, v in enumerate(sweeps) for row in rows(v, repeat=r, direction="up" if r % 2 == 0 else "down")]
    g = analyse_group(1e8, points, (-60, -20), 1.0)
    assert g.points == LEVELS.size  # one point per level after averaging the repeats
    assert g.slope_mv_per_db == pytest.approx(np.polyfit(LEVELS, np.mean(sweeps, axis=0), 1)[0] * 1e3, rel=1e-9)
    rep = g.budget.repeats
    # GUM 4.2.4 pooled standard deviation: numpy's ddof=1 variances averaged over the levels
    pooled = math.sqrt(float(np.mean(np.var(np.array(sweeps), axis=0, ddof=1))))
    assert rep["pooled_sd_v"] == pytest.approx(pooled, rel=1e-9) and rep["dof"] == LEVELS.size * 3
    terms = {t.key: t for t in g.budget.terms}
    u_b, _ = propagate_through_fit(LEVELS, np.full(LEVELS.size, pooled / 2.0), 2.2, 0.025)
    assert terms["repeat_scatter"].slope_mv_per_db == pytest.approx(u_b * 1e3, rel=1e-3)
    assert terms["repeat_scatter"].included and not terms["reading_scatter"].included  # the larger is used
    expected = np.mean(np.array(sweeps[0::2]) - np.array(sweeps[1::2]), axis=0) / g.slope_mv_per_db * 1e3
    assert rep["hysteresis"]["mean_db"] == pytest.approx(float(expected.mean()), rel=1e-9)
    assert rep["hysteresis"]["mean_db"] == pytest.approx(0.04, abs=0.01)


def test_a_single_sweep_has_no_repeat_term():
    g = analyse_group(1e8, rows(law(LEVELS)), (-60, -20), 1.0)
    assert g.budget.repeats is None and "repeat_scatter" not in {t.key for t in g.budget.terms}


def _calibration(low_dbm: float, scatter_db: float) -> str:
    """A calibration at 100 MHz from low_dbm up to -10 dBm: corrections alternating +/- scatter around 6 dB."""
    levels = np.arange(low_dbm, -9.0, 5.0)
    corrections = 6.0 + scatter_db * np.where(np.arange(levels.size) % 2 == 0, 1.0, -1.0)
    return format_calibration("SIM-SENSOR", "2026-01-01", 0.15, [(1e8, d + c, d) for d, c in zip(levels, corrections)])


def test_a_calibration_replaces_the_source_level_and_adds_linearity_below_it():
    text = _calibration(-40.0, 0.01)
    plan = {
        "instruments": BENCH,
        "path": {"calibration": "cal.csv"},
        "analysis": {"fit_dbm": [-60, -20], "source_level_accuracy_db": 0.5, "source_linearity_db": 0.1},
    }
    stated = Stated.from_plan(plan, {"cal.csv": text})
    g = analyse_group(1e8, rows(law(LEVELS)), (-60, -20), 1.0, stated)
    terms = {t.key: t for t in g.budget.terms}
    assert not terms["source_level"].included and not terms["path_loss"].included
    assert terms["sensor"].intercept_db == pytest.approx(rectangular(0.15)) and terms["sensor"].common
    assert terms["calibration_scatter"].intercept_db == pytest.approx(stated.calibration.scatter_db(1e8))
    # linearity: a level error of e per 10 dB below -40 dBm, propagated by least squares (numpy's polyfit as
    # the reference): fit the levels the DUT then sees, e = the stated half-width, divided by sqrt(3)
    e = 0.1
    seen = LEVELS + e * np.clip(-40.0 - LEVELS, 0, None) / 10.0
    b, a = np.polyfit(LEVELS, law(seen), 1)
    assert terms["source_linearity"].slope_mv_per_db == pytest.approx(abs(b - 0.025) * 1e3 / math.sqrt(3), rel=1e-6)
    # the intercept -a/b is not linear in the readings: first order (GUM 5.1.2) agrees to within 1 %
    assert terms["source_linearity"].intercept_db == pytest.approx(abs(-a / b - (-88.0)) / math.sqrt(3), rel=0.01)
    assert level_sensitivity(LEVELS, np.ones(LEVELS.size), 2.2, 0.025) == pytest.approx((0.0, -1.0))


def test_every_point_error_and_the_range_ends_carry_an_uncertainty():
    levels = np.arange(-80.0, 1.0, 2.0)
    values = law(levels) + 0.025 * 0.01 * (levels + 40.0) ** 2 / 10  # bends away from the line at both ends
    g = analyse_group(1e8, rows(values, levels=levels), (-60, -20), 1.0, {"source_level_accuracy_db": 0.3})
    u_y = 0.0002  # 0.0004 / sqrt(4)
    in_fit = (levels >= -60) & (levels <= -20)
    line = line_u_at(levels[in_fit], np.full(in_fit.sum(), u_y), levels)
    entries = [c for c in g.curve if c["error_db"] is not None]
    k = np.array([c["error_u_db"] for c in entries]) / (np.hypot(u_y, line) / 0.025)
    # k from the t distribution (scipy) at the Welch-Satterthwaite dof of the point's own mean (4 samples:
    # 3 dof) and of the line's Type A term (GUM G.2b, G.3)
    line_dof = next(t.dof for t in g.budget.terms if t.key == "reading_scatter")
    nu = (u_y**2 + line**2) ** 2 / (u_y**4 / 3 + line**4 / line_dof)
    assert k == pytest.approx(stats.t.ppf(0.5 + 0.9545 / 2, nu), rel=1e-9)
    assert g.range_low_u_db is not None and g.range_high_u_db is not None
    # a range end is an absolute level: it carries the source's 0.3/sqrt(3) at least, times k >= 2
    assert g.range_low_u_db >= 2 * rectangular(0.3) and g.range_high_u_db >= 2 * rectangular(0.3)


def _group(value_shift: float, stated: Stated, seed: int):
    rng = np.random.default_rng(seed)
    return analyse_group(
        1e8, rows(law(LEVELS) + value_shift + rng.normal(0, 0.0002, LEVELS.size)), (-60, -20), 1.0, stated
    )


def test_a_difference_cancels_what_both_runs_share_and_keeps_both_type_a():
    plan = {
        "instruments": BENCH,
        "path": {"loss_db": 6},
        "analysis": {"fit_dbm": [-60, -20], "source_level_accuracy_db": 0.5},
    }
    same = Stated.from_plan(plan)
    a, b = _group(0.0, same, 1), _group(0.001, same, 2)
    d = Difference.of(a, b)
    assert "source_level" in d.shared_terms
    type_a = math.hypot(a.budget.type_a_u("intercept"), b.budget.type_a_u("intercept"))
    assert d.values["intercept_diff_u_unshared_db"] == pytest.approx(type_a * 2.0, rel=0.05)  # k near 2
    assert d.values["intercept_diff_u_unshared_db"] < 0.1 < d.values["intercept_diff_u_db"]
    # another source (another resource): its level accuracy no longer cancels
    other = Stated.from_plan(
        {**plan, "instruments": {"source": {**BENCH["source"], "resource": "TCPIP::10.0.0.2::5025::SOCKET"}}}
    )
    d2 = Difference.of(a, _group(0.001, other, 2))
    assert "source_level" not in d2.shared_terms
    # the same address but another instrument answering there (another *IDN? reply): not shared either
    swapped = Stated.from_plan(plan, identities={"source": "Nightbench Simulated Instruments,SG-2,0002,1.0"})
    assert "source_level" not in Difference.of(a, _group(0.001, swapped, 2)).shared_terms
    assert d2.values["intercept_diff_u_unshared_db"] == pytest.approx(
        2.0 * math.sqrt(2 * rectangular(0.5) ** 2 + type_a**2), rel=0.01
    )


def test_report_of_two_stored_runs_on_one_bench_states_the_shared_terms(tmp_path):
    db = tmp_path / "two.db"
    analysis = {"fit_dbm": [-60, -20], "error_limit_db": 1.0, "source_level_accuracy_db": 0.5}
    store_run(db, lambda p, f: 0.0200 * (p + 90.0), dut_id="A", analysis=analysis)
    store_run(db, lambda p, f: 0.0200 * (p + 89.9), dut_id="B", analysis=analysis)
    from nightbench.analysis.compare import compare_reports

    store = Store(db, readonly=True)
    cmp = compare_reports(build_report(store, 1), build_report(store, 2)).to_json()
    diff = cmp["differences"][0]
    assert diff["intercept_diff_db"] == pytest.approx(0.1, abs=1e-9)
    assert "source_level" in diff["shared_terms"]
    assert diff["intercept_diff_u_unshared_db"] < 0.05 < diff["intercept_diff_u_db"]


def test_a_level_offset_moves_the_slope_of_a_rippled_part_as_monte_carlo_says():
    # JCGM 101 style: a rippled part (0.3 dB, 10 dB period, from the simulator's kind of law), the
    # source's offset drawn rectangular +/- 0.5 dB; the DUT sees every level shifted, so the ripple
    # slides through the fit range and the fitted slope moves: the budget's first-order term must
    # give the spread of the refitted slopes (numpy's polyfit as the reference).
    levels = np.arange(-63.0, -16.0, 1.0)

    def rippled(p):
        return 0.025 * (p + 88.0 + 0.3 * np.sin(2 * np.pi * (p + 2.5) / 10.0))

    rng = np.random.default_rng(8)
    slopes = [np.polyfit(levels, rippled(levels + d), 1)[0] * 1e3 for d in rng.uniform(-0.5, 0.5, 4000)]
    g = analyse_group(1e8, rows(rippled(levels), levels=levels), (-63, -17), 1.0, {"source_level_accuracy_db": 0.5})
    term = next(t for t in g.budget.terms if t.key == "source_level")
    assert float(np.std(slopes)) > 0.005  # the effect is there to be seen
    assert term.slope_mv_per_db == pytest.approx(float(np.std(slopes)), rel=0.1)


def test_the_square_law_budget_also_leaves_the_lack_of_fit_out():
    # the square and linear laws' budgets (analysis/laws.py) take Type A from the measured scatter too:
    # a bent response (residuals far above the noise) must not enter the responsivity's uncertainty
    levels = np.arange(-40.0, -19.0, 1.0)
    mw = 10 ** (levels / 10)
    values = 0.5 * mw * (1 + 0.05 * np.sin(levels))  # 5 % wiggle: residuals >> 0.4 mV / sqrt(4) noise
    g = analyse_group(1e8, rows(values, levels=levels, stdev=1e-6), (-40, -20), 1.0, law="square")
    terms = {t["key"]: t for t in g.law_budget["terms"]}
    assert terms["reading_scatter"]["included"] and not terms["fit"]["included"]
    c = (mw - mw.mean()) / ((mw - mw.mean()) ** 2).sum()
    assert g.law_budget["param_uc"] == pytest.approx(math.sqrt(((c * 5e-7) ** 2).sum()), rel=1e-9)
    # k from the t distribution (scipy) at the reading scatter's Welch-Satterthwaite dof: 4 samples, 3 dof a point
    nu = ((c * 5e-7) ** 2).sum() ** 2 / ((c * 5e-7) ** 4 / 3).sum()
    assert g.law_budget["param_nu_eff"] == pytest.approx(nu, rel=1e-9)
    assert g.responsivity_u_v_per_mw == pytest.approx(stats.t.ppf(0.5 + 0.9545 / 2, nu) * g.law_budget["param_uc"])


def test_a_stored_calibrated_run_reads_its_calibration_from_the_snapshot(tmp_path):
    # the whole way through the real plan loader and Store: the file's text is snapshotted with the run,
    # and the report's budget takes the sensor and the calibration's scatter from it, not from the disk
    import yaml

    from nightbench.measure.sweep import expand
    from nightbench.plan.load import parse_plan
    from nightbench.runs import new_run
    from nightbench.store.db import PointResult
    from tests.conftest import OFFLINE, plan_dict

    cal = _calibration(-40.0, 0.01)
    sweep = {"frequency_hz": [1e8], "power_dbm": {"start": -60, "stop": -20, "step": 2}}
    analysis = {"fit_dbm": [-60, -20], "source_level_accuracy_db": 0.5, "source_linearity_db": 0.1}
    plan = plan_dict(OFFLINE, sweep=sweep, path={"calibration": "cal.csv"}, analysis=analysis)
    loaded = parse_plan(yaml.safe_dump(plan, sort_keys=False), "cal-plan.yaml", files={"cal.csv": cal})
    store = Store(tmp_path / "cal.db")
    run_id = new_run(store, loaded)
    store.mark_running(run_id)
    for point in expand(loaded):
        v = float(law(point.power_dbm))
        store.add_point(run_id, point, PointResult(v, 4e-4, 4, 0.01, 3, True, False, [(0.01, v, "measure")]))
    store.finish_run(run_id, "completed")
    (tmp_path / "cal.csv").write_text("not read")  # a report never reads the file on disk again
    terms = {t.key: t for t in build_report(store, run_id).groups[0].budget.terms}
    store.close()
    assert not terms["source_level"].included
    assert terms["sensor"].intercept_db == pytest.approx(rectangular(0.15), rel=0.01)
    assert terms["calibration_scatter"].included and terms["source_linearity"].slope_mv_per_db > 0


def test_every_repeated_point_keeps_its_own_error_against_the_line_of_the_means():
    import json

    from nightbench.analysis.report import _point_errors, analyse

    sweeps = [law(LEVELS) + 0.001, law(LEVELS) - 0.001]  # up reads 1 mV high, down 1 mV low
    points = [row for r, v in enumerate(sweeps) for row in rows(v, repeat=r, direction=("up", "down")[r])]
    for i, p in enumerate(points):
        p.update(idx=i, frequency_hz=1e8)
    run = {"id": 1, "name": "r", "state": "completed", "dut_id": None, "started_at": None, "finished_at": None}
    run["plan_json"] = json.dumps({"analysis": {"fit_dbm": [-60, -20], "error_limit_db": 1.0}})
    errors = dict(_point_errors(analyse(run, points)))
    assert sorted(errors) == list(range(len(points)))
    # the line through the means is the law itself: each point is off by +/- 1 mV / 25 mV/dB = 0.04 dB
    assert [errors[i] for i in range(LEVELS.size)] == pytest.approx([0.04] * LEVELS.size, abs=1e-9)
    assert [errors[i] for i in range(LEVELS.size, len(points))] == pytest.approx([-0.04] * LEVELS.size, abs=1e-9)
