"""The SQLite store: runs, points, raw readings. One file, WAL, every point committed on return.

Written with the standard sqlite3 module on the hot path (one transaction per point, raw
readings included, `synchronous=NORMAL`: a committed point survives any kill of the process);
the same file is meant to be read with sqlite3 or the `sqlite-utils` command line.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import sqlite3
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from nightbench.drivers.errors import InputError
from nightbench.store.errors import StoreError, is_busy
from nightbench.store.fields import FIT_COLUMNS, VIEW_COLUMNS, fits_table_sql
from nightbench.store.states import JobState, RunState, sql_in

SCHEMA_VERSION = 3   # 2: fits, run_counts, and the v_points / v_fits views; 3: jobs, service (docs/database.md)

# the CHECK constraints come from store/states.py (generated text identical to the words written before)
SCHEMA = f"""
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN {sql_in(RunState)}),
    plan_file TEXT,
    plan_text TEXT NOT NULL,
    plan_json TEXT NOT NULL,
    dut_id TEXT,
    points_total INTEGER NOT NULL,
    created_at TEXT NOT NULL,
    started_at TEXT,
    finished_at TEXT,
    error TEXT,
    pid INTEGER,
    host TEXT,
    heartbeat_at TEXT,
    source_idn TEXT,
    meter_idn TEXT
);
CREATE TABLE IF NOT EXISTS run_files (
    run_id INTEGER NOT NULL REFERENCES runs(id),
    path TEXT NOT NULL,
    text TEXT NOT NULL,
    PRIMARY KEY (run_id, path)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS points (
    run_id INTEGER NOT NULL REFERENCES runs(id),
    idx INTEGER NOT NULL,
    frequency_hz REAL NOT NULL,
    power_dbm REAL NOT NULL,
    source_dbm REAL NOT NULL,
    value_v REAL,
    stdev_v REAL,
    samples INTEGER NOT NULL,
    settle_s REAL NOT NULL,
    settle_readings INTEGER NOT NULL,
    settled INTEGER NOT NULL,
    overload INTEGER NOT NULL DEFAULT 0,
    measured_at TEXT NOT NULL,
    PRIMARY KEY (run_id, idx)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS readings (
    run_id INTEGER NOT NULL,
    idx INTEGER NOT NULL,
    seq INTEGER NOT NULL,
    t_s REAL NOT NULL,
    value_v REAL,
    phase TEXT NOT NULL CHECK (phase IN ('settle','measure')),
    PRIMARY KEY (run_id, idx, seq)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY,
    run_id INTEGER,
    at TEXT NOT NULL,
    kind TEXT NOT NULL,
    message TEXT NOT NULL
);
{fits_table_sql()}CREATE INDEX IF NOT EXISTS fits_run ON fits(run_id);
-- points per run, kept by the database itself in the same transaction as each point, so listing
-- runs costs one row per run instead of counting every point of a year (bench/store.py)
CREATE TABLE IF NOT EXISTS run_counts (run_id INTEGER PRIMARY KEY, points_done INTEGER NOT NULL);
CREATE TRIGGER IF NOT EXISTS points_counted AFTER INSERT ON points BEGIN
    INSERT INTO run_counts (run_id, points_done) VALUES (NEW.run_id, 1)
    ON CONFLICT (run_id) DO UPDATE SET points_done = points_done + 1;
END;
CREATE TRIGGER IF NOT EXISTS points_uncounted AFTER DELETE ON points BEGIN
    UPDATE run_counts SET points_done = points_done - 1 WHERE run_id = OLD.run_id;
END;
-- the overnight queue (service/queue.py): a job is a plan snapshot waiting for `serve`, then its run
CREATE TABLE IF NOT EXISTS jobs (
    id INTEGER PRIMARY KEY,
    plan_name TEXT NOT NULL,
    plan_file TEXT,
    plan_text TEXT NOT NULL,
    files_json TEXT NOT NULL,
    points_total INTEGER NOT NULL,
    not_before TEXT NOT NULL,
    not_before_ts REAL NOT NULL,
    submitted_at TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN {sql_in(JobState)}),
    run_id INTEGER REFERENCES runs(id),
    cancel_requested INTEGER NOT NULL DEFAULT 0,
    error TEXT
);
-- the one `serve` of this database and its heartbeat (service/serve.py)
CREATE TABLE IF NOT EXISTS service (
    id INTEGER PRIMARY KEY CHECK (id = 1),
    pid INTEGER NOT NULL,
    host TEXT NOT NULL,
    state TEXT NOT NULL,
    started_at TEXT NOT NULL,
    heartbeat_at TEXT NOT NULL
);
"""

# run on every migration: the counts of a file written before run_counts existed
BACKFILL = """
INSERT OR REPLACE INTO run_counts (run_id, points_done) SELECT run_id, COUNT(*) FROM points GROUP BY run_id;
"""

# The stable views: their names and columns are a documented contract (docs/database.md); the
# tables under them may change, so they are dropped and re-created whenever the schema version moves.
# v_fits lists the declared result fields (store/fields.py) in their order.
VIEWS = f"""
DROP VIEW IF EXISTS v_points;
CREATE VIEW v_points AS
SELECT p.run_id, r.name AS run_name, r.dut_id, r.state AS run_state, r.started_at AS run_started_at,
       r.finished_at AS run_finished_at, r.source_idn, r.meter_idn,
       p.idx, p.frequency_hz, NULL AS temperature_c, p.power_dbm, p.source_dbm, p.value_v, p.stdev_v,
       p.samples, p.settle_s, p.settle_readings, p.settled, p.overload, p.measured_at
FROM points p JOIN runs r ON r.id = p.run_id;
DROP VIEW IF EXISTS v_fits;
CREATE VIEW v_fits AS
SELECT f.run_id, r.name AS run_name, r.dut_id, r.state AS run_state, r.started_at AS run_started_at,
       r.finished_at AS run_finished_at, {", ".join(f"f.{c}" for c in (*VIEW_COLUMNS, "analysed_at"))}
FROM fits f JOIN runs r ON r.id = f.run_id;
"""


def now_iso() -> str:
    """Local time to the millisecond, from ONE clock reading (seconds and milliseconds taken
    from two readings could straddle a second and come out a second early)."""
    now = time.time()
    ms = int(now * 1000) % 1000
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(int(now * 1000) // 1000)) + f".{ms:03d}"


def default_db_path() -> str:
    return os.environ.get("NIGHTBENCH_DB") or "nightbench.db"


@dataclass
class PointResult:
    value_v: float | None
    stdev_v: float | None
    samples: int
    settle_s: float
    settle_readings: int
    settled: bool
    overload: bool
    readings: list[tuple[float, float | None, str]]   # (t since change, value, phase)


class Store:
    """One open database file.

    `Store(path)` is for the commands that write: it creates the file if need be and brings an
    older schema up to date. `Store.open_readonly(path)` is for the commands that only read: the
    file must exist, nothing is ever written to it (SQLite's `mode=ro`), and an older schema is
    read as it is, its missing tables as empty (docs/database.md). Every method raises a
    `StoreError` naming the file, never a bare sqlite3 exception; `conn` and `transaction()` are
    the raw tools for modules that keep their own tables here (service/queue.py).
    """

    def __init__(self, path: str | Path, *, create: bool = True, readonly: bool = False,
                 busy_timeout_s: float = 10.0) -> None:
        self.path = str(path)
        self.readonly = readonly
        if (readonly or not create) and not Path(self.path).is_file():
            raise InputError("no such database", file=self.path)
        try:
            if readonly:
                uri = Path(self.path).resolve().as_uri() + "?mode=ro"
                self.conn = sqlite3.connect(uri, uri=True, timeout=busy_timeout_s, isolation_level=None)
            else:
                self.conn = sqlite3.connect(self.path, timeout=busy_timeout_s, isolation_level=None)
            self.conn.row_factory = sqlite3.Row
            self.schema_version = self._stored_version(required=readonly or not create)
            if readonly:
                self.conn.execute("PRAGMA query_only=ON")
                return
            self.conn.execute("PRAGMA journal_mode=WAL")
            # WAL + NORMAL: a committed point survives the process being killed at any instant;
            # after a power cut the last points may be missing (never corrupt), and `resume`
            # measures them again. FULL (an fsync per point) cost ~0.4 ms a point: docs/performance.md.
            self.conn.execute("PRAGMA synchronous=NORMAL")
            self.conn.execute("PRAGMA foreign_keys=ON")
            self._migrate()
        except sqlite3.Error as exc:
            if is_busy(exc):
                raise StoreError(f"cannot open the database: {exc}", file=self.path, busy=True) from exc
            raise InputError(f"cannot use as a nightbench database: {exc}", file=self.path) from exc

    @classmethod
    def open_readonly(cls, path: str | Path, *, busy_timeout_s: float = 10.0) -> Store:
        """For commands that only read: never creates, migrates or writes the file. A lock held by
        another process is waited for up to `busy_timeout_s`, then is a StoreError."""
        return cls(path, readonly=True, busy_timeout_s=busy_timeout_s)

    def _stored_version(self, *, required: bool) -> int:
        """The file's schema version (0: a new, empty file); refuses files that are not ours or
        that a newer nightbench wrote (its tables may mean something this version does not know)."""
        has_meta = self.conn.execute("SELECT 1 FROM sqlite_master WHERE type='table' AND name='meta'").fetchone()
        if not has_meta:
            if required:
                raise InputError("not a nightbench database (it has no meta table)", file=self.path)
            return 0
        row = self.conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        version = int(row[0]) if row is not None and str(row[0]).isdigit() else 0
        if version > SCHEMA_VERSION:
            raise InputError(f"written by a newer nightbench (schema version {version}; this one reads up to "
                             f"{SCHEMA_VERSION}): use that version", file=self.path)
        return version

    def _migrate(self) -> None:
        """Bring the schema to SCHEMA_VERSION; an up-to-date file costs no write."""
        if self.schema_version == SCHEMA_VERSION:
            return
        self.conn.executescript("BEGIN IMMEDIATE;" + SCHEMA + VIEWS + BACKFILL
                                + f"INSERT OR REPLACE INTO meta VALUES ('schema_version', '{SCHEMA_VERSION}');COMMIT;")
        self.schema_version = SCHEMA_VERSION

    @contextlib.contextmanager
    def _sql(self, doing: str) -> Iterator[None]:
        """sqlite3's exceptions as a StoreError naming the file and what was being done."""
        try:
            yield
        except sqlite3.Error as exc:
            raise StoreError(f"{doing}: {exc}", file=self.path, busy=is_busy(exc)) from exc

    def absent(self, table: str) -> bool:
        """True only for a table an older schema does not have yet (a read-only open of an old
        file): the one case where a reader may treat a table as empty."""
        if self.schema_version >= SCHEMA_VERSION:
            return False
        with self._sql(f"looking for the {table} table"):
            row = self.conn.execute("SELECT 1 FROM sqlite_master WHERE type='table' AND name=?", (table,)).fetchone()
        return row is None

    def close(self) -> None:
        self.conn.close()

    # -- runs -----------------------------------------------------------------------------
    def create_run(self, *, name: str, plan_file: str | None, plan_text: str, plan_json: dict[str, Any],
                   dut_id: str | None, points_total: int, state: str = RunState.QUEUED,
                   files: dict[str, str] | None = None) -> int:
        """A run with its plan snapshot: the text, the parsed form, and the referenced files'
        texts (keyed by the path the plan wrote), in one transaction."""
        with self._sql("storing a new run"), self._transaction():
            cur = self.conn.execute(
                "INSERT INTO runs (name, state, plan_file, plan_text, plan_json, dut_id, points_total, created_at)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (name, state, plan_file, plan_text, json.dumps(plan_json), dut_id, points_total, now_iso()))
            run_id = int(cur.lastrowid or 0)
            self.conn.executemany("INSERT INTO run_files (run_id, path, text) VALUES (?, ?, ?)",
                                  [(run_id, path, text) for path, text in (files or {}).items()])
        return run_id

    def run_files(self, run_id: int) -> dict[str, str]:
        """The referenced files' texts as the run used them (none in a file from before they were kept)."""
        if self.absent("run_files"):
            return {}
        with self._sql(f"reading the files of run {run_id}"):
            rows = self.conn.execute("SELECT path, text FROM run_files WHERE run_id=? ORDER BY path",
                                     (run_id,)).fetchall()
        return {r["path"]: r["text"] for r in rows}

    def mark_running(self, run_id: int) -> None:
        with self._sql(f"marking run {run_id} running"):
            self.conn.execute(
                "UPDATE runs SET state=?, started_at=COALESCE(started_at, ?), finished_at=NULL, error=NULL,"
                " pid=?, host=?, heartbeat_at=? WHERE id=?",
                (RunState.RUNNING, now_iso(), os.getpid(), socket.gethostname(), now_iso(), run_id))

    def set_identities(self, run_id: int, source_idn: str, meter_idn: str) -> None:
        with self._sql(f"storing the instruments of run {run_id}"):
            self.conn.execute("UPDATE runs SET source_idn=?, meter_idn=? WHERE id=?",
                              (source_idn, meter_idn, run_id))

    def finish_run(self, run_id: int, state: str, error: str | None = None) -> None:
        assert state in tuple(RunState)
        with self._sql(f"storing the end of run {run_id}"):
            self.conn.execute("UPDATE runs SET state=?, finished_at=?, error=? WHERE id=?",
                              (state, now_iso(), error, run_id))

    def event(self, run_id: int | None, kind: str, message: str) -> None:
        with self._sql(f"storing a {kind} event"):
            self.conn.execute("INSERT INTO events (run_id, at, kind, message) VALUES (?, ?, ?, ?)",
                              (run_id, now_iso(), kind, message))

    def run(self, run_id: int) -> sqlite3.Row:
        with self._sql(f"reading run {run_id}"):
            row = self.conn.execute("SELECT * FROM runs WHERE id=?", (run_id,)).fetchone()
        if row is None:
            raise InputError(f"there is no run {run_id}", file=self.path)
        return row

    def runs(self) -> list[dict[str, Any]]:
        # a file from before run_counts (read-only, not migrated) counts its points the slow way
        done = ("(SELECT COUNT(*) FROM points p WHERE p.run_id = r.id)" if self.absent("run_counts")
                else "COALESCE((SELECT c.points_done FROM run_counts c WHERE c.run_id = r.id), 0)")
        with self._sql("listing the runs"):
            rows = self.conn.execute(
                f"SELECT r.id, r.name, r.state, r.points_total, r.started_at, r.finished_at, {done} AS points_done"
                " FROM runs r ORDER BY r.id").fetchall()
        return [{"id": r["id"], "name": r["name"], "state": r["state"], "points_done": r["points_done"],
                 "points_total": r["points_total"], "started_at": r["started_at"],
                 "finished_at": r["finished_at"]} for r in rows]

    # -- points ---------------------------------------------------------------------------
    def done_indices(self, run_id: int) -> set[int]:
        with self._sql(f"reading the points of run {run_id}"):
            return {r[0] for r in self.conn.execute("SELECT idx FROM points WHERE run_id=?", (run_id,))}

    def add_point(self, run_id: int, point: Any, result: PointResult) -> None:
        """Store a point and its raw readings in one transaction; durable when this returns."""
        with self._sql(f"storing point {point.index} of run {run_id}"), self._transaction():
            self.conn.execute(
                "INSERT INTO points (run_id, idx, frequency_hz, power_dbm, source_dbm, value_v, stdev_v, samples,"
                " settle_s, settle_readings, settled, overload, measured_at) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
                (run_id, point.index, point.frequency_hz, point.power_dbm, point.source_dbm, result.value_v,
                 result.stdev_v, result.samples, result.settle_s, result.settle_readings, int(result.settled),
                 int(result.overload), now_iso()))
            self.conn.executemany(
                "INSERT INTO readings (run_id, idx, seq, t_s, value_v, phase) VALUES (?,?,?,?,?,?)",
                [(run_id, point.index, seq, t, v, phase) for seq, (t, v, phase) in enumerate(result.readings)])
            self.conn.execute("UPDATE runs SET heartbeat_at=? WHERE id=?", (now_iso(), run_id))

    def points(self, run_id: int) -> list[sqlite3.Row]:
        with self._sql(f"reading the points of run {run_id}"):
            return self.conn.execute("SELECT * FROM points WHERE run_id=? ORDER BY idx", (run_id,)).fetchall()

    # -- fits ------------------------------------------------------------------------------
    def replace_fits(self, run_id: int, rows: list[dict[str, Any]]) -> None:
        """Replace the stored fit results of a run (one row per group, keyed by FIT_COLUMNS) in one
        transaction; analysis.report.save_fits builds the rows."""
        with self._sql(f"storing the fit results of run {run_id}"), self._transaction():
            self.conn.execute("DELETE FROM fits WHERE run_id=?", (run_id,))
            self.conn.executemany(
                f"INSERT INTO fits (run_id, {', '.join(FIT_COLUMNS)}, analysed_at)"
                f" VALUES (?, {', '.join('?' * len(FIT_COLUMNS))}, ?)",
                [(run_id, *(r[c] for c in FIT_COLUMNS), now_iso()) for r in rows])

    def fits(self, run_id: int) -> list[sqlite3.Row]:
        if self.absent("fits"):
            return []
        with self._sql(f"reading the fit results of run {run_id}"):
            return self.conn.execute("SELECT * FROM fits WHERE run_id=? ORDER BY frequency_hz, temperature_c",
                                     (run_id,)).fetchall()

    def _transaction(self) -> _Tx:
        return _Tx(self.conn)

    transaction = _transaction   # for the modules that keep their own tables here (service/queue.py)


class _Tx:
    def __init__(self, conn: sqlite3.Connection) -> None:
        self.conn = conn

    def __enter__(self) -> None:
        self.conn.execute("BEGIN IMMEDIATE")

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        self.conn.execute("COMMIT" if exc_type is None else "ROLLBACK")
