"""The result database as a product: stable views, stored fits, counts, migration, read-only opens,
errors that name the file, documented queries."""

from __future__ import annotations

import hashlib
import json
import re
import shlex
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from nightbench.analysis.report import build_report, save_fits
from nightbench.drivers.errors import InputError, NightbenchError
from nightbench.store.db import SCHEMA_VERSION, Store
from tests.conftest import cli, store_run

DOC = Path(__file__).resolve().parent.parent / "docs" / "database.md"
FREQS = [100e6, 500e6, 900e6]

# the documented column lists of the stable views (docs/database.md): a contract for integrators
V_POINTS = [
    "run_id",
    "run_name",
    "dut_id",
    "run_state",
    "run_started_at",
    "run_finished_at",
    "source_idn",
    "meter_idn",
    "idx",
    "frequency_hz",
    "temperature_c",
    "power_dbm",
    "source_dbm",
    "value_v",
    "stdev_v",
    "samples",
    "settle_s",
    "settle_readings",
    "settled",
    "overload",
    "measured_at",
    "chamber_c",
    "dut_c",
    "error_db",
    "repeat",
    "direction",
    "unit_id",
]
V_FITS = [
    "run_id",
    "run_name",
    "dut_id",
    "run_state",
    "run_started_at",
    "run_finished_at",
    "frequency_hz",
    "temperature_c",
    "slope_mv_per_db",
    "slope_u_mv_per_db",
    "intercept_dbm",
    "intercept_u_db",
    "fit_low_dbm",
    "fit_high_dbm",
    "error_limit_db",
    "range_low_dbm",
    "range_high_dbm",
    "dynamic_range_db",
    "max_abs_error_db",
    "points",
    "unsettled_points",
    "overload_points",
    "analysed_at",
    "law",
    "responsivity_v_per_mw",
    "responsivity_u_v_per_mw",
    "gain_v_per_v",
    "gain_u_v_per_v",
    "offset_v",
    "offset_u_v",
    "ranges",
    "slope_k",
    "slope_nu_eff",
    "intercept_k",
    "intercept_nu_eff",
    "range_low_u_db",
    "range_high_u_db",
    "unit_id",  # issue 17: several units (docs/units.md)
    "analysis_id",
]


def _complete(db: Path, run_id: int) -> None:
    """What a run does when it completes (runs.store_fits): analyse it and store its fits."""
    store = Store(db)
    save_fits(store, build_report(store, run_id))
    store.close()


def _batch(db: Path) -> None:
    """Three invented boards, one of them twice, with known slopes; fits stored as on completion."""

    def bad_top(p: float, f: float) -> str:  # board -01 overloads at the top and misses one point
        return "overload" if p == 0 else "unsettled" if (p, f) == (-40, 500e6) else "ok"

    for dut, slope, icpt in (
        ("B7-proto-03", 0.0200, -92.0),
        ("B7-proto-01", 0.0198, -91.0),
        ("B7-proto-03", 0.0201, -91.5),
        ("B7-proto-02", 0.0203, -93.0),
    ):
        store_run(
            db,
            lambda p, f, s=slope, i=icpt: s * (max(p, -80.0) - i),
            dut_id=dut,
            frequencies=FREQS,
            status=bad_top if dut == "B7-proto-01" else None,
        )
    for run_id in range(1, 5):
        _complete(db, run_id)


def _columns(conn: sqlite3.Connection, view: str) -> list[str]:
    return [row[1] for row in conn.execute(f"PRAGMA table_info({view})")]


def test_views_have_the_documented_columns_and_one_row_per_point_and_per_group(tmp_path):
    db = tmp_path / "lab.db"
    _batch(db)
    conn = sqlite3.connect(db)
    assert _columns(conn, "v_points") == V_POINTS and _columns(conn, "v_fits") == V_FITS
    doc = DOC.read_text()
    assert all(f"`{c}`" in doc for c in V_POINTS + V_FITS)
    points = conn.execute("SELECT COUNT(*) FROM points").fetchone()[0]
    assert conn.execute("SELECT COUNT(*) FROM v_points").fetchone()[0] == points == 4 * 3 * 41
    assert conn.execute("SELECT COUNT(*) FROM v_fits").fetchone()[0] == 4 * 3
    # a stored fit is the law it came from: run 3 is 20.1 mV/dB, 0 V at -91.5 dBm
    slope, icpt = conn.execute(
        "SELECT slope_mv_per_db, intercept_dbm FROM v_fits WHERE run_id = 3 AND frequency_hz = 500e6"
    ).fetchone()
    assert slope == pytest.approx(20.1) and icpt == pytest.approx(-91.5)


