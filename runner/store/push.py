"""`nightbench push`: copy the finished runs of a local file to the shared PostgreSQL store.

Finished means `completed`: a failed or interrupted run may still be resumed (only a completed
one is refused), and a shared copy of it could never be corrected by a role that may only insert.
Each run goes in ONE PostgreSQL transaction (the run row, its plan and files, points, fits and
analyses, events, soaks; raw readings with `readings=True`, all children by COPY), and runs are
unique by (bench, local id): killed at any instant, a run is on the server whole or not at all,
and the next push sends what is missing. Runs already there are skipped, so pushing twice adds
nothing. The local file is read in one read transaction per run and changed only to note what
was pushed, in its own two tables (`pushes`, `push_status`: docs/database.md).
"""

from __future__ import annotations

import socket
import sqlite3
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from nightbench.drivers.errors import InputError
from nightbench.store.db import Store, now_iso
from nightbench.store.errors import StoreError, is_busy
from nightbench.store.pg import connect, mask_url, stored_version
from nightbench.store.pgschema import LOCK_KEY, RAW, Table, schema_sql, tables
from nightbench.store.schema import SCHEMA_VERSION
from nightbench.store.states import RunState

NOTES = """
CREATE TABLE IF NOT EXISTS pushes (
    run_id INTEGER NOT NULL, target TEXT NOT NULL, bench TEXT NOT NULL, remote_id INTEGER NOT NULL,
    pushed_at TEXT NOT NULL, PRIMARY KEY (run_id, target)
);
CREATE TABLE IF NOT EXISTS push_status (
    target TEXT PRIMARY KEY, bench TEXT NOT NULL, tried_at TEXT NOT NULL, ok_at TEXT, error TEXT,
    next_try_at TEXT, waiting INTEGER NOT NULL DEFAULT 0
);
"""


@dataclass
class Pushed:
    target: str  # the masked URL
    bench: str
    runs: list[int] = field(default_factory=list)  # local ids pushed now
    already: int = 0  # finished runs the server had
    points: int = 0
    readings: int = 0


def default_bench(db: str) -> str:
    """The bench name this file pushed under before (so a renamed host does not fork its runs), else the host name."""
    try:
        conn = sqlite3.connect(Path(db).resolve().as_uri() + "?mode=ro", uri=True)
        row = conn.execute("SELECT bench FROM pushes ORDER BY pushed_at DESC LIMIT 1").fetchone()
        conn.close()
    except sqlite3.Error:
        row = None
    return str(row[0]) if row else socket.gethostname()


def ensure_schema(pg: Any, shown: str) -> None:
    """Create or upgrade the shared store to this version, one pusher at a time; a store already at
    this version costs one query (so a role that may only insert and select can push)."""
    import psycopg

    if stored_version(pg, shown) == SCHEMA_VERSION:
        return
    try:
        with pg.transaction():
            pg.execute("SELECT pg_advisory_xact_lock(%s)", (LOCK_KEY,))
            if stored_version(pg, shown) != SCHEMA_VERSION:
                pg.execute(schema_sql())
    except psycopg.errors.InsufficientPrivilege as exc:
        raise InputError(
            f"the shared store needs creating or upgrading to schema version {SCHEMA_VERSION}, and this role may "
            "not: push once with the store's owner role (docs/database.md)",
            file=shown,
        ) from exc


def _columns(local: sqlite3.Connection, t: Table) -> list[str] | None:
    """The table's columns this file has and the shared store knows (None: the file predates the table)."""
    have = [r[1] for r in local.execute(f"PRAGMA table_info({t.name})")]
    if not have:
        return None
    return [c for c in have if c in t.names]


BINARY_TYPES = {"BIGINT": "int8", "DOUBLE PRECISION": "float8", "TEXT": "text", "BYTEA": "bytea"}


def _push_run(local: sqlite3.Connection, pg: Any, run_id: int, bench: str, readings: bool) -> tuple[int, int, int]:
    """One run in one PostgreSQL transaction; (store-wide id, points, readings). The children go by
    binary COPY: every bit of a double as it is, and the fastest way in (bench/push.py)."""
    counts = {"points": 0, "readings": 0}
    local.execute("BEGIN")  # one snapshot of the run, whatever a writer does meanwhile
    try:
        with pg.transaction():
            runs = tables()[0]
            run_cols = _columns(local, runs) or []
            row = local.execute(f"SELECT {', '.join(run_cols)} FROM runs WHERE id=?", (run_id,)).fetchone()
            names = ["bench", "local_id", "pushed_at", *run_cols]
            new_id = pg.execute(
                f"INSERT INTO runs ({', '.join(names)}) VALUES ({', '.join(['%s'] * len(names))}) RETURNING id",
                (bench, run_id, now_iso(), *row),
            ).fetchone()[0]
            for t in tables()[1:]:
                cols = _columns(local, t)
                if cols is None or (t.name in RAW and not readings):
                    continue
                types = {c.name: BINARY_TYPES[c.pg_type] for c in t.columns}
                rows = local.execute(f"SELECT {', '.join(cols)} FROM {t.name} WHERE run_id=?", (run_id,))
                n = 0
                with pg.cursor().copy(f"COPY {t.name} (run_id, {', '.join(cols)}) FROM STDIN (FORMAT BINARY)") as copy:
                    copy.set_types(["int8", *(types[c] for c in cols)])
                    for n, r in enumerate(rows, 1):  # noqa: B007 - n is the count after the loop
                        copy.write_row((new_id, *r))
                counts[t.name] = n
    finally:
        local.execute("COMMIT")
    return int(new_id), counts["points"], counts["readings"]


