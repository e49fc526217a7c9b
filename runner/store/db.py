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
from nightbench.store.analyses import AnalysesMixin
from nightbench.store.errors import StoreError, is_busy
from nightbench.store.schema import ADDED_COLUMNS, BACKFILL, SCHEMA, SCHEMA_VERSION, VIEWS
from nightbench.store.states import RunState


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
    readings: list[tuple[float, float | None, str]]  # (t since change, value, phase)
    chamber_c: float | None = None  # the chamber's reading at this point (runs with a chamber)
    dut_c: float | None = None  # a DUT-side temperature sensor's reading, where the plan has one


class Store(AnalysesMixin):
    """One open database file.

    `Store(path)` is for the commands that write: it creates the file if need be and brings an
    older schema up to date. `Store.open_readonly(path)` is for the commands that only read: the
    file must exist, nothing is ever written to it (SQLite's `mode=ro`), and an older schema is
    read as it is, its missing tables as empty (docs/database.md). Every method raises a
    `StoreError` naming the file, never a bare sqlite3 exception; `conn` and `transaction()` are
    the raw tools for modules that keep their own tables here (service/queue.py).
    """

    def __init__(
        self, path: str | Path, *, create: bool = True, readonly: bool = False, busy_timeout_s: float = 10.0
    ) -> None:
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
            raise InputError(
                f"written by a newer nightbench (schema version {version}; this one reads up to "
                f"{SCHEMA_VERSION}): use that version",
                file=self.path,
            )
        return version

    def _migrate(self) -> None:
        """Bring the schema to SCHEMA_VERSION; an up-to-date file costs no write."""
        if self.schema_version == SCHEMA_VERSION:
            return
        self.conn.executescript(
            "BEGIN IMMEDIATE;"
            + self._added_columns()
            + SCHEMA
            + VIEWS
            + BACKFILL
            + f"INSERT OR REPLACE INTO meta VALUES ('schema_version', '{SCHEMA_VERSION}');COMMIT;"
        )
        self.schema_version = SCHEMA_VERSION

    def _added_columns(self) -> str:
        """ALTER TABLE statements for the columns newer schemas add to tables this file has."""
        out = []
        for table, column, decl in ADDED_COLUMNS:
            have = {r[1] for r in self.conn.execute(f"PRAGMA table_info({table})")}
            if have and column not in have:
                out.append(f"ALTER TABLE {table} ADD COLUMN {column} {decl};")
        return "".join(out)

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
    def create_run(
        self,
        *,
        name: str,
        plan_file: str | None,
        plan_text: str,
        plan_json: dict[str, Any],
        dut_id: str | None,
        points_total: int,
        state: str = RunState.QUEUED,
        files: dict[str, str] | None = None,
    ) -> int:
        """A run with its plan snapshot: the text, the parsed form, and the referenced files'
        texts (keyed by the path the plan wrote), in one transaction."""
        with self._sql("storing a new run"), self._transaction():
            cur = self.conn.execute(
                "INSERT INTO runs (name, state, plan_file, plan_text, plan_json, dut_id, points_total, created_at)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (name, state, plan_file, plan_text, json.dumps(plan_json), dut_id, points_total, now_iso()),
            )
            run_id = int(cur.lastrowid or 0)
            self.conn.executemany(
                "INSERT INTO run_files (run_id, path, text) VALUES (?, ?, ?)",
                [(run_id, path, text) for path, text in (files or {}).items()],
            )
        return run_id

    def run_files(self, run_id: int) -> dict[str, str]:
        """The referenced files' texts as the run used them (none in a file from before they were kept)."""
        if self.absent("run_files"):
            return {}
        with self._sql(f"reading the files of run {run_id}"):
            rows = self.conn.execute(
                "SELECT path, text FROM run_files WHERE run_id=? ORDER BY path", (run_id,)
            ).fetchall()
        return {r["path"]: r["text"] for r in rows}

    def mark_running(self, run_id: int) -> None:
        with self._sql(f"marking run {run_id} running"):
            self.conn.execute(
                "UPDATE runs SET state=?, started_at=COALESCE(started_at, ?), finished_at=NULL, error=NULL,"
                " pid=?, host=?, heartbeat_at=? WHERE id=?",
                (RunState.RUNNING, now_iso(), os.getpid(), socket.gethostname(), now_iso(), run_id),
            )

    def set_identities(self, run_id: int, source_idn: str, meter_idn: str) -> None:
        with self._sql(f"storing the instruments of run {run_id}"):
            self.conn.execute("UPDATE runs SET source_idn=?, meter_idn=? WHERE id=?", (source_idn, meter_idn, run_id))

    def record_instrument(
        self,
        run_id: int,
        *,
        role: str,
        driver: str,
        resource: str,
        identity: str,
        calibration_due: str | None,
        state: dict[str, Any],
    ) -> None:
        """The run record of one instrument (measure/record.py): the latest start's, a resume
        replacing what the previous start stored (each start also leaves an event)."""
        with self._sql(f"storing the {role} of run {run_id}"):
            self.conn.execute(
                "INSERT OR REPLACE INTO instruments (run_id, role, driver, resource, identity, calibration_due,"
                " state_json, recorded_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (run_id, role, driver, resource, identity, calibration_due, json.dumps(state), now_iso()),
            )

    def instruments(self, run_id: int) -> list[dict[str, Any]]:
        """A run's record, one entry per instrument (source, meter, chamber order); [] for a run
        from before the record, or a file or shared store without the table."""
        if self.absent("instruments"):
            return []
        with self._sql(f"reading the instruments of run {run_id}"):
            rows = self.conn.execute(
                "SELECT role, driver, resource, identity, calibration_due, state_json, recorded_at"
                " FROM instruments WHERE run_id=?",
                (run_id,),
            ).fetchall()
        order = {"source": 0, "meter": 1, "chamber": 2}
        keys = ("role", "driver", "resource", "identity", "calibration_due", "recorded_at")
        entries = [{**{k: r[k] for k in keys}, "state": json.loads(r["state_json"])} for r in rows]
        return sorted(entries, key=lambda e: (order.get(e["role"], 9), e["role"]))

    def finish_run(self, run_id: int, state: str, error: str | None = None) -> None:
        assert state in tuple(RunState)
        with self._sql(f"storing the end of run {run_id}"):
            self.conn.execute(
                "UPDATE runs SET state=?, finished_at=?, error=? WHERE id=?", (state, now_iso(), error, run_id)
            )

    def event(self, run_id: int | None, kind: str, message: str) -> None:
        with self._sql(f"storing a {kind} event"):
            self.conn.execute(
                "INSERT INTO events (run_id, at, kind, message) VALUES (?, ?, ?, ?)", (run_id, now_iso(), kind, message)
            )

    def run(self, run_id: int) -> sqlite3.Row:
        with self._sql(f"reading run {run_id}"):
            row = self.conn.execute("SELECT * FROM runs WHERE id=?", (run_id,)).fetchone()
        if row is None:
            raise InputError(f"there is no run {run_id}", file=self.path)
        return row

    def runs(self) -> list[dict[str, Any]]:
        # a file from before run_counts (read-only, not migrated) counts its points the slow way
        done = (
            "(SELECT COUNT(*) FROM points p WHERE p.run_id = r.id)"
            if self.absent("run_counts")
            else "COALESCE((SELECT c.points_done FROM run_counts c WHERE c.run_id = r.id), 0)"
        )
        with self._sql("listing the runs"):
            rows = self.conn.execute(
                f"SELECT r.id, r.name, r.state, r.points_total, r.started_at, r.finished_at, {done} AS points_done"
                " FROM runs r ORDER BY r.id"
            ).fetchall()
        return [
            {
                "id": r["id"],
                "name": r["name"],
                "state": r["state"],
                "points_done": r["points_done"],
                "points_total": r["points_total"],
                "started_at": r["started_at"],
                "finished_at": r["finished_at"],
            }
            for r in rows
        ]

    # -- points ---------------------------------------------------------------------------
    def done_indices(self, run_id: int) -> set[int]:
        with self._sql(f"reading the points of run {run_id}"):
            return {r[0] for r in self.conn.execute("SELECT idx FROM points WHERE run_id=?", (run_id,))}

    def add_point(self, run_id: int, point: Any, result: PointResult) -> None:
        """Store a point and its raw readings in one transaction; durable when this returns."""
        with self._sql(f"storing point {point.index} of run {run_id}"), self._transaction():
            self.conn.execute(
                "INSERT INTO points (run_id, idx, frequency_hz, power_dbm, source_dbm, value_v, stdev_v, samples,"
                " settle_s, settle_readings, settled, overload, measured_at, temperature_c, chamber_c, dut_c,"
                " repeat, direction, unit_id) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                (
                    run_id,
                    point.index,
                    point.frequency_hz,
                    point.power_dbm,
                    point.source_dbm,
                    result.value_v,
                    result.stdev_v,
                    result.samples,
                    result.settle_s,
                    result.settle_readings,
                    int(result.settled),
                    int(result.overload),
                    now_iso(),
                    getattr(point, "temperature_c", None),
                    result.chamber_c,
                    result.dut_c,
                    getattr(point, "repeat", 0),
                    getattr(point, "direction", None),
                    getattr(point, "unit_id", None),
                ),
            )
            self.conn.executemany(
                "INSERT INTO readings (run_id, idx, seq, t_s, value_v, phase) VALUES (?,?,?,?,?,?)",
                [(run_id, point.index, seq, t, v, phase) for seq, (t, v, phase) in enumerate(result.readings)],
            )
            self.conn.execute("UPDATE runs SET heartbeat_at=? WHERE id=?", (now_iso(), run_id))

    def points(self, run_id: int) -> list[sqlite3.Row]:
        with self._sql(f"reading the points of run {run_id}"):
            return self.conn.execute("SELECT * FROM points WHERE run_id=? ORDER BY idx", (run_id,)).fetchall()

    def recent_readings(self, run_id: int, count: int) -> list[dict[str, Any]]:
        """The last `count` points of a run in the order they were measured, each with its raw
        readings in order (t_s, value_v, phase): what a resumed run's settle detector replays."""
        with self._sql(f"reading the raw readings of run {run_id}"):
            points = self.conn.execute(
                "SELECT idx, power_dbm, measured_at, overload FROM points WHERE run_id=?"
                " ORDER BY measured_at DESC, idx DESC LIMIT ?",
                (run_id, count),
            ).fetchall()
            sql = "SELECT t_s, value_v, phase FROM readings WHERE run_id=? AND idx=? ORDER BY seq"
            return [
                dict(p) | {"readings": [tuple(r) for r in self.conn.execute(sql, (run_id, p["idx"]))]}
                for p in reversed(points)
            ]

    def _transaction(self) -> _Tx:
        return _Tx(self.conn)

    transaction = _transaction  # for the modules that keep their own tables here (service/queue.py)


class _Tx:
    def __init__(self, conn: sqlite3.Connection) -> None:
        self.conn = conn

    def __enter__(self) -> None:
        self.conn.execute("BEGIN IMMEDIATE")

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        self.conn.execute("COMMIT" if exc_type is None else "ROLLBACK")
