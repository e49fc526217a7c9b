"""The shared PostgreSQL store's schema, derived from the local SQLite schema.

The local schema (store/schema.py) is the one declaration: each table a run owns is mirrored by
the column list SQLite itself reports for it (PRAGMA table_info), so a column or table added
locally appears in the shared store at the next upgrade without a second declaration to forget.
In the shared store `runs.id` is store-wide (many benches' run 1 must not collide), `bench` and
`local_id` say where a run came from, and every other table's `run_id` is the store-wide id.
Non-key columns are nullable: a file from an older version lacks some of them (docs/database.md).
"""

from __future__ import annotations

import re
import sqlite3
from dataclasses import dataclass
from functools import cache

from nightbench.store.schema import SCHEMA, SCHEMA_VERSION, VIEWS

# local tables that belong to one bench, not to a run: the queue, the service, derived counts, push notes
NOT_PUSHED = ("meta", "jobs", "service", "run_counts", "pushes")
RAW = ("readings",)  # pushed only when asked (`push --readings`)
LOCK_KEY = 0x6E62_7075_7368  # pg_advisory_xact_lock key: one schema change at a time on a server


@dataclass(frozen=True)
class Column:
    name: str
    pg_type: str
    default: str | None  # SQLite's DEFAULT text (a literal), applied when an older file lacks the column


@dataclass(frozen=True)
class Table:
    name: str
    columns: tuple[Column, ...]  # without run_id (children) or id (runs)
    unique: tuple[str, ...]  # the local primary key with run_id first (children keyed by run), else ()

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.columns)


def pg_type(declared: str) -> str:
    """SQLite's type affinity rules (sqlite.org/datatype3.html, 3.1) mapped to PostgreSQL types."""
    d = declared.upper()
    if "INT" in d:
        return "BIGINT"
    if any(t in d for t in ("CHAR", "CLOB", "TEXT")):
        return "TEXT"
    if "BLOB" in d or not d:
        return "BYTEA"
    return "DOUBLE PRECISION"


def _describe(conn: sqlite3.Connection, table: str) -> list[tuple[str, str, str | None, int]]:
    """(name, declared type, default, primary-key position) of each column."""
    return [(r[1], r[2], r[4], r[5]) for r in conn.execute(f"PRAGMA table_info({table})")]


@cache
def tables() -> tuple[Table, ...]:
    """The tables a run owns, `runs` first, read from the local schema of this version."""
    conn = sqlite3.connect(":memory:")
    conn.executescript(SCHEMA)
    names = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table' ORDER BY rowid")]
    out = []
    for name in names:
        cols = _describe(conn, name)
        if name in NOT_PUSHED or (name != "runs" and "run_id" not in {c[0] for c in cols}):
            continue
        skip = "id" if name == "runs" else "run_id"
        columns = tuple(Column(n, pg_type(t), d) for n, t, d, _ in cols if n != skip)
        pk = [n for n, _, _, k in sorted(cols, key=lambda c: c[3]) if k]
        unique = tuple(pk) if name != "runs" and pk and pk[0] == "run_id" else ()
        out.append(Table(name, columns, unique))
    conn.close()
    out.sort(key=lambda t: t.name != "runs")
    return tuple(out)


def table(name: str) -> Table:
    return next(t for t in tables() if t.name == name)


def _create(t: Table) -> str:
    cols = [f"{c.name} {c.pg_type}" + (f" DEFAULT {c.default}" if c.default is not None else "") for c in t.columns]
    if t.name == "runs":
        head = "id BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY, bench TEXT NOT NULL, local_id BIGINT NOT NULL"
        tail = ", pushed_at TEXT NOT NULL, UNIQUE (bench, local_id)"
    elif t.name in RAW:  # a year's raw readings: no per-row foreign-key check (the run arrives in the same transaction)
        head, tail = "run_id BIGINT NOT NULL", ""
    else:
        head, tail = "run_id BIGINT NOT NULL REFERENCES runs(id)", ""
    sql = [f"CREATE TABLE IF NOT EXISTS {t.name} ({', '.join([head, *cols])}{tail});"]
    sql += [f"ALTER TABLE {t.name} ADD COLUMN IF NOT EXISTS {c}" + ";" for c in cols]
    if t.name in RAW:  # rows arrive in run order: a BRIN index finds a run's rows and costs nearly nothing to keep
        sql.append(f"CREATE INDEX IF NOT EXISTS {t.name}_run ON {t.name} USING brin (run_id);")
    elif t.unique:
        sql.append(f"CREATE UNIQUE INDEX IF NOT EXISTS {t.name}_key ON {t.name} ({', '.join(t.unique)});")
    elif t.name != "runs":
        sql.append(f"CREATE INDEX IF NOT EXISTS {t.name}_run ON {t.name} (run_id);")
    return "\n".join(sql)


def views_sql() -> str:
    """The local stable views with `bench` and `local_id` added at the end (views may gain columns
    at the end: docs/database.md). Local ids other than the run's (analyses.id, ...) repeat across
    benches, so every join of a run's table gains `x.run_id = <main>.run_id`; the views' other
    SQL is plain and PostgreSQL reads it as SQLite does (tests/test_push.py compares the rows)."""
    out = []
    for statement in (s.strip() for s in VIEWS.split(";") if s.strip()):
        out.append((_view(statement) if statement.upper().startswith("CREATE VIEW") else statement) + ";")
    return "\n".join(out)


def _view(statement: str) -> str:
    main = re.search(r"\nFROM (\w+) (\w+) JOIN runs r ON r\.id = \2\.run_id", statement)
    assert main is not None and " OR " not in statement.upper(), f"a view the shared store cannot mirror: {statement}"
    alias = main.group(2)
    statement = statement[: main.start()] + ", r.bench, r.local_id" + statement[main.start() :]
    owned = {t.name for t in tables()}

    def same_run(m: re.Match[str]) -> str:
        if m.group(2) not in owned or m.group(2) == "runs":
            return m.group(0)
        return f"{m.group(1)}{m.group(2)} {m.group(3)} ON {m.group(3)}.run_id = {alias}.run_id AND "

    return re.sub(r"(JOIN )(\w+) (\w+) ON ", same_run, statement)


def schema_sql() -> str:
    """Everything that creates or upgrades the shared store to this version, idempotent."""
    return (
        "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);\n"
        + "\n".join(_create(t) for t in tables())
        + "\n"
        + views_sql()
        + f"\nINSERT INTO meta VALUES ('schema_version', '{SCHEMA_VERSION}')"
        " ON CONFLICT (key) DO UPDATE SET value = EXCLUDED.value;"
    )
