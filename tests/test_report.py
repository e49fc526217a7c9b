"""`nightbench report` on the simulated bench: numbers, plots, summary, comparison, exports.

One wide sweep is run once for the module (a real simulator process, pyvisa-py over TCP, the
CLI in a child process). The reference is built without the code under test: the simulator's
own noiseless law (`BenchModel.truth_v` at the true DUT level `BenchModel.dut_dbm`), fitted with
`scipy.stats.linregress`, its conformance error evaluated on a dense numpy grid. The report must
agree with it, whatever the simulator's physics is (ripple, floor, compression).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import sqlite3
from pathlib import Path

import numpy as np
import pytest
import yaml
from matplotlib import image
from scipy import stats

from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig, BenchModel
from tests.conftest import cli, plan_dict, store_run

FREQS = [100e6, 900e6]
FIT = [-60.0, -20.0]


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    """A completed run on the simulated bench, wide enough to reach both ends of the range."""
    tmp = tmp_path_factory.mktemp("report")
    truth = BenchModel(BenchConfig())
    with SimProcess() as sim:
        plan = plan_dict(
            sim.resources,
            path={"table": [[f, truth.config.path.loss(f)] for f in FREQS]},
            sweep={"frequency_hz": FREQS, "power_dbm": {"start": -90, "stop": 0, "step": 2}},
            analysis={
                "fit_dbm": FIT,
                "error_limit_db": 1.0,
                "source_level_accuracy_db": 0.5,
                "meter_gain_accuracy_pct": 0.01,
            },
        )
        plan_file = tmp / "plan.yaml"
        plan_file.write_text(yaml.safe_dump(plan, sort_keys=False))
        db = tmp / "run.db"
        res = cli("run", str(plan_file), "--db", str(db))
    assert res.returncode == 0, res.stderr
    conn = sqlite3.connect(db)
    conn.row_factory = sqlite3.Row
    stored = [dict(r) for r in conn.execute("SELECT * FROM v_fits WHERE run_id = 1 ORDER BY frequency_hz")]
    conn.close()
    return {"db": db, "tmp": tmp, "truth": truth, "fits_after_run": stored}


def _report(db: Path, *runs: str) -> dict:
    res = cli("report", *runs, "--db", str(db), "--json")
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)


def _stored_levels(db: Path, frequency_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """(DUT level the plan asked for, level the source was set to) of every stored point, read with sqlite3."""
    conn = sqlite3.connect(db)
    rows = conn.execute(
        "SELECT power_dbm, source_dbm FROM v_points WHERE run_id = 1 AND frequency_hz = ? "
        "AND settled = 1 AND overload = 0 ORDER BY power_dbm",
        (frequency_hz,),
    ).fetchall()
    conn.close()
    return np.array([r[0] for r in rows]), np.array([r[1] for r in rows])


def _reference_range(truth: BenchModel, f: float, slope: float, intercept_v: float) -> tuple[float, float]:
    """Ends of the span around the fit range where the noiseless law stays within 1 dB of the
    reference line, on a 0.01 dB grid (numpy; the conformance error is (V - line)/slope, the
    definition in the README)."""
    loss = truth.config.path.loss(f)
    grid = np.arange(-90.0, 0.0 + 1e-9, 0.01)
    law = np.array([truth.truth_v(truth.dut_dbm(f, level_dbm=p + loss, output_on=True), f) for p in grid])
    within = np.abs((law - (intercept_v + slope * grid)) / slope) <= 1.0
    centre = int(np.argmin(np.abs(grid - np.mean(FIT))))
    assert within[centre]
    below = np.nonzero(~within[:centre])[0]
    above = np.nonzero(~within[centre:])[0]
    low = grid[below[-1] + 1] if below.size else grid[0]
    high = grid[centre + above[0] - 1] if above.size else grid[-1]
    return float(low), float(high)


def test_report_agrees_with_the_simulators_noiseless_law(measured):
    report = _report(measured["db"], "1")
    truth = measured["truth"]
    assert [g["frequency_hz"] for g in report["groups"]] == FREQS
    for group in report["groups"]:
        f = group["frequency_hz"]
        # the noiseless output at the level each point really reached: the simulator's truth API
        # (BenchModel.dut_dbm from the source setting the run stored, BenchModel.truth_v)
        levels, source = _stored_levels(measured["db"], f)
        ideal = np.array([truth.truth_v(truth.dut_dbm(f, level_dbm=s, output_on=True), f) for s in source])
        in_fit = (levels >= FIT[0]) & (levels <= FIT[1])
        # reference: scipy.stats.linregress over the plan's fit range
        ref = stats.linregress(levels[in_fit], ideal[in_fit])
        # issue 6 acceptance: slope within 0.5 %, intercept (where the line reaches 0 V: -a/b) within 0.3 dB
        assert group["slope_mv_per_db"] == pytest.approx(ref.slope * 1e3, rel=0.005)
        assert group["intercept_dbm"] == pytest.approx(-ref.intercept / ref.slope, abs=0.3)
        # reference: the law's own |conformance error| <= 1 dB span on a dense numpy grid; ends within 1 dB
        low, high = _reference_range(truth, f, ref.slope, ref.intercept)
        # the law's range ends are real crossings inside the sweep, so the check tests interpolation
        assert low > -90 and high < 0
        assert group["range_low_dbm"] == pytest.approx(low, abs=1.0)
        assert group["range_high_dbm"] == pytest.approx(high, abs=1.0)
        # definition (README): the dynamic range is the span between the ends
        assert group["dynamic_range_db"] == pytest.approx(group["range_high_dbm"] - group["range_low_dbm"])


def test_uncertainty_in_the_report_includes_the_plans_type_b_terms(measured):
    report = _report(measured["db"], "1")
    terms = {t["key"]: t for t in report["analysis"]["uncertainty_terms"]}
    assert terms["source_level"]["half_width"] == 0.5 and terms["source_level"]["type"] == "B"
    assert terms["path_loss"]["half_width"] == 0.0
    assert all(t["what"] for t in terms.values())
    for group in report["groups"]:
        # the source's ±0.5 dB alone gives U = 2 * 0.5/sqrt(3) = 0.577 dB (JCGM 100:2008 4.3.7, 6.2.1) at
        # a sensitivity of 1 dB/dB, a straight line's; the part's ripple sliding through the fit range
        # moves that sensitivity by well under 1 % (docs/uncertainty.md), seen as 0.9997 here
        assert group["intercept_u_db"] >= 0.99 * 2 * 0.5 / np.sqrt(3)
        assert group["intercept_u_db"] < 0.7  # and the Type A part is small on this bench


def test_fit_results_are_stored_when_the_run_completes(measured):
    # read by the fixture right after `run`, before any `report` could have written them
    rows = measured["fits_after_run"]
    report = _report(measured["db"], "1")
    assert len(rows) == len(report["groups"])
    for row, group in zip(rows, report["groups"]):
        for key in ("slope_mv_per_db", "intercept_dbm", "intercept_u_db", "dynamic_range_db", "points"):
            assert row[key] == pytest.approx(group[key]), key
        assert row["dut_id"] == "T-1" and row["run_state"] == "completed"


def _assert_real_plot(path: Path) -> None:
    """A PNG of a real plot: the PNG signature, a sensible size, and many colours on much of it."""
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    pixels = image.imread(path)[:, :, :3]
    assert pixels.shape[0] > 300 and pixels.shape[1] > 400
    colours = np.unique((pixels * 255).astype(np.uint8).reshape(-1, 3), axis=0)
    assert len(colours) > 50
    not_white = (pixels < 0.95).any(axis=2).mean()
    assert 0.03 < not_white < 0.9


def test_out_writes_plots_summary_and_csv(measured):
    out = measured["tmp"] / "out"
    res = cli("report", "1", "--db", str(measured["db"]), "--out", str(out))
    assert res.returncode == 0, res.stderr
    assert "slope mV/dB" in res.stdout and "terms:" in res.stdout
    for name in ("transfer.png", "conformance.png", "slope-intercept.png"):
        _assert_real_plot(out / name)
    summary = (out / "summary.md").read_text()
    assert "![transfer.png](transfer.png)" in summary and "source_level" in summary
    points = list(csv.DictReader(io.StringIO((out / "points-run1.csv").read_text())))
    assert len(points) == 2 * 46
    results = list(csv.DictReader(io.StringIO((out / "results.csv").read_text())))
    assert [float(r["frequency_hz"]) for r in results] == FREQS


def test_json_export_carries_the_plan_and_the_run_metadata(measured):
    res = cli("export", "1", "--format", "json", "--db", str(measured["db"]))
    data = json.loads(res.stdout)
    assert data["plan"]["analysis"]["source_level_accuracy_db"] == 0.5
    assert yaml.safe_load(data["plan_text"])["name"] == "test-plan"
    assert data["source_idn"] and data["meter_idn"] and data["started_at"] and data["finished_at"]
    assert len(data["points"]) == 2 * 46
    assert {"frequency_hz", "power_dbm", "source_dbm", "value_v", "stdev_v", "samples", "settle_s", "settled"} <= set(
        data["points"][0]
    )


def test_two_runs_side_by_side_give_their_differences(tmp_path):
    # Two invented boards with known laws: B is 0.5 mV/dB steeper and reaches 0 V 2 dB higher.
    db = tmp_path / "two.db"
    store_run(db, lambda p, f: 0.0200 * (p + 90.0), dut_id="BRD-A")
    store_run(db, lambda p, f: 0.0205 * (p + 88.0), dut_id="BRD-B")
    cmp = _report(db, "1", "2")
    assert cmp["run_ids"] == [1, 2] and len(cmp["runs"]) == 2
    (diff,) = cmp["differences"]
    assert diff["slope_diff_mv_per_db"] == pytest.approx(0.5)
    assert diff["intercept_diff_db"] == pytest.approx(2.0)
    # both ideal lines stay within the limit over the whole sweep: the same range, no difference
    assert diff["dynamic_range_diff_db"] == pytest.approx(0.0)
    text = cli("report", "1", "2", "--db", str(db)).stdout
    assert "BRD-A" in text and "BRD-B" in text and "+0.500" in text
    res = cli("report", "1", "2", "--db", str(db), "--out", str(tmp_path / "cmp"))
    assert res.returncode == 0, res.stderr
    _assert_real_plot(tmp_path / "cmp" / "slope-intercept.png")
    assert (tmp_path / "cmp" / "points-run2.csv").exists()


# the JSON other programs rely on (docs/design.md, "JSON other programs rely on"), spelled out here
# on purpose: the fields are declared once in the code, and this is what that declaration must give
REPORT_KEYS = [
    "run_id",
    "name",
    "state",
    "dut_id",
    "started_at",
    "finished_at",
    "groups",
    "analysis",
    "details",
    "instruments",
]
DOCUMENTED_GROUP_KEYS = [
    "frequency_hz",
    "temperature_c",
    "slope_mv_per_db",
    "slope_u_mv_per_db",
    "intercept_dbm",
    "intercept_u_db",
    "fit_dbm",
    "error_limit_db",
    "range_low_dbm",
    "range_high_dbm",
    "dynamic_range_db",
    "max_abs_error_db",
    "points",
    "unsettled_points",
]
# appended later (laws, several limits): after the documented keys, so their positions never move
GROUP_KEYS = [
    *DOCUMENTED_GROUP_KEYS,
    "law",
    "responsivity_v_per_mw",
    "responsivity_u_v_per_mw",
    "gain_v_per_v",
    "gain_u_v_per_v",
    "offset_v",
    "offset_u_v",
    "ranges",
    # issue 14: each U's k and effective degrees of freedom, the range ends' U (docs/uncertainty.md)
    "slope_k",
    "slope_nu_eff",
    "intercept_k",
    "intercept_nu_eff",
    "range_low_u_db",
    "range_high_u_db",
    "unit_id",  # issue 17: several units (docs/units.md)
]
COMPARISON_KEYS = ["run_ids", "runs", "differences", "only_in_a_hz", "only_in_b_hz"]
DIFFERENCE_KEYS = [
    "frequency_hz",
    "temperature_c",
    "slope_diff_mv_per_db",
    "intercept_diff_db",
    "range_low_diff_db",
    "range_high_diff_db",
    "dynamic_range_diff_db",
    "max_abs_error_diff_db",
    "slope_diff_u_mv_per_db",
    "intercept_diff_u_db",
    "slope_diff_u_type_a_mv_per_db",
    "intercept_diff_u_type_a_db",
    "slope_diff_u_unshared_mv_per_db",
    "intercept_diff_u_unshared_db",
    "shared_terms",
]


def test_the_json_shapes_are_the_documented_ones(tmp_path):
    db = tmp_path / "two.db"
    store_run(db, lambda p, f: 0.0200 * (p + 90.0), dut_id="BRD-A", frequencies=[100e6, 500e6])
    store_run(db, lambda p, f: 0.0205 * (p + 88.0), dut_id="BRD-B", frequencies=[500e6, 900e6])
    report = _report(db, "1")
    assert list(report) == REPORT_KEYS
    assert [list(g) for g in report["groups"]] == [GROUP_KEYS, GROUP_KEYS]
    assert report["groups"][0]["fit_dbm"] == [-60, -20] and report["dut_id"] == "BRD-A"
    assert list(report["analysis"]) == [
        "fit_dbm",
        "error_limit_db",
        "k",
        "method",
        "uncertainty_terms",
        "law",
        "error_limits_db",
        "reference_c",
        "source",
        "coverage_probability",
    ]
    cmp = _report(db, "1", "2")
    assert list(cmp) == COMPARISON_KEYS
    assert [list(r) for r in cmp["runs"]] == [REPORT_KEYS, REPORT_KEYS]
    assert [list(d) for d in cmp["differences"]] == [DIFFERENCE_KEYS]  # only 500 MHz is in both
    assert cmp["only_in_a_hz"] == [100e6] and cmp["only_in_b_hz"] == [900e6]


def _fingerprint(db: Path) -> dict[str, str]:
    """sha256 of the database file and of its write-ahead log. An absent log reads as empty: any
    reader of a WAL file (sqlite3's own shell too) creates the empty -wal and -shm companions."""
    out = {}
    for suffix in ("", "-wal"):
        path = Path(f"{db}{suffix}")
        out[suffix or "db"] = hashlib.sha256(path.read_bytes() if path.exists() else b"").hexdigest()
    return out


@pytest.mark.parametrize("writer_open", [False, True], ids=["idle", "while-another-connection-writes"])
def test_report_and_export_leave_the_database_byte_for_byte_unchanged(tmp_path, writer_open):
    db = tmp_path / "two.db"
    store_run(db, lambda p, f: 0.0200 * (p + 90.0), dut_id="BRD-A")
    store_run(db, lambda p, f: 0.0205 * (p + 88.0), dut_id="BRD-B")
    writer = None
    if writer_open:
        # as while a run goes on: an open writer keeps its committed rows in the log, not the file
        writer = sqlite3.connect(db, isolation_level=None)
        writer.execute("INSERT INTO events (run_id, at, kind, message) VALUES (2, 'now', 'note', 'still writing')")
        assert Path(f"{db}-wal").stat().st_size > 0
    before = _fingerprint(db)
    for args in (
        ["report", "1"],
        ["report", "1", "--json"],
        ["report", "1", "2"],
        ["report", "1", "2", "--json"],
        ["report", "1", "2", "--out", str(tmp_path / "out")],
        ["export", "2", "--format", "json"],
    ):
        res = cli(*args, "--db", str(db))
        assert res.returncode == 0, (args, res.stderr)
        assert _fingerprint(db) == before, args
    if writer is not None:
        writer.close()


def test_report_and_export_of_a_missing_database_create_nothing(tmp_path):
    missing = tmp_path / "typo.db"
    for args in (["report", "1"], ["export", "1"]):
        res = cli(*args, "--db", str(missing))
        assert res.returncode == 2 and "no such database" in res.stderr and str(missing) in res.stderr
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    "args, message",
    [
        (["1", "2", "3"], "one run, or two"),
        (["7"], "there is no run 7"),
    ],
)
def test_bad_report_arguments_exit_2_and_store_nothing(tmp_path, args, message):
    db = tmp_path / "one.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    res = cli("report", *args, "--db", str(db))
    assert res.returncode == 2 and message in res.stderr and "Traceback" not in res.stderr
    assert sqlite3.connect(db).execute("SELECT COUNT(*) FROM fits").fetchone()[0] == 0


def test_out_that_is_a_file_is_refused_before_anything_is_written(tmp_path):
    db = tmp_path / "one.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    target = tmp_path / "taken"
    target.write_text("not a folder")
    res = cli("report", "1", "--db", str(db), "--out", str(target))
    assert res.returncode == 2 and "must be a directory" in res.stderr and "Traceback" not in res.stderr
    assert sqlite3.connect(db).execute("SELECT COUNT(*) FROM fits").fetchone()[0] == 0
    assert target.read_text() == "not a folder"
