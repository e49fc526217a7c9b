"""Every detector law, end to end: a simulated diode (square law), RMS detector (linear) and log
detector, each run once on the simulated bench (real simulator process, pyvisa-py, the CLI in a
child process) and reported with `--law`.

The references are built without the code under test: the conversions below are written here
from common practice (0 dBm = 1 mW = 223.6 mV rms into 50 ohm; a square-law output is
proportional to power in mW, i.e. to V rms squared into the load), the line is fitted with
`numpy.polyfit` to the simulator's own noiseless law (`BenchModel.truth_v`) at the swept levels,
and the range ends are found by walking that law's error on a dense 0.01 dB grid.
"""

from __future__ import annotations

import json
import math
import sqlite3

import numpy as np
import pytest

from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig, BenchModel
from tests.conftest import cli, plan_dict, sim_toml

OHM = 50.0  # common practice: RF levels in dBm refer to 50 ohm
FREQ = 100e6
LEVELS = {"start": -90, "stop": 0, "step": 2}
FIT = (-40.0, -16.0)
LIMIT = 1.0

# each law's simulated part: ripple off and a quiet output so the law itself sets the range (its
# soft top ends it below the sweep's top, its noise floor near -82 dBm the log law's low end); the
# meter's own noise made small too (its range set so its resolution does not limit the low end)
DETECTORS = {
    "square": {"law": "square", "responsivity_v_per_mw": 1.0, "saturation_dbm": 3.0},
    "linear": {"law": "linear", "gain_v_per_v": 4.0, "saturation_dbm": 3.0},
    "log": {"law": "log"},
}
QUIET = {"ripple_db": 0.0, "output_noise_v": 2e-7, "floor_noise_v": 2e-7}


def mw(dbm: np.ndarray) -> np.ndarray:
    return 10.0 ** (dbm / 10.0)  # common practice: 0 dBm = 1 mW


def vrms(dbm: np.ndarray) -> np.ndarray:
    return np.sqrt(mw(dbm) * 1e-3 * OHM)  # common practice: P = V^2 / R in 50 ohm


def quantity(law: str, dbm: np.ndarray) -> np.ndarray:
    return {"square": mw, "linear": vrms, "log": lambda p: p}[law](np.asarray(dbm, dtype=float))