def test_saving_fits_replaces_a_runs_rows_rather_than_adding_to_them(tmp_path):
    db = tmp_path / "lab.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0), frequencies=FREQS)
    for _ in range(3):
        _complete(db, 1)
    assert sqlite3.connect(db).execute("SELECT COUNT(*) FROM fits").fetchone()[0] == 3


def test_points_done_is_kept_by_the_database(tmp_path):
    db = tmp_path / "lab.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    store_run(db, lambda p, f: 0.02 * (p + 90.0), levels=[-40, -35, -30])
    store = Store(db)
    counts = {r["id"]: r["points_done"] for r in store.runs()}
    truth = dict(store.conn.execute("SELECT run_id, COUNT(*) FROM points GROUP BY run_id").fetchall())
    assert counts == truth == {1: 41, 2: 3}
    store.conn.execute("DELETE FROM points WHERE run_id = 2 AND idx = 0")
    assert {r["id"]: r["points_done"] for r in store.runs()} == {1: 41, 2: 2}


def _version_1(db: Path) -> None:
    """A file as version 1 wrote it (before fits, run_counts, the views and the file snapshots)."""
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    conn = sqlite3.connect(db)
    conn.executescript(
        "DROP VIEW v_points; DROP VIEW v_fits; DROP VIEW v_fits_all; DROP TABLE point_errors; DROP TABLE analyses; "
        "DROP TRIGGER points_counted; "
        "DROP TRIGGER points_uncounted; DROP TABLE run_counts; DROP TABLE fits; DROP TABLE run_files; "
        "DROP TABLE jobs; DROP TABLE service; DROP TABLE soaks; ALTER TABLE points DROP COLUMN temperature_c; "
        "ALTER TABLE points DROP COLUMN chamber_c; ALTER TABLE points DROP COLUMN dut_c; "
        "ALTER TABLE points DROP COLUMN repeat; ALTER TABLE points DROP COLUMN direction; "
        "ALTER TABLE points DROP COLUMN unit_id; DROP TABLE instruments; "
        "UPDATE meta SET value = '1' WHERE key = 'schema_version';"
    )
    conn.close()


def _fingerprint(db: Path) -> tuple[str, str]:
    """sha256 of the file and of its write-ahead log (an absent log reads as empty)."""
    wal = Path(f"{db}-wal")
    return (
        hashlib.sha256(db.read_bytes()).hexdigest(),
        hashlib.sha256(wal.read_bytes() if wal.exists() else b"").hexdigest(),
    )


def test_a_version_1_file_is_migrated_in_place(tmp_path):
    db = tmp_path / "old.db"
    _version_1(db)
    store = Store(db, create=False)
    assert store.conn.execute("SELECT value FROM meta").fetchone()[0] == str(SCHEMA_VERSION)
    assert store.runs()[0]["points_done"] == 41
    assert store.conn.execute("SELECT COUNT(*) FROM v_points").fetchone()[0] == 41
    # version 4 added columns to a table the file already had: they are there, NULL for old points
    assert store.conn.execute("SELECT COUNT(*) FROM v_points WHERE temperature_c IS NULL").fetchone()[0] == 41
    # version 6: an old point is the first (only) pass, with no direction and no unit
    old = "SELECT COUNT(*) FROM v_points WHERE repeat = 0 AND direction IS NULL AND unit_id IS NULL"
    assert store.conn.execute(old).fetchone()[0] == 41


def test_a_read_only_open_reads_an_old_file_as_it_is_and_writes_nothing(tmp_path):
    db = tmp_path / "old.db"
    _version_1(db)
    before = _fingerprint(db)
    report = cli("report", "1", "--db", str(db), "--json")
    assert report.returncode == 0, report.stderr
    assert json.loads(report.stdout)["groups"][0]["slope_mv_per_db"] == pytest.approx(20.0)
    assert cli("export", "1", "--db", str(db)).returncode == 0
    assert _fingerprint(db) == before
    store = Store.open_readonly(db)
    assert store.schema_version == 1
    # the tables version 1 did not have read as empty; the rest as they are
    assert store.run_files(1) == {} and store.fits(1) == []
    assert store.runs()[0]["points_done"] == 41
    store.close()
    assert _fingerprint(db) == before
    assert sqlite3.connect(db).execute("SELECT value FROM meta").fetchone()[0] == "1"


