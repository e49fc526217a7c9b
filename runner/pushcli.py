"""`nightbench push`, and how the last push went for `queue` (the shared store: docs/database.md).

Kept beside cli.py, which registers the command, so that each stays under the size limit."""

from __future__ import annotations

from typing import TYPE_CHECKING

import click

from nightbench.cli import DB_HELP, _db, friendly

if TYPE_CHECKING:
    from nightbench.store.db import Store


@click.command()
@click.option("--db", help=DB_HELP)
@click.option("--to", "url", required=True, metavar="URL", help="the shared store: postgresql://USER@HOST/DB")
@click.option("--bench", help="this bench's name in the shared store (default: the one used before, else the host)")
@click.option("--readings", is_flag=True, help="send the raw readings too (COPY; about 10 per point)")
@friendly
def push(db: str | None, url: str, bench: str | None, readings: bool) -> None:
    """Copy every finished run the shared PostgreSQL store does not have yet (docs/database.md).

    One transaction per run: killed at any instant, a run is there whole or not at all, and the
    next push completes it. Pushing twice adds nothing; the local file only notes what was pushed.
    The password comes from the URL, $PGPASSWORD or the password file, and is never printed."""
    from nightbench.drivers.errors import InputError
    from nightbench.store.pg import is_pg_url, mask_url
    from nightbench.store.push import push as push_runs

    if not is_pg_url(url):
        raise InputError(f"--to takes a postgresql:// URL, not {mask_url(url)!r}")
    done = push_runs(_db(db), url, bench=bench, readings=readings)
    click.echo(
        f"pushed {len(done.runs)} runs ({done.points} points, {done.readings} readings) as bench "
        f"'{done.bench}' to {done.target}; {done.already} already there"
    )


def show_push_status(store: Store) -> None:
    from nightbench.store.push import statuses

    for p in statuses(store):
        state = f"failing since the last success ({p['error']}); next try {p['next_try_at']}" if p["error"] else "ok"
        waiting = f"{p['waiting']} runs waiting; tried {p['tried_at']}"
        click.echo(f"push: to {p['target']} as '{p['bench']}': {state}; {waiting}")


def push_marks(store: Store) -> dict[int, str]:
    """`  pushed as NAME #ID` for each local run a push noted (none for a shared store or an unpushed file)."""
    from nightbench.store.pg import PgStore

    conn = store.conn
    if isinstance(store, PgStore) or not conn.execute("SELECT 1 FROM sqlite_master WHERE name='pushes'").fetchone():
        return {}
    rows = conn.execute("SELECT run_id, bench, remote_id FROM pushes ORDER BY pushed_at").fetchall()
    return {r[0]: f"  pushed as {r[1]} #{r[2]}" for r in rows}