def _note(db: str, sql: str, params: tuple[Any, ...]) -> None:
    """The one kind of write push makes to the local file: what was pushed, and how the last try went."""
    try:
        conn = sqlite3.connect(db, timeout=10.0, isolation_level=None)
        conn.executescript(NOTES)
        conn.execute(sql, params)
        conn.close()
    except sqlite3.Error as exc:
        raise StoreError(f"noting the push: {exc}", file=db, busy=is_busy(exc)) from exc


def note_status(db: str, target: str, bench: str, error: str | None, next_try_at: str | None, waiting: int) -> None:
    at = now_iso()
    _note(
        db,
        "INSERT INTO push_status (target, bench, tried_at, ok_at, error, next_try_at, waiting) VALUES (?,?,?,?,?,?,?)"
        " ON CONFLICT (target) DO UPDATE SET bench=excluded.bench, tried_at=excluded.tried_at,"
        " ok_at=COALESCE(excluded.ok_at, push_status.ok_at), error=excluded.error,"
        " next_try_at=excluded.next_try_at, waiting=excluded.waiting",
        (target, bench, at, None if error else at, error, next_try_at, waiting),
    )


def push(
    db: str, url: str, *, bench: str | None = None, readings: bool = False, on_run: Callable[..., None] | None = None
) -> Pushed:
    """Push every finished run of `db` the shared store at `url` does not have yet."""
    import psycopg

    shown = mask_url(url)
    store = Store.open_readonly(db)  # checks the file: missing, not ours, or newer is refused before any connection
    local = store.conn
    bench = bench or default_bench(db)
    done = Pushed(shown, bench)
    pg = connect(url, readonly=False)
    pg.autocommit = True  # so each `pg.transaction()` below is a transaction of its own, not a savepoint
    try:
        ensure_schema(pg, shown)
        finished = ready_runs(local)
        there = dict(pg.execute("SELECT local_id, id FROM runs WHERE bench=%s", (bench,)).fetchall())
        for run_id in finished:
            if run_id in there:
                done.already += 1
            else:
                try:
                    there[run_id], points, raw = _push_run(local, pg, run_id, bench, readings)
                except psycopg.errors.UniqueViolation:  # another push of this bench got there first
                    there[run_id] = pg.execute(
                        "SELECT id FROM runs WHERE bench=%s AND local_id=%s", (bench, run_id)
                    ).fetchone()[0]
                    done.already += 1
                    continue
                done.runs.append(run_id)
                done.points += points
                done.readings += raw
                if on_run:
                    on_run(run_id, there[run_id], points, raw)
            _note(
                db,
                "INSERT OR IGNORE INTO pushes (run_id, target, bench, remote_id, pushed_at) VALUES (?,?,?,?,?)",
                (run_id, shown, bench, there[run_id], now_iso()),
            )
    except psycopg.Error as exc:
        from nightbench.store.pg import scrub

        raise StoreError(f"pushing: {' '.join(scrub(str(exc), url).split())}", file=shown) from exc
    finally:
        pg.close()
        store.close()
    return done


def ready_runs(conn: Any) -> list[int]:
    """Completed runs whose analysis is settled: its fits are stored, or storing them failed and
    said so (an `analysis` event). A run between `completed` and its fits (the moment a foreground
    `run` is writing them) waits for the next push instead of going up without fits for good."""
    ids = [r[0] for r in conn.execute("SELECT id FROM runs WHERE state=? ORDER BY id", (RunState.COMPLETED,))]
    has = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    if "analyses" not in has:
        return ids  # a file from before analyses were stored: its fits came with the run or not at all
    done = {r[0] for r in conn.execute("SELECT DISTINCT run_id FROM analyses")}
    done |= {r[0] for r in conn.execute("SELECT DISTINCT run_id FROM events WHERE kind='analysis'")}
    return [i for i in ids if i in done]


def pending(db: str, target: str) -> int:
    """Completed runs of a local file not yet noted as pushed to `target` (masked URL)."""
    store = Store.open_readonly(db)
    try:
        conn = store.conn
        ready = ready_runs(conn)
        if conn.execute("SELECT 1 FROM sqlite_master WHERE type='table' AND name='pushes'").fetchone() is None:
            return len(ready)
        pushed = {r[0] for r in conn.execute("SELECT run_id FROM pushes WHERE target=?", (target,))}
        return len([i for i in ready if i not in pushed])
    finally:
        store.close()


def statuses(store: Store) -> list[dict[str, Any]]:
    """How the last push to each target went (`queue` shows it); none before the first `serve --push-to`."""
    conn = store.conn
    if conn.execute("SELECT 1 FROM sqlite_master WHERE type='table' AND name='push_status'").fetchone() is None:
        return []
    return [dict(r) for r in conn.execute("SELECT * FROM push_status ORDER BY target").fetchall()]
