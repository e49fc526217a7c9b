"""The shared PostgreSQL store: connecting (credentials never shown), its schema version, and
`PgStore`, a read-only store with the local Store's read API.

PgStore IS a Store whose connection speaks PostgreSQL: the child tables' `run_id` is the store-wide
run id, so the local read methods' SQL (plain SQL with `?` parameters) runs there as it is, and
`report` and `export` read a shared run exactly as they read a local one, number for number. The
connection is read-only (`default_transaction_read_only`): a reader cannot change the shared store.
psycopg (the `postgres` extra) is imported only here and in store/push.py.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from typing import Any
from urllib.parse import parse_qsl, urlencode, urlsplit, urlunsplit

from nightbench.drivers.errors import InputError
from nightbench.store.db import Store
from nightbench.store.errors import StoreError
from nightbench.store.schema import SCHEMA_VERSION

SCHEMES = ("postgresql://", "postgres://")
# libpq's words for a refusal that trying again will not cure: a wrong name, password or database
REFUSED = (
    "password authentication failed",
    "no password supplied",
    "does not exist",
    "no pg_hba.conf entry",
    "invalid",  # a URL libpq parsed but cannot use (a port that is not a number, an unknown option)
)


def is_pg_url(target: str | None) -> bool:
    return bool(target) and str(target).startswith(SCHEMES)


def mask_url(url: str) -> str:
    """The URL with its password (in the authority or as ?password=) replaced by ***: the only
    form of it that goes into messages, logs and the local file."""
    try:
        parts = urlsplit(url)
        netloc = parts.netloc
        if "@" in netloc:
            auth, host = netloc.rsplit("@", 1)
            if ":" in auth:
                netloc = auth.split(":", 1)[0] + ":***@" + host
        query = urlencode(
            [(k, "***" if k == "password" else v) for k, v in parse_qsl(parts.query, keep_blank_values=True)]
        )
        return urlunsplit((parts.scheme, netloc, parts.path, query, parts.fragment))
    except ValueError:
        return url.split("://", 1)[0] + "://***"


def _secrets(url: str) -> list[str]:
    """Every spelling of the URL's password, to scrub from library messages."""
    found = re.findall(r"://[^:/@]*:([^@]*)@", url) + re.findall(r"[?&]password=([^&]*)", url)
    return [s for s in found if s]


def scrub(text: str, url: str) -> str:
    for secret in _secrets(url):
        text = text.replace(secret, "***")
    return text.replace(url, mask_url(url))


def connect(url: str, *, readonly: bool) -> Any:
    """A psycopg connection; its failures as one-line project errors naming the masked URL:
    InputError (exit 2) for a URL, name or password that is wrong, StoreError (exit 1) for a server
    that cannot be reached now (worth trying again)."""
    shown = mask_url(url)
    try:
        import psycopg
    except ImportError as exc:
        raise InputError('the shared store needs psycopg: pip install "nightbench[postgres]"', file=shown) from exc
    options = "-c default_transaction_read_only=on" if readonly else None
    try:
        return psycopg.connect(url, connect_timeout=10, options=options, application_name="nightbench")
    except psycopg.OperationalError as exc:
        message = " ".join(scrub(str(exc), url).split())
        if any(word in message for word in REFUSED):
            raise InputError(f"the server refused the connection: {message}", file=shown) from exc
        raise StoreError(f"cannot reach the shared store: {message}", file=shown) from exc
    except psycopg.Error as exc:  # ProgrammingError for a URL libpq cannot parse
        raise InputError(f"not a usable PostgreSQL URL: {scrub(str(exc), url)}", file=shown) from exc


