"""Progress display for foreground runs: a rich bar on a terminal, nothing otherwise."""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Iterator
from typing import Any


@contextlib.contextmanager
def progress_printer(name: str, run_id: int) -> Iterator[Any]:
    if not sys.stderr.isatty():
        yield None
        return
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    with Progress(
        TextColumn(f"run {run_id} {name}"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn("{task.fields[where]}"),
        TimeRemainingColumn(),
        transient=False,
    ) as bar:
        task = bar.add_task("sweep", total=None, where="")

        def update(point: Any, result: Any, done: int, total: int) -> None:
            flag = "" if result.settled else " (unsettled)"
            bar.update(
                task,
                completed=done,
                total=total,
                where=f"{point.frequency_hz / 1e6:.3f} MHz {point.power_dbm:+.1f} dBm{flag}",
            )

        yield update
