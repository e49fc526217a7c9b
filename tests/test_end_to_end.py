"""The walking skeleton end to end: CLI -> pyvisa-py over real TCP -> simulator process -> SQLite.

The simulator's own noiseless law (its Python truth API, same default config as the process)
is the reference: stored values and the fitted slope must agree with it.
"""

from __future__ import annotations

import csv
import io
import json
import sqlite3

import pytest

from nightbench.analysis.fit import analyse_group
from nightbench.simulators.physics import BenchConfig, BenchModel
from tests.conftest import cli, plan_dict
from tests.test_report import DOCUMENTED_GROUP_KEYS

# the documented group keys (docs/design.md) come first in every group; test_report.py pins the list
REPORT_KEYS = set(DOCUMENTED_GROUP_KEYS)


def test_run_stores_points_that_match_the_simulated_law(bench, write_plan, db):
    truth = BenchModel(BenchConfig())
    freqs = [100e6, 900e6]
    plan = plan_dict(
        bench.resources,
        path={"table": [[100e6, truth.config.path.loss(100e6)], [900e6, truth.config.path.loss(900e6)]]},
        sweep={"frequency_hz": freqs, "power_dbm": {"start": -70, "stop": -10, "step": 2}},
    )
    res = cli("run", str(write_plan(plan)), "--db", str(db))
    assert res.returncode == 0, res.stderr
    assert "completed" in res.stdout

    conn = sqlite3.connect(db)
    conn.row_factory = sqlite3.Row
    rows = [dict(r) for r in conn.execute("SELECT * FROM points WHERE run_id=1 ORDER BY idx")]
    assert [r["idx"] for r in rows] == list(range(2 * 31))
    assert all(r["settled"] == 1 for r in rows)
    for r in rows:
        expected = truth.truth_v(r["power_dbm"], r["frequency_hz"])
        # tolerance 0.5 mV plus 3 standard errors of the 4-sample mean
        assert abs(r["value_v"] - expected) < 0.0005 + 3 * (r["stdev_v"] or 0) / 2, r
        # the source is set to DUT level + loss, rounded down to the 0.001 dB it is commanded in
        wanted = r["power_dbm"] + truth.config.path.loss(r["frequency_hz"])
        assert wanted - 0.001 < r["source_dbm"] <= wanted + 1e-9
    readings = conn.execute("SELECT COUNT(*) FROM readings WHERE run_id=1").fetchone()[0]
    assert readings >= sum(r["samples"] + r["settle_readings"] for r in rows)

    report = json.loads(cli("report", "1", "--db", str(db), "--json").stdout)
    assert report["run_id"] == 1 and len(report["groups"]) == 2
    for group in report["groups"]:
        assert set(list(group)[: len(REPORT_KEYS)]) == REPORT_KEYS
        f = group["frequency_hz"]
        ideal = [
            {"power_dbm": p, "value_v": truth.truth_v(p, f), "settled": 1, "overload": 0} for p in range(-70, -9, 2)
        ]
        ref = analyse_group(f, ideal, (-60, -20), 1.0)
        assert group["slope_mv_per_db"] == pytest.approx(ref.slope_mv_per_db, rel=0.005)
        assert group["intercept_dbm"] == pytest.approx(ref.intercept_dbm, abs=0.3)
        # and the simulator's configured law itself: slope 20 mV/dB scaled by its frequency coefficient
        assert group["slope_mv_per_db"] == pytest.approx(1e3 * truth.config.detector.slope(f), rel=0.01)


def test_rf_is_off_at_the_end_and_listing_and_export_follow_the_contract(bench, write_plan, db):
    plan = plan_dict(bench.resources, sweep={"frequency_hz": [100e6], "power_dbm": [-40, -30, -20]})
    assert cli("run", str(write_plan(plan)), "--db", str(db)).returncode == 0
    events = bench.events()
    assert events[-1]["output"] is False, "RF off must be the last thing the source hears"
    assert max(e["dut_dbm"] for e in events if e["dut_dbm"] is not None and e["output"]) <= 0

    runs = json.loads(cli("runs", "--db", str(db), "--json").stdout)
    assert runs == [
        {
            "id": 1,
            "name": "test-plan",
            "state": "completed",
            "points_done": 3,
            "points_total": 3,
            "started_at": runs[0]["started_at"],
            "finished_at": runs[0]["finished_at"],
        }
    ]
    assert runs[0]["started_at"] <= runs[0]["finished_at"]

    out = cli("export", "1", "--format", "csv", "--db", str(db)).stdout
    table = list(csv.DictReader(io.StringIO(out)))
    assert {"frequency_hz", "power_dbm", "source_dbm", "value_v", "stdev_v", "samples", "settle_s", "settled"} <= set(
        table[0]
    )
    assert [float(r["power_dbm"]) for r in table] == [-40, -30, -20]
    assert {r["settled"] for r in table} == {"1"}


def test_demo_runs_on_its_own(tmp_path):
    res = cli("demo", "--db", str(tmp_path / "demo.db"), timeout=90)
    assert res.returncode == 0, res.stderr
    assert "slope mV/dB" in res.stdout and "900.000" in res.stdout