def stored_version(conn: Any, shown: str) -> int | None:
    """The shared store's schema version, None for an empty database; refuses a database that is
    not a nightbench store, or one a newer nightbench upgraded."""
    has = conn.execute("SELECT to_regclass('meta') IS NOT NULL, to_regclass('runs') IS NOT NULL").fetchone()
    if not has[0]:
        if has[1]:
            raise InputError("not a nightbench shared store (it has a runs table but no meta table)", file=shown)
        return None
    row = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
    version = int(row[0]) if row is not None and str(row[0]).isdigit() else 0
    if version > SCHEMA_VERSION:
        raise InputError(
            f"the shared store has schema version {version}; this nightbench knows up to {SCHEMA_VERSION}: "
            "use the newer version",
            file=shown,
        )
    return version


class PgRow(tuple[Any, ...]):
    """A row read by position or by name, as sqlite3.Row is (the Store's readers use both)."""

    names: tuple[str, ...] = ()

    def __getitem__(self, key: Any) -> Any:
        if isinstance(key, str):
            try:
                return tuple.__getitem__(self, self.names.index(key))
            except ValueError:
                raise IndexError(f"no column {key}") from None
        return tuple.__getitem__(self, key)

    def keys(self) -> list[str]:
        return list(self.names)


def _row_factory(cursor: Any) -> Any:
    names = tuple(d.name for d in cursor.description or ())
    cls = type("Row", (PgRow,), {"names": names})
    return cls


class _Cursor:
    def __init__(self, cur: Any) -> None:
        self.cur = cur

    def fetchone(self) -> Any:
        return self.cur.fetchone()

    def fetchall(self) -> list[Any]:
        return list(self.cur.fetchall())

    def __iter__(self) -> Iterator[Any]:
        return iter(self.cur)


class PgConnection:
    """The few sqlite3.Connection calls the Store's read methods make, on a psycopg connection:
    `?` parameters become `%s`, `IS ?` PostgreSQL's `IS NOT DISTINCT FROM`, and a failure a
    StoreError naming the masked URL."""

    def __init__(self, conn: Any, shown: str) -> None:
        self.raw = conn
        self.shown = shown
        conn.autocommit = True  # each read is its own snapshot, as a local read-only open

    def execute(self, sql: str, params: Sequence[Any] = ()) -> _Cursor:
        import psycopg

        sql = sql.replace("%", "%%").replace(" IS ?", " IS NOT DISTINCT FROM ?").replace("?", "%s")
        try:
            cur = self.raw.cursor(row_factory=_row_factory)
            cur.execute(sql, tuple(params))
        except psycopg.Error as exc:
            raise StoreError(f"reading the shared store: {' '.join(str(exc).split())}", file=self.shown) from exc
        return _Cursor(cur)

    def close(self) -> None:
        self.raw.close()


class PgStore(Store):
    """The shared store, read-only, with the local Store's read API (run, runs, points, fits,
    analyses, run_files). Run ids are the store-wide ones; `runs()` adds `bench` and `local_id`."""

    def __init__(self, url: str) -> None:
        # no SQLite file to open, so not the base's __init__: the attributes its readers use
        self.path = mask_url(url)
        self.readonly = True
        raw = connect(url, readonly=True)
        self.conn = PgConnection(raw, self.path)  # type: ignore[assignment]
        version = stored_version(raw, self.path)
        if version is None:
            raw.close()
            raise InputError("an empty database: no run has been pushed to it yet", file=self.path)
        self.schema_version = version

    def absent(self, table: str) -> bool:
        row = self.conn.execute("SELECT to_regclass(?) IS NULL", (table,)).fetchone()
        return bool(row[0])

    def runs(self) -> list[dict[str, Any]]:
        rows = self.conn.execute(
            "SELECT r.id, r.bench, r.local_id, r.name, r.state, r.points_total, r.started_at, r.finished_at,"
            " (SELECT COUNT(*) FROM points p WHERE p.run_id = r.id) AS points_done FROM runs r ORDER BY r.id"
        ).fetchall()
        keys = ("id", "name", "state", "points_done", "points_total", "started_at", "finished_at", "bench", "local_id")
        return [{k: r[k] for k in keys} for r in rows]