def test_a_read_only_store_analyses_but_cannot_write(tmp_path):
    db = tmp_path / "lab.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    store = Store.open_readonly(db)
    report = build_report(store, 1)
    assert report.groups[0].slope_mv_per_db == pytest.approx(20.0)
    with pytest.raises(NightbenchError, match="readonly") as info:
        save_fits(store, report)
    assert str(db) in str(info.value)


def test_a_read_only_open_of_a_missing_file_names_it_and_creates_nothing(tmp_path):
    missing = tmp_path / "typo.db"
    with pytest.raises(InputError, match="no such database") as info:
        Store.open_readonly(missing)
    assert str(missing) in str(info.value)
    assert list(tmp_path.iterdir()) == []


def test_a_file_from_a_newer_nightbench_is_refused_and_left_alone(tmp_path):
    db = tmp_path / "new.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    conn = sqlite3.connect(db)
    conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION + 1),))
    conn.commit()
    conn.close()
    before = _fingerprint(db)
    res = cli("report", "1", "--db", str(db))
    assert res.returncode == 2 and "newer nightbench" in res.stderr and "Traceback" not in res.stderr
    for open_store in (Store, Store.open_readonly):
        with pytest.raises(InputError, match="newer nightbench"):
            open_store(db)
    assert _fingerprint(db) == before


def _hold_exclusive_lock(db: Path, locking_mode: str = "NORMAL") -> sqlite3.Connection:
    """Another process writing with an exclusive lock (BEGIN EXCLUSIVE and a row not yet committed)."""
    locker = sqlite3.connect(db, isolation_level=None)
    locker.execute(f"PRAGMA locking_mode = {locking_mode}")
    locker.execute("BEGIN EXCLUSIVE")
    locker.execute("INSERT INTO events (run_id, at, kind, message) VALUES (1, 'now', 'note', 'holding the lock')")
    return locker


@pytest.mark.parametrize("readonly", [False, True], ids=["read-write", "read-only"])
@pytest.mark.parametrize("read", ["run_files", "run", "runs", "points", "done_indices"])
def test_a_locked_database_is_an_error_naming_the_file_never_an_empty_result(tmp_path, read, readonly):
    db = tmp_path / "lab.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    conn = sqlite3.connect(db)
    conn.execute("INSERT INTO run_files (run_id, path, text) VALUES (1, 'cal/cable.s2p', '! a cable')")
    conn.commit()
    # A WAL reader is never blocked by a writer's lock, so the file goes back to a rollback journal,
    # as `sqlite-utils disable-wal` leaves it; there an exclusive lock keeps every reader out.
    assert conn.execute("PRAGMA journal_mode = DELETE").fetchone()[0] == "delete"
    conn.close()
    store = Store.open_readonly(db, busy_timeout_s=0.05) if readonly else Store(db, busy_timeout_s=0.05)
    if not readonly:  # opening for writing made it WAL again
        assert store.conn.execute("PRAGMA journal_mode = DELETE").fetchone()[0] == "delete"
    assert store.run_files(1) == {"cal/cable.s2p": "! a cable"}
    locker = _hold_exclusive_lock(db)
    try:
        with pytest.raises(NightbenchError) as info:
            getattr(store, read)(*([] if read == "runs" else [1]))
        assert str(db) in str(info.value) and "locked" in str(info.value)
        assert info.value.exit_code == 1  # not bad input: the same command may work in a moment
    finally:
        locker.execute("ROLLBACK")
        locker.close()
        store.close()


@pytest.mark.parametrize("readonly", [False, True], ids=["read-write", "read-only"])
def test_opening_a_locked_database_is_an_error_naming_the_file_not_bad_input(tmp_path, readonly):
    db = tmp_path / "lab.db"
    store_run(db, lambda p, f: 0.02 * (p + 90.0))
    # in WAL mode only a connection in exclusive locking mode keeps readers out (sqlite.org/wal.html)
    locker = _hold_exclusive_lock(db, "EXCLUSIVE")
    try:
        with pytest.raises(NightbenchError) as info:
            Store.open_readonly(db, busy_timeout_s=0.05) if readonly else Store(db, busy_timeout_s=0.05)
        assert str(db) in str(info.value) and "locked" in str(info.value)
        assert info.value.exit_code == 1
    finally:
        locker.execute("ROLLBACK")
        locker.close()


