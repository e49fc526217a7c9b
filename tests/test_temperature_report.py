"""The report over temperature: one group per (frequency, temperature), the over_temperature
section, its temperature coefficients checked against the simulator's own law analysed the same
way (numpy.polyfit and scipy.stats.linregress as the reference libraries), plots, and `report A B`."""

from __future__ import annotations

import json
import math
import sqlite3

import numpy as np
import pytest
from scipy import stats

from nightbench.analysis.temperature import error_vs_reference, least_squares_slope
from nightbench.simulators.physics import BenchConfig
from tests.conftest import cli
from tests.test_temperature import chamber_bench, temp_plan

__all__ = ["chamber_bench"]
TEMPS = [25.0, -10.0, 60.0]


def test_least_squares_slope_agrees_with_scipy_linregress():
    # reference library: scipy.stats.linregress (ordinary least squares)
    rng = np.random.default_rng(7)
    t = np.array([-40.0, -10.0, 25.0, 55.0, 85.0])
    y = 0.011 * t - 91.3 + rng.normal(0, 0.05, len(t))
    assert least_squares_slope(t, y) == pytest.approx(stats.linregress(t, y).slope, rel=1e-12)
    assert least_squares_slope([25.0], [1.0]) is None  # one temperature: no coefficient


def test_error_vs_reference_is_the_level_offset_of_a_shifted_line():
    # a line V = b (P - x0) shifted by d dB of input reads d dB off the unshifted line (arithmetic)
    from nightbench.analysis.fit import LineFit

    b, x0, d = 0.02, -90.0, 0.7
    ref = LineFit(
        intercept_v=-b * x0, slope_v_per_db=b, u_intercept_v=0, u_slope_v_per_db=0, cov_ab=0, residual_sd_v=0, n=3
    )
    levels = np.array([-60.0, -40.0, -20.0])
    assert error_vs_reference(ref, levels, b * (levels + d - x0)) == pytest.approx([d, d, d])


def test_each_unit_of_a_lot_is_judged_against_its_own_reference_line():
    # Two units at two temperatures, each an ideal 20 mV/dB line whose intercept moves 0.02 dB/degC,
    # unit B 5 dB above unit A. Against its own 25 degC line each unit's 60 degC error is the
    # intercept shift, 35 x 0.02 = 0.7 dB (arithmetic); judged against the other unit's line it would
    # read 5 dB more, so a mixed-up reference cannot pass. Each unit keeps its own drift.
    from types import SimpleNamespace

    from nightbench.analysis.fit import LineFit
    from nightbench.analysis.temperature import over_temperature

    b, levels = 0.02, np.arange(-70.0, -9.0, 5.0)

    def group(unit, temp, x0):
        x = x0 + 0.02 * (temp - 25.0)
        line = LineFit(-b * x, b, 0, 0, 0, 0, len(levels))
        curve = [{"power_dbm": p, "value_v": b * (p - x), "status": "in_fit"} for p in levels]
        return SimpleNamespace(
            unit_id=unit,
            frequency_hz=1e8,
            temperature_c=temp,
            law="log",
            line=line,
            curve=curve,
            slope_mv_per_db=b * 1e3,
            intercept_dbm=x,
        )

    groups = [group(u, t, x0) for u, x0 in (("A", -90.0), ("B", -85.0)) for t in (25.0, 60.0)]
    over = over_temperature(groups, 25.0, 1.0, (-60.0, -20.0))
    hot = {g["unit_id"]: g for g in over["groups"] if g["temperature_c"] == 60.0}
    assert set(hot) == {"A", "B"}
    for unit in "AB":
        assert hot[unit]["max_abs_error_vs_reference_db"] == pytest.approx(0.7)
    drift = {d["unit_id"]: d for d in over["drift"]}
    assert drift["A"]["intercept_tc_db_per_c"] == pytest.approx(0.02)
    assert drift["B"]["intercept_tc_db_per_c"] == pytest.approx(0.02)


@pytest.fixture(scope="module")
def over_temperature_run(tmp_path_factory):
    """One simulated run at three temperatures (seconds in accelerated time), shared by the checks."""
    from nightbench.simproc import SimProcess

    tmp = tmp_path_factory.mktemp("overtemp")
    db = tmp / "t.db"
    with SimProcess("--chamber-time-scale", "600") as sim:  # twice the other tests' pace: 600 s soaks in 1 s
        plan = temp_plan(sim.resources, TEMPS, stable_s=1, timeout_s=30)
        plan["sweep"]["power_dbm"] = {"start": -60, "stop": -10, "step": 5}
        import yaml

        path = tmp / "plan.yaml"
        path.write_text(yaml.safe_dump(plan, sort_keys=False))
        result = cli("run", str(path), "--db", str(db), timeout=120)
        assert result.returncode == 0, result.stderr
    return db, tmp


def truth_line(temperature_c: float, sources_dbm: list[float], levels: list[float]) -> tuple[float, float]:
    """The simulator's own law (noiseless, at this DUT temperature) fitted over the same levels
    with numpy.polyfit: (slope mV/dB, intercept dBm)."""
    config = BenchConfig()
    f = 100e6
    true_dut = [s - config.path.loss(f) for s in sources_dbm]  # the level the simulated DUT really saw
    volts = [config.detector.steady_v(p, f, temperature_c) for p in true_dut]
    b, a = np.polyfit(levels, volts, 1)
    return b * 1000.0, -a / b


