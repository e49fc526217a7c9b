"""`report RUN [--fit LOW HIGH] [--limit DB ...] [--law L] [--reference-c T] [--save]`: the analysis
chosen at report time (docs/design.md), through the real CLI in a child process on a real file.

The runs are written through the real plan loader and Store from laws whose results follow by
arithmetic (conftest.store_run): a detector that is an exact log law of 20 mV/dB through -90 dBm
inside -60..-20 dBm, and whose level error grows by 0.1 dB per dB outside it, has the range
-60 - 10 L .. -20 + 10 L for a limit of L dB (cut at the sweep's ends, -80 and 0 dBm).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import sqlite3
from pathlib import Path

import pytest

from tests.conftest import cli, store_run


def bent(p: float, f: float) -> float:
    """20 mV/dB through -90 dBm, with a level error of 0.1 dB per dB outside -60..-20 dBm."""
    error = 0.1 * max(p + 20.0, 0.0) + 0.1 * max(-60.0 - p, 0.0)
    return 0.020 * (p + error + 90.0)


def expected_range(limit: float) -> tuple[float, float]:
    return max(-60.0 - 10.0 * limit, -80.0), min(-20.0 + 10.0 * limit, 0.0)


def _fingerprint(db: Path) -> tuple[str, str]:
    wal = Path(f"{db}-wal")
    return (
        hashlib.sha256(db.read_bytes()).hexdigest(),
        hashlib.sha256(wal.read_bytes() if wal.exists() else b"").hexdigest(),
    )


def _number(text: str) -> float | None:
    return None if text == "" else float(text)


def _json(db: Path, *args: str) -> dict:
    res = cli("report", *args, "--db", str(db), "--json")
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)


@pytest.fixture
def bent_db(tmp_path: Path) -> Path:
    db = tmp_path / "bent.db"
    store_run(db, bent, frequencies=[100e6, 900e6])
    return db


def test_several_limits_give_one_range_each_and_the_json_echoes_them(bent_db):
    rep = _json(bent_db, "1", "--limit", "0.5", "--limit", "1", "--limit", "3")
    assert rep["analysis"]["error_limits_db"] == [0.5, 1.0, 3.0] and rep["analysis"]["source"] == "report options"
    for g in rep["groups"]:
        assert g["error_limit_db"] == 0.5 and g["fit_dbm"] == [-60, -20] and g["law"] == "log"
        assert [r["error_limit_db"] for r in g["ranges"]] == [0.5, 1.0, 3.0]
        for r in g["ranges"]:
            low, high = expected_range(r["error_limit_db"])
            assert (r["range_low_dbm"], r["range_high_dbm"]) == pytest.approx((low, high), abs=0.05)
            assert r["dynamic_range_db"] == pytest.approx(high - low, abs=0.1)
        # the first limit keeps the existing keys
        assert (g["range_low_dbm"], g["range_high_dbm"]) == (
            g["ranges"][0]["range_low_dbm"],
            g["ranges"][0]["range_high_dbm"],
        )
    text = cli("report", "1", "--db", str(bent_db), "--limit", "0.5", "--limit", "3").stdout
    assert "±0.5 dB: -65.0 .. -15.0 (50.0 dB)" in text and "±3 dB: -80.0 .. 0.0 (80.0 dB)" in text


def test_another_fit_range_and_reference_are_used_and_echoed(bent_db):
    rep = _json(bent_db, "1", "--fit", "-70", "-10", "--reference-c", "25")
    g = rep["groups"][0]
    assert g["fit_dbm"] == [-70, -10] and rep["analysis"]["fit_dbm"] == [-70, -10]
    assert rep["analysis"]["reference_c"] == 25
    # a fit over the bent parts no longer has a zero error inside: the fit reaches the 1 dB bends
    assert g["max_abs_error_db"] > 0.2
    plain = _json(bent_db, "1")
    assert plain["groups"][0]["max_abs_error_db"] == pytest.approx(0.0, abs=1e-9)
    assert plain["analysis"]["source"] == "plan"


def test_square_law_parameters_follow_from_the_stored_law_by_arithmetic(tmp_path):
    """An output of 0.8 V/mW + 2 mV (common practice: square law, output proportional to mW)."""
    db = tmp_path / "diode.db"
    store_run(db, lambda p, f: 0.8 * 10 ** (p / 10) + 0.002, levels={"start": -40, "stop": 0, "step": 2})
    rep = _json(db, "1", "--law", "square", "--fit", "-30", "-10")
    (g,) = rep["groups"]
    assert g["law"] == "square" and g["slope_mv_per_db"] is None and g["intercept_dbm"] is None
    assert g["responsivity_v_per_mw"] == pytest.approx(0.8, rel=1e-9)
    assert g["offset_v"] == pytest.approx(0.002, abs=1e-9)
    assert g["max_abs_error_db"] == pytest.approx(0.0, abs=1e-9)
    assert (g["range_low_dbm"], g["range_high_dbm"]) == (-40.0, 0.0)  # exact everywhere: the sweep's ends
    as_log = _json(db, "1", "--fit", "-30", "-10")["groups"][0]
    assert as_log["law"] == "log" and as_log["max_abs_error_db"] > 1.0  # a square law is no line in dB


def test_report_without_save_leaves_the_database_byte_for_byte_unchanged(bent_db, tmp_path):
    store_run(bent_db, bent, frequencies=[100e6])
    before = _fingerprint(bent_db)
    for args in (
        ["1", "--fit", "-70", "-10"],
        ["1", "--limit", "0.5", "--limit", "1", "--limit", "3", "--json"],
        ["1", "--law", "square"],
        ["1", "--law", "linear", "--json"],
        ["1", "--reference-c", "25", "--json"],
        ["1", "2", "--law", "linear", "--limit", "2", "--out", str(tmp_path / "out")],
    ):
        res = cli("report", *args, "--db", str(bent_db))
        assert res.returncode == 0, (args, res.stderr)
        assert _fingerprint(bent_db) == before, args


@pytest.mark.parametrize(
    "args, message",
    [
        (["--fit", "-10", "-70"], "LOW < HIGH"),
        (["--limit", "0"], "--limit must be a positive"),
        (["--limit", "1", "--limit", "-3"], "--limit must be a positive"),
        (["--fit", "-5", "-3"], "holds 1 of the run's levels"),
        (["--law", "cubic"], "'cubic' is not one of"),
    ],
)
def test_bad_choices_exit_2_and_write_nothing_even_with_save(bent_db, args, message):
    before = _fingerprint(bent_db)
    res = cli("report", "1", *args, "--save", "--db", str(bent_db))
    assert res.returncode == 2 and message in res.stderr and "Traceback" not in res.stderr, res.stderr
    assert _fingerprint(bent_db) == before


def test_save_stores_an_analysis_that_the_views_export_and_plain_report_then_follow(bent_db, tmp_path):
    res = cli("report", "1", "--db", str(bent_db), "--law", "square", "--limit", "0.5", "--limit", "3", "--save")
    assert res.returncode == 0 and "stored as analysis" in res.stderr, res.stderr
    conn = sqlite3.connect(bent_db)
    assert conn.execute("SELECT origin, law, error_limits_json FROM analyses ORDER BY id").fetchall() == [
        ("report", "square", "[0.5, 3.0]")
    ]
    assert conn.execute("SELECT DISTINCT law, error_limit_db FROM v_fits WHERE run_id = 1").fetchall() == [
        ("square", 0.5)
    ]
    ranges = json.loads(conn.execute("SELECT ranges FROM v_fits WHERE frequency_hz = 100e6").fetchone()[0])
    assert [r["error_limit_db"] for r in ranges] == [0.5, 3.0]
    # a plain report now shows the saved analysis, and says so
    rep = _json(bent_db, "1")
    assert rep["analysis"]["law"] == "square" and rep["analysis"]["source"].startswith("saved analysis 1 (report")
    errors = {(c["power_dbm"]): c["error_db"] for c in rep["details"][0]["curve"]}
    view = dict(conn.execute("SELECT power_dbm, error_db FROM v_points WHERE frequency_hz = 100e6").fetchall())
    assert view == pytest.approx(errors)
    exported = list(csv.DictReader(io.StringIO(cli("export", "1", "--db", str(bent_db)).stdout)))
    assert list(exported[0])[:8] == [
        "frequency_hz",
        "power_dbm",
        "source_dbm",
        "value_v",
        "stdev_v",
        "samples",
        "settle_s",
        "settled",
    ]
    assert list(exported[0])[-1] == "error_db"
    at_100 = {float(r["power_dbm"]): _number(r["error_db"]) for r in exported if float(r["frequency_hz"]) == 100e6}
    assert None in errors.values() and at_100 == pytest.approx(errors)  # a square law leaves the bottom unexplained
    # a second save: both kept, the views show the latest
    assert cli("report", "1", "--db", str(bent_db), "--law", "log", "--save").returncode == 0
    assert conn.execute("SELECT COUNT(DISTINCT analysis_id) FROM v_fits_all WHERE run_id = 1").fetchone()[0] == 2
    assert conn.execute("SELECT DISTINCT law FROM v_fits WHERE run_id = 1").fetchall() == [("log",)]
    log_error = conn.execute("SELECT error_db FROM v_points WHERE frequency_hz = 100e6 AND power_dbm = 0").fetchone()[0]
    assert log_error == pytest.approx(2.0, abs=1e-6)  # 0.1 dB per dB over the 20 dB above -20 dBm


def test_out_follows_the_chosen_analysis(bent_db, tmp_path):
    out = tmp_path / "out"
    res = cli("report", "1", "--db", str(bent_db), "--law", "linear", "--out", str(out))
    assert res.returncode == 0, res.stderr
    rep = _json(bent_db, "1", "--law", "linear")
    errors = {(c["power_dbm"]): c["error_db"] for c in rep["details"][0]["curve"]}
    rows = list(csv.DictReader((out / "points-run1.csv").open()))
    got = {float(r["power_dbm"]): _number(r["error_db"]) for r in rows if float(r["frequency_hz"]) == 100e6}
    assert got == pytest.approx(errors)
    results = list(csv.DictReader((out / "results.csv").open()))
    assert {r["law"] for r in results} == {"linear"} and all(r["gain_v_per_v"] for r in results)
    summary = (out / "summary.md").read_text()
    assert "linear law" in summary and "gain (V/V)" in summary and "slope (mV/dB)" not in summary


def test_the_api_chooses_the_same_way_and_stores_nothing(bent_db):
    import nightbench

    before = _fingerprint(bent_db)
    with nightbench.open_db(bent_db) as results:
        rep = results.report(1, fit_dbm=(-60, -20), error_limit_db=[0.5, 1.0], law="log", reference_c=25.0)
    assert rep.settings.limits == (0.5, 1.0) and rep.settings.reference_c == 25.0
    low, high = expected_range(1.0)
    assert (rep.groups[0].ranges[1]["range_low_dbm"], rep.groups[0].ranges[1]["range_high_dbm"]) == pytest.approx(
        (low, high), abs=0.05
    )
    assert _fingerprint(bent_db) == before
