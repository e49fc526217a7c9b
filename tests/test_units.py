"""Several units in one night, on the simulated bench: one eight-unit run shared by the tests.

The simulator's `[[unit]]` tables give each switch route its own detector (a lot's spread); one
unit is built to fail on intercept, one to sit inside the guard band. References: JCGM 106:2012
(simple and guarded acceptance), numpy (mean, std with ddof=1, min, max), and the simulator's own
log of every route change with the source's RF state at that instant (not the engine's belief).
"""

from __future__ import annotations

import json
import math
import sqlite3
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from nightbench.analysis.report import build_report
from nightbench.output.unit_plots import write_unit_plots
from nightbench.output.units import markdown_units, render_units
from nightbench.simproc import SimProcess
from nightbench.store.db import Store
from tests.conftest import assert_never_above, cli, source_log

FREQS = [100e6, 500e6]
# intercept_dbm and slope (V/dB) of the detector behind each route; U07 fails on intercept
# (above -89 dBm), U08 sits inside the guard band (-89.3 dBm: within U of -89, U >= 0.58 dB from
# the stated source level accuracy of 0.5 dB alone, JCGM 100:2008 4.3.7 a/sqrt(3), k = 2)
UNITS = {
    "U01": (1, -93.0, 0.0195),
    "U02": (2, -92.5, 0.0198),
    "U03": (3, -92.0, 0.0200),
    "U04": (4, -91.5, 0.0202),
    "U05": (5, -91.0, 0.0205),
    "U06": (6, -90.5, 0.0200),
    "U07": (7, -87.5, 0.0200),
    "U08": (8, -89.3, 0.0200),
}
EXPECTED = {uid: "pass" for uid in UNITS} | {"U07": "fail", "U08": "indeterminate"}
ACCEPT = {
    "rule": "guarded",
    "slope_mv_per_db": [19.0, 21.0],
    "intercept_dbm": [-95.0, -89.0],
    "dynamic_range_db": [20.0, None],
}


def _config() -> str:
    lines = ["[detector]", "ripple_db = 0.0", "slope_change_per_ghz = 0.0", "intercept_db_per_ghz = 0.0", ""]
    for channel, intercept, slope in UNITS.values():
        lines += ["[[unit]]", f"channel = {channel}", f"intercept_dbm = {intercept}", f"slope_v_per_db = {slope}", ""]
    # a route for the fault test that does not close the first time it is asked (a stuck relay)
    lines += ["[[fault]]", 'kind = "stuck_route"', 'instrument = "switch"', "channel = 10", "count = 1", ""]
    return "\n".join(lines)


def _plan(resources: dict[str, Any], name: str, units: list[dict[str, Any]], freqs: list[float]) -> dict[str, Any]:
    return {
        "name": name,
        "dut": {"id": "lot-A"},
        "instruments": {
            "source": {"driver": "scpi-source", "resource": resources["source"], "timeout_s": 2},
            "meter": {"driver": "scpi-dmm", "resource": resources["meter"], "nplc": 0.1},
            "switch": {"driver": "scpi-switch", "resource": resources["switch"]},
        },
        "units": units,
        # the simulator's path: a 6 dB pad and 0.9 dB/sqrt(GHz) of cable (simulators/physics.py)
        "path": {"table": [[f, 6.0 + 0.9 * math.sqrt(f / 1e9)] for f in freqs]},
        "limits": {"dut_max_dbm": 0, "accept": ACCEPT},
        "sweep": {"frequency_hz": freqs, "power_dbm": {"start": -60, "stop": -20, "step": 10}},
        "settle": {"tolerance_v": 0.001, "timeout_s": 2},
        "measure": {"samples": 2},
        "analysis": {"fit_dbm": [-60, -20], "error_limit_db": 1.0, "source_level_accuracy_db": 0.5},
    }


def _start_sim(tmp: Path, config: str) -> tuple[SimProcess, Path]:
    (tmp / "sim.toml").write_text(config)
    log = tmp / "log.jsonl"
    return SimProcess("--config", str(tmp / "sim.toml"), "--log", str(log)), log