def test_a_sqlite_file_that_is_not_ours_is_refused_and_left_alone(tmp_path):
    other = tmp_path / "other.db"
    sqlite3.connect(other).executescript("CREATE TABLE t (x); INSERT INTO t VALUES (1);")
    res = cli("report", "1", "--db", str(other))
    assert res.returncode == 2 and "not a nightbench database" in res.stderr and "Traceback" not in res.stderr
    tables = sqlite3.connect(other).execute("SELECT name FROM sqlite_master").fetchall()
    assert tables == [("t",)]


def _doc_blocks(lang: str) -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)```", DOC.read_text(), flags=re.S)


def test_every_worked_query_in_the_docs_runs(tmp_path):
    db = tmp_path / "lab.db"
    _batch(db)
    conn = sqlite3.connect(db)
    queries = [q for block in _doc_blocks("sql") for q in block.split(";") if q.strip()]
    assert len(queries) >= 4
    for query in queries:
        assert conn.execute(query).fetchall(), f"no rows from the documented query:\n{query}"
    commands = [line for block in _doc_blocks("sh") for line in block.splitlines() if line.startswith("sqlite-utils ")]
    assert len(commands) >= 2
    tool = Path(sys.executable).with_name("sqlite-utils")
    for line in commands:
        argv = [str(db) if a == "lab.db" else a for a in shlex.split(line)]
        res = subprocess.run([str(tool), *argv[1:]], capture_output=True, text=True, timeout=60)
        assert res.returncode == 0 and len(res.stdout.splitlines()) >= 2, (line, res.stderr)


def test_timestamps_come_from_one_clock_reading(monkeypatch):
    # A time just before a second boundary must not be written with the next reading's
    # milliseconds under the earlier second (it came out a second early).
    import time as real_time

    from nightbench.store import db as store

    readings = iter([1_800_000_000.999, 1_800_000_001.003])
    monkeypatch.setattr(store.time, "time", lambda: next(readings))
    stamp = store.now_iso()
    expected = real_time.strftime("%Y-%m-%dT%H:%M:%S", real_time.localtime(1_800_000_000)) + ".999"
    assert stamp == expected


def _version_4_with_fits(db: Path) -> None:
    """A file as version 4 wrote it: fits stored on completion, but no analyses, no laws' columns,
    no point errors."""
    from nightbench.store.fields import added_fit_columns

    store_run(db, lambda p, f: 0.02 * (p + 90.0), frequencies=FREQS)
    _complete(db, 1)
    conn = sqlite3.connect(db)
    drops = "".join(f"ALTER TABLE fits DROP COLUMN {c};" for _, c, _ in added_fit_columns(5))
    conn.executescript(
        "DROP VIEW v_points; DROP VIEW v_fits; DROP VIEW v_fits_all; DROP TABLE point_errors; DROP TABLE analyses;"
        + drops
        + "ALTER TABLE fits DROP COLUMN analysis_id; ALTER TABLE points DROP COLUMN repeat; "
        "ALTER TABLE points DROP COLUMN direction; ALTER TABLE points DROP COLUMN unit_id; DROP TABLE instruments; "
        "UPDATE meta SET value = '4' WHERE key = 'schema_version';"
    )
    conn.close()


def test_a_version_4_file_with_fits_gets_them_as_the_runs_own_analysis(tmp_path):
    db = tmp_path / "v4.db"
    _version_4_with_fits(db)
    store = Store(db, create=False)
    assert store.conn.execute("SELECT value FROM meta").fetchone()[0] == str(SCHEMA_VERSION) == "6"
    (analysis,) = store.analyses(1)
    assert (analysis["origin"], analysis["law"], analysis["fit_dbm"], analysis["error_limits_db"]) == (
        "run",
        "log",
        (-60.0, -20.0),
        [1.0],
    )
    rows = store.conn.execute("SELECT law, slope_mv_per_db, analysis_id FROM v_fits ORDER BY frequency_hz").fetchall()
    assert [tuple(r) for r in rows] == [("log", pytest.approx(20.0), analysis["id"])] * 3
    # its points' errors were not stored by version 4: NULL until the run is analysed again
    assert store.conn.execute("SELECT COUNT(*) FROM v_points WHERE error_db IS NOT NULL").fetchone()[0] == 0
    store.close()
    assert cli("report", "1", "--db", str(db), "--save").returncode == 0
    conn = sqlite3.connect(db)
    assert conn.execute("SELECT COUNT(*) FROM v_points WHERE error_db IS NOT NULL").fetchone()[0] == 3 * 41
    assert conn.execute("SELECT COUNT(*) FROM v_fits_all").fetchone()[0] == 6  # both analyses kept
