"""The store's one exception: the database could not be read or written.

sqlite3's exceptions never leave the store's methods as they are: they become a StoreError that
names the file (`raise ... from exc`), so the CLI prints one sentence and exits 1, and a caller
can tell a lock (`busy`: another process holds the database; trying again may work) from the rest.
"""

from __future__ import annotations

import sqlite3

from nightbench.drivers.errors import NightbenchError


class StoreError(NightbenchError):
    """The database could not be read or written (locked by another process, damaged, full).

    Not bad input, so exit code 1; `busy` tells a lock (worth trying again) from the rest."""

    FIELDS = ("file",)

    def __init__(self, message: str, *, file: str, busy: bool = False) -> None:
        super().__init__(message)
        self.file = file
        self.busy = busy

    def __str__(self) -> str:
        return f"{self.file}: {self.message}"


def is_busy(exc: sqlite3.Error) -> bool:
    return isinstance(exc, sqlite3.OperationalError) and ("locked" in str(exc) or "busy" in str(exc))