def test_eight_units_in_one_night(tmp_path: Path):
    """ONE eight-unit run (the slow part) and every check on it: verdicts, lot statistics, the
    switch's own log, report --unit, the text, Markdown and plot (xdist spreads test functions over
    workers, so the checks share one function rather than a module fixture each worker would redo)."""
    sim, log = _start_sim(tmp_path, _config())
    with sim:
        units = [{"id": uid, "channel": ch} for uid, (ch, _, _) in UNITS.items()]
        plan = tmp_path / "lot.yaml"
        plan.write_text(yaml.safe_dump(_plan(sim.resources, "lot-A", units, FREQS), sort_keys=False))
        db = tmp_path / "lot.db"
        run = cli("run", str(plan), "--db", str(db))
        assert run.returncode == 0, run.stderr
    store = Store(db, create=False)
    built = build_report(store, 1)  # in process, once: the CLI's --json prints this object's to_json()
    store.close()
    lot = {"log": log, "db": db, "built": built, "report": built.to_json()}
    check_verdicts_of_all_eight_units_under_the_guarded_rule(lot)
    check_lot_statistics_agree_with_numpy(lot)
    check_the_switch_only_moved_with_rf_off_from_the_simulators_log(lot)
    check_report_unit_shows_one_units_groups(lot)
    check_text_markdown_and_plot_show_units_and_lot(lot, tmp_path)
    check_two_runs_are_compared_unit_by_unit(lot)
    assert_never_above(log, 0.0)


def check_two_runs_are_compared_unit_by_unit(lot: dict[str, Any]) -> None:
    # `report A B` pairs each unit with the same unit: the run against itself gives one difference per
    # unit and frequency, each zero (paired by frequency alone, eight units would collapse into one)
    from nightbench.analysis.compare import compare_reports

    diffs = compare_reports(lot["built"], lot["built"]).to_json()["differences"]
    assert sorted((d["unit_id"], d["frequency_hz"]) for d in diffs) == sorted((u, f) for u in UNITS for f in FREQS)
    assert all(d["slope_diff_mv_per_db"] == 0.0 and d["intercept_diff_db"] == 0.0 for d in diffs)


def check_verdicts_of_all_eight_units_under_the_guarded_rule(lot: dict[str, Any]) -> None:
    report = lot["report"]
    got = {u["id"]: u["verdict"] for u in report["units"]}
    assert got == EXPECTED
    assert [u["id"] for u in report["units"]][:2] == ["U07", "U08"]  # worst first
    u08 = next(u for u in report["units"] if u["id"] == "U08")
    guard = [q for q in u08["quantities"] if q["verdict"] == "indeterminate"]
    assert guard and all(q["name"] == "intercept_dbm" for q in guard)
    for q in guard:  # JCGM 106:2012 8.3.2: inside the tolerance, outside the zone shrunk by U
        assert q["low"] <= q["value"] <= q["high"] and q["value"] > q["high"] - q["u"]
    u07 = next(u for u in report["units"] if u["id"] == "U07")
    assert {q["name"] for q in u07["quantities"] if q["verdict"] == "fail"} == {"intercept_dbm"}
    assert report["acceptance"]["rule"] == "guarded"
    assert {g["unit_id"] for g in report["groups"]} == set(UNITS)  # groups per unit and frequency
    assert len(report["groups"]) == len(UNITS) * len(FREQS)


def check_lot_statistics_agree_with_numpy(lot: dict[str, Any]) -> None:
    report = lot["report"]
    rows = report["lot"]
    assert len(rows) == 3 * len(FREQS)
    for row in rows:
        values = np.array(
            [
                q["value"]
                for u in report["units"]
                for q in u["quantities"]
                if q["name"] == row["name"] and q["frequency_hz"] == row["frequency_hz"]
            ]
        )
        assert row["n"] == len(values) == len(UNITS)
        assert row["mean"] == pytest.approx(np.mean(values), rel=1e-12)  # numpy as the reference
        assert row["min"] == np.min(values) and row["max"] == np.max(values)
        if np.std(values, ddof=1) > 0:
            assert row["std"] == pytest.approx(np.std(values, ddof=1), rel=1e-12)
    dr = [r for r in rows if r["name"] == "dynamic_range_db"]
    assert all(r["cp"] is None for r in dr)  # one-sided limit: no Cp (docs/units.md)