def test_temperature_coefficients_agree_with_the_simulators_law(over_temperature_run):
    db, _ = over_temperature_run
    report = json.loads(cli("report", "1", "--db", str(db), "--json").stdout)
    assert sorted((g["frequency_hz"], g["temperature_c"]) for g in report["groups"]) == [
        (100e6, t) for t in sorted(TEMPS)
    ]
    over = report["over_temperature"]
    assert over["reference_c"] == 25.0  # 25 is swept: the default reference
    with sqlite3.connect(db) as conn:
        rows = conn.execute(
            "SELECT temperature_c, power_dbm, source_dbm FROM points WHERE run_id=1 AND power_dbm BETWEEN -50 AND -20"
            " ORDER BY temperature_c, power_dbm"
        ).fetchall()
    slopes, intercepts = [], []
    for t in TEMPS:
        mine = [r for r in rows if r[0] == t]
        s, i = truth_line(t, [r[2] for r in mine], [r[1] for r in mine])
        slopes.append(s)
        intercepts.append(i)
    # reference library for the coefficients: scipy.stats.linregress
    slope_tc = stats.linregress(TEMPS, slopes).slope
    intercept_tc = stats.linregress(TEMPS, intercepts).slope
    (drift,) = over["drift"]
    assert drift["intercept_tc_db_per_c"] == pytest.approx(intercept_tc, abs=0.002)  # issue 13 acceptance
    assert drift["slope_tc_mv_per_db_per_c"] == pytest.approx(slope_tc, rel=0.20)
    # and the truth itself is what the simulator was configured with (physics.DetectorConfig)
    det = BenchConfig().detector
    assert intercept_tc == pytest.approx(det.intercept_tc_db_per_c, abs=0.001)
    assert slope_tc == pytest.approx(det.slope_tc_per_c * det.slope(100e6) * 1000, rel=0.05)


def test_over_temperature_groups_judge_every_temperature_by_the_reference_line(over_temperature_run):
    db, _ = over_temperature_run
    report = json.loads(cli("report", "1", "--db", str(db), "--json").stdout)
    over = {g["temperature_c"]: g for g in report["over_temperature"]["groups"]}
    own = {g["temperature_c"]: g for g in report["groups"]}
    # at the reference temperature the reference line is the group's own fit
    assert over[25.0]["max_abs_error_vs_reference_db"] == pytest.approx(own[25.0]["max_abs_error_db"], abs=1e-9)
    # 35 degC from the reference the intercept has moved by ~0.35 dB (0.01 dB/degC): the error vs
    # the reference line grows with the distance from the reference temperature
    assert over[60.0]["max_abs_error_vs_reference_db"] > over[25.0]["max_abs_error_vs_reference_db"] + 0.1
    assert over[-10.0]["max_abs_error_vs_reference_db"] > over[25.0]["max_abs_error_vs_reference_db"] + 0.1
    for g in over.values():
        assert g["range_low_dbm"] <= -50 and g["range_high_dbm"] >= -20  # within 1 dB over the fit range
        assert g["dynamic_range_db"] == pytest.approx(g["range_high_dbm"] - g["range_low_dbm"], abs=0.05)
    other = json.loads(cli("report", "1", "--db", str(db), "--json", "--reference-c", "60").stdout)
    assert other["over_temperature"]["reference_c"] == 60.0
    assert other["over_temperature"]["groups"][2]["temperature_c"] == 60.0
    assert math.isclose(
        other["over_temperature"]["groups"][2]["max_abs_error_vs_reference_db"],
        own[60.0]["max_abs_error_db"],
        abs_tol=1e-9,
    )


def test_report_of_two_runs_with_temperatures_and_the_plots(over_temperature_run):
    db, tmp = over_temperature_run
    both = cli("report", "1", "1", "--db", str(db), "--json")  # a run against itself: B minus A is zero
    assert both.returncode == 0, both.stderr
    cmp = json.loads(both.stdout)
    # one difference per (frequency, temperature): the groups are paired by temperature too
    assert sorted(d["temperature_c"] for d in cmp["differences"]) == sorted(TEMPS)
    assert "over_temperature" in cmp["runs"][0]
    out = tmp / "r1"
    result = cli("report", "1", "--db", str(db), "--out", str(out))
    assert result.returncode == 0, result.stderr
    names = {p.name for p in out.iterdir()}
    assert {"run1-error-vs-reference-100MHz.png", "run1-drift-vs-temperature.png"} <= names, names


def test_every_table_says_which_temperature_a_row_is(over_temperature_run):
    # one group per (frequency, temperature): labelled by frequency alone, the rows of the table,
    # the budget and a comparison would be three alike-looking lines at 100 MHz
    db, tmp = over_temperature_run
    text = cli("report", "1", "--db", str(db)).stdout.splitlines()
    head = next(i for i, line in enumerate(text) if line.split()[:4] == ["temp", "C", "freq", "MHz"])
    rows = [line.split() for line in text[head + 1 : head + 1 + len(TEMPS)]]
    assert sorted((float(r[0]), r[1]) for r in rows) == [(t, "100.000") for t in sorted(TEMPS)]
    for t in TEMPS:  # slope and intercept budget rows, and the lack of fit
        assert sum(line.strip().startswith(f"100.000 MHz {t:.1f} C") for line in text) == 3, t
    cmp = cli("report", "1", "1", "--db", str(db)).stdout.splitlines()
    head = next(i for i, line in enumerate(cmp) if line.split()[:3] == ["temp", "C", "freq"])
    assert sorted(float(line.split()[0]) for line in cmp[head + 1 : head + 1 + len(TEMPS)]) == sorted(TEMPS)
    out = tmp / "tables"
    assert cli("report", "1", "--db", str(db), "--out", str(out)).returncode == 0
    summary = (out / "summary.md").read_text().splitlines()
    i = next(i for i, line in enumerate(summary) if line.startswith("| temp C | freq (MHz) |"))
    assert sorted(float(line.split("|")[1]) for line in summary[i + 2 : i + 2 + len(TEMPS)]) == sorted(TEMPS)
