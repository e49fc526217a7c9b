"""A throwaway PostgreSQL server for the tests: a real cluster in a temporary folder on a free
loopback port, started once per test session and removed at the end (also when tests fail).

The server programs (initdb, pg_ctl) come from the machine (.ci/run installs Debian's
`postgresql` when they are missing). Without them the tests that need a server skip with the
reason shown, except under CI=true, where a missing server is a failure: CI must test the store.
PostgreSQL refuses to run as root, so as root the cluster belongs to the `postgres` system user.
"""

from __future__ import annotations

import contextlib
import glob
import os
import shutil
import socket
import subprocess
import tempfile
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

SUPERUSER = "nbtest"


def _program(name: str) -> str | None:
    """initdb/pg_ctl on PATH, else in Debian's versioned folder."""
    found = shutil.which(name)
    if found:
        return found
    candidates = sorted(glob.glob(f"/usr/lib/postgresql/*/bin/{name}"))
    return candidates[-1] if candidates else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Cluster:
    folder: Path
    port: int
    as_user: list[str]  # the prefix that runs a server program as the cluster's owner
    pg_ctl: str

    def url(self, dbname: str = "postgres", user: str = SUPERUSER, password: str | None = None) -> str:
        auth = f"{user}:{password}" if password is not None else user
        return f"postgresql://{auth}@127.0.0.1:{self.port}/{dbname}"

    def ctl(self, *args: str) -> None:
        data = str(self.folder / "data")
        subprocess.run([*self.as_user, self.pg_ctl, "-D", data, *args], check=True, capture_output=True, timeout=60)

    def start(self) -> None:
        opts = f"-p {self.port} -k {self.folder} -c listen_addresses=127.0.0.1 -c fsync=off"
        self.ctl("-w", "-l", str(self.folder / "log"), "-o", opts, "start")

    def stop(self) -> None:
        self.ctl("-m", "immediate", "stop")

    def sql(self, statement: str, dbname: str = "postgres") -> None:
        import psycopg

        with psycopg.connect(self.url(dbname), autocommit=True) as conn:
            conn.execute(statement)

    def new_database(self) -> str:
        """A fresh, empty database on the shared server; its URL (superuser, trust)."""
        name = f"t_{uuid.uuid4().hex[:12]}"
        self.sql(f"CREATE DATABASE {name}")
        return self.url(name)


def start_cluster() -> Iterator[Cluster]:
    initdb, pg_ctl = _program("initdb"), _program("pg_ctl")
    if initdb is None or pg_ctl is None:
        reason = "PostgreSQL server programs (initdb, pg_ctl) not found; .ci/run installs them"
        if os.environ.get("CI") == "true":
            pytest.fail(reason + " (CI=true: the shared-store tests must run)")
        pytest.skip(reason)
    folder = Path(tempfile.mkdtemp(prefix="nightbench-pg-", dir="/tmp"))
    as_user: list[str] = []
    if os.geteuid() == 0:
        shutil.chown(folder, "postgres")
        as_user = ["runuser", "-u", "postgres", "--"]
    cluster = Cluster(folder, _free_port(), as_user, pg_ctl)
    data = str(folder / "data")
    subprocess.run(
        [*as_user, initdb, "-D", data, "-A", "trust", "-U", SUPERUSER, "--no-sync"],
        check=True,
        capture_output=True,
        timeout=120,
    )
    # the test superuser is trusted; every other role must give its password (SCRAM), so the
    # wrong-password and least-privilege tests meet the server's real refusal
    hba = folder / "data" / "pg_hba.conf"
    hba.write_text(
        f"local all all trust\nhost all {SUPERUSER} 127.0.0.1/32 trust\nhost all all 127.0.0.1/32 scram-sha-256\n"
    )
    if as_user:
        shutil.chown(hba, "postgres")
    try:
        cluster.start()
        yield cluster
    finally:
        with contextlib.suppress(subprocess.CalledProcessError):  # a test stopped it and failed before a restart
            cluster.stop()
        shutil.rmtree(folder, ignore_errors=True)