def level_of(law: str, x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        if law == "square":
            return 10.0 * np.log10(x)
        if law == "linear":
            return 10.0 * np.log10(x * x / OHM / 1e-3)
    return x


def test_the_conversions_are_the_50_ohm_ones():
    """Common practice: 0 dBm = 1 mW = 223.6 mV rms in 50 ohm; +3 dB doubles the power (a square-law
    output doubles), +6 dB doubles the voltage (a linear output doubles)."""
    from nightbench.analysis.laws import dbm_to_mw, dbm_to_vrms, get_law

    assert dbm_to_vrms(0.0) == pytest.approx(0.2236, abs=1e-4)
    assert dbm_to_mw(0.0) == pytest.approx(1.0)
    assert dbm_to_mw(10 * math.log10(2)) == pytest.approx(2.0)
    assert dbm_to_vrms(20 * math.log10(2)) / dbm_to_vrms(0.0) == pytest.approx(2.0)
    for name in ("square", "linear", "log"):
        law = get_law(name)
        levels = np.array([-60.0, -13.0, 0.0, 7.5])
        assert law.level_dbm(law.x(levels)) == pytest.approx(levels)


def test_an_output_that_implies_no_input_has_no_error_and_ends_the_range():
    from nightbench.analysis.fit import analyse_group

    levels = [-40.0, -35.0, -30.0, -25.0, -20.0, -15.0]
    rows = [
        {"power_dbm": p, "value_v": 1e-3 + 2.0 * 10 ** (p / 10), "settled": 1, "overload": 0, "idx": i}
        for i, p in enumerate(levels)
    ]
    rows[0]["value_v"] = 0.0  # below the fitted offset: no positive power explains it
    g = analyse_group(FREQ, rows, (-35.0, -15.0), 1.0, law="square")
    assert g.curve[0]["error_db"] is None and g.curve[0]["status"] == "outside_fit"
    assert g.range_low_dbm == -35.0 and g.responsivity_v_per_mw == pytest.approx(2.0)
    assert g.offset_v == pytest.approx(1e-3) and g.slope_mv_per_db is None and g.intercept_dbm is None


def _truth(law: str) -> tuple[BenchModel, dict]:
    config = {"detector": {**DETECTORS[law], **QUIET}, "meter": {"noise_v": 1e-8}}
    return BenchModel(BenchConfig.from_dict(config)), config


@pytest.fixture(scope="module", params=sorted(DETECTORS))
def measured(request, tmp_path_factory):
    """One small sweep of one simulated detector, then `report --law` on it (JSON)."""
    law = request.param
    tmp = tmp_path_factory.mktemp(f"law-{law}")
    truth, config = _truth(law)
    sim_cfg = tmp / "sim.toml"
    sim_cfg.write_text(sim_toml(config))
    with SimProcess("--config", str(sim_cfg)) as sim:
        plan = plan_dict(
            sim.resources,
            path={"loss_db": truth.config.path.loss(FREQ)},
            sweep={"frequency_hz": [FREQ], "power_dbm": LEVELS},
            settle={"tolerance_v": 2e-5, "timeout_s": 2},
            analysis={"fit_dbm": list(FIT), "error_limit_db": LIMIT, "law": law},
        )
        if law != "log":  # outputs below 1 V: the 1 V range's resolution (1 uV) does not limit the low end
            plan["instruments"]["meter"]["range_v"] = 1.0
        plan_file = tmp / "plan.yaml"
        plan_file.write_text(json.dumps(plan))
        db = tmp / "run.db"
        res = cli("run", str(plan_file), "--db", str(db))
    assert res.returncode == 0, res.stderr
    rep = cli("report", "1", "--db", str(db), "--json", "--law", law)
    assert rep.returncode == 0, rep.stderr
    return {"law": law, "truth": truth, "db": db, "report": json.loads(rep.stdout)}


def _reference(law: str, truth: BenchModel) -> dict:
    """numpy.polyfit of the noiseless law at the swept levels; its error and range on a dense grid."""
    swept = np.arange(LEVELS["start"], LEVELS["stop"] + 1e-9, LEVELS["step"], dtype=float)
    volts = np.array([truth.truth_v(p, FREQ) for p in swept])
    inside = (swept >= FIT[0]) & (swept <= FIT[1])
    b, a = np.polyfit(quantity(law, swept[inside]), volts[inside], 1)
    dense = np.round(np.arange(swept.min(), swept.max() + 1e-9, 0.01), 2)
    err = level_of(law, (np.array([truth.truth_v(p, FREQ) for p in dense]) - a) / b) - dense
    bad = ~(np.abs(err) <= LIMIT)  # NaN (no input implied) counts as outside
    centre = int(np.argmin(np.abs(dense - 0.5 * (FIT[0] + FIT[1]))))
    below, above = np.flatnonzero(bad[:centre]), np.flatnonzero(bad[centre:]) + centre
    low = dense[below[-1] + 1] if len(below) else dense[0]
    high = dense[above[0] - 1] if len(above) else dense[-1]
    return {"a": a, "b": b, "low": low, "high": high}


def test_fitted_parameters_agree_with_the_simulators_own_law(measured):
    law, truth = measured["law"], measured["truth"]
    (g,) = measured["report"]["groups"]
    ref = _reference(law, truth)
    assert g["law"] == law and measured["report"]["analysis"]["law"] == law
    det = truth.config.detector
    if law == "log":
        assert g["slope_mv_per_db"] == pytest.approx(ref["b"] * 1e3, rel=2e-3)
        assert g["intercept_dbm"] == pytest.approx(-ref["a"] / ref["b"], abs=0.05)
        assert g["responsivity_v_per_mw"] is None and g["gain_v_per_v"] is None and g["offset_v"] is None
    else:
        param = "responsivity_v_per_mw" if law == "square" else "gain_v_per_v"
        assert g["slope_mv_per_db"] is None and g["intercept_dbm"] is None
        assert g[param] == pytest.approx(ref["b"], rel=2e-3)
        assert g["offset_v"] == pytest.approx(ref["a"], abs=2e-5)
        # and the simulator's stated constant (output proportional to mW, or to V rms: common practice),
        # within the 2 % its soft top (0.05 dB at -16 dBm) bends the law inside the fit range
        stated = det.responsivity_v_per_mw if law == "square" else det.gain_v_per_v
        assert g[param] == pytest.approx(stated, rel=0.02)
        assert g[param.replace("_v_per", "_u_v_per")] > 0


def test_range_ends_are_within_half_a_db_of_the_simulators_truth(measured):
    (g,) = measured["report"]["groups"]
    ref = _reference(measured["law"], measured["truth"])
    assert g["range_low_dbm"] == pytest.approx(ref["low"], abs=0.5)
    assert g["range_high_dbm"] == pytest.approx(ref["high"], abs=0.5)
    assert g["ranges"][0] == {
        "error_limit_db": LIMIT,
        "range_low_dbm": g["range_low_dbm"],
        "range_high_dbm": g["range_high_dbm"],
        "dynamic_range_db": g["dynamic_range_db"],
    }


def test_the_runs_own_analysis_uses_the_plans_law_and_the_points_view_has_its_errors(measured):
    """analysis.law in the plan sets the run's analysis: what v_fits stored at completion, and every
    point's error in v_points, is that law's, and agrees with report --json."""
    law = measured["law"]
    conn = sqlite3.connect(measured["db"])
    (stored_law, origin) = conn.execute("SELECT law, analysis_origin FROM v_fits_all").fetchone()
    assert (stored_law, origin) == (law, "run")
    view = dict(conn.execute("SELECT power_dbm, error_db FROM v_points ORDER BY idx").fetchall())
    curve = measured["report"]["details"][0]["curve"]
    assert len(view) == len(curve) == 46
    for c in curve:
        if c["error_db"] is None:
            assert view[c["power_dbm"]] is None
        else:
            assert view[c["power_dbm"]] == pytest.approx(c["error_db"], abs=1e-9)