def check_the_switch_only_moved_with_rf_off_from_the_simulators_log(lot: dict[str, Any]) -> None:
    routes = [e for e in source_log(lot["log"]) if e["event"].startswith("switch")]
    closes = [e for e in routes if e["event"].startswith("switch close")]
    assert len(closes) >= len(UNITS)
    assert all(e["output"] is False for e in routes), [e for e in routes if e["output"]]
    units = [e["closed"] for e in closes[: len(UNITS)]]
    assert units == [ch for ch, _, _ in UNITS.values()]  # each unit's route once, in plan order


def test_a_stuck_route_stops_the_run_naming_the_unit_rf_off_and_resume_completes(tmp_path: Path):
    sim, log_path = _start_sim(tmp_path, _config())
    units = [{"id": "F09", "channel": 9}, {"id": "F10", "channel": 10}]
    db = tmp_path / "fault.db"
    with sim:
        plan = _plan(sim.resources, "fault", units, FREQS[:1])
        plan["sweep"]["power_dbm"] = [-60, -40, -20]
        (tmp_path / "fault.yaml").write_text(yaml.safe_dump(plan, sort_keys=False))
        run = cli("run", str(tmp_path / "fault.yaml"), "--db", str(db))
        assert run.returncode == 1, run.stderr
        assert "F10" in run.stderr and "channel 10" in run.stderr and "Traceback" not in run.stderr
        log = source_log(log_path)
        stuck = [i for i, e in enumerate(log) if e["event"] == "switch close 10 stuck open"]
        assert len(stuck) == 1
        # from the simulated source: RF was off at the stuck close and stayed off to the end of the run
        assert log[stuck[0]]["output"] is False and all(e["output"] is False for e in log[stuck[0] :])
        with sqlite3.connect(db) as con:
            state, done = con.execute("SELECT state, (SELECT COUNT(*) FROM points) FROM runs WHERE id = 1").fetchone()
        assert (state, done) == ("failed", 3)  # F09's three points kept
        resume = cli("resume", "1", "--db", str(db))  # the relay closes this time (the fault fires once)
        assert resume.returncode == 0, resume.stderr
    with sqlite3.connect(db) as con:
        rows = con.execute("SELECT idx, unit_id FROM points WHERE run_id = 1 ORDER BY idx").fetchall()
    assert [r[0] for r in rows] == list(range(6))  # no point lost, none twice
    assert [r[1] for r in rows] == ["F09"] * 3 + ["F10"] * 3
    assert_never_above(log_path, 0.0)


def check_report_unit_shows_one_units_groups(lot: dict[str, Any]) -> None:
    res = cli("report", "1", "--db", str(lot["db"]), "--unit", "U07", "--json")
    assert res.returncode == 0, res.stderr
    data = json.loads(res.stdout)
    assert {g["unit_id"] for g in data["groups"]} == {"U07"} and len(data["groups"]) == len(FREQS)
    assert [u["id"] for u in data["units"]] == ["U07"]
    bad = cli("report", "1", "--db", str(lot["db"]), "--unit", "U99")
    assert bad.returncode == 2 and "U99" in bad.stderr and "U01" in bad.stderr


def check_text_markdown_and_plot_show_units_and_lot(lot: dict[str, Any], tmp_path: Path) -> None:
    built = lot["built"]
    text = "\n".join(render_units(built))
    assert "units, worst first" in text and "lot (Cp" in text
    assert text.index(" U07 ") < text.index(" U01 ")  # worst first
    summary = "\n".join(markdown_units(built))
    assert "### Units, worst first" in summary and "| U07 | fail |" in summary and "| U08 | indeterminate |" in summary
    (plot,) = write_unit_plots(built, tmp_path)
    assert plot.name == "units-run1.png" and plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
