"""Progress display for foreground runs: a rich bar on a terminal, nothing otherwise.

During a soak the bar's text shows the setpoint, the chamber's reading and how long it has held
the band (the soaks table keeps the same for later)."""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Iterator
from typing import Any


class ProgressView:
    """Called once per stored point; `soak` once per chamber reading during a soak."""

    def __init__(self, bar: Any, task: Any) -> None:
        self.bar, self.task = bar, task

    def __call__(self, point: Any, result: Any, done: int, total: int) -> None:
        flag = "" if result.settled else " (unsettled)"
        temp = "" if getattr(point, "temperature_c", None) is None else f" {point.temperature_c:g} degC"
        self.bar.update(
            self.task,
            completed=done,
            total=total,
            where=f"{point.frequency_hz / 1e6:.3f} MHz {point.power_dbm:+.1f} dBm{temp}{flag}",
        )

    def soak(self, status: Any) -> None:
        self.bar.update(self.task, where=soak_text(status))


def soak_text(status: Any) -> str:
    """`soaking to -40 degC: reads -39.62, held 212/600 s (1843 s of 5400)`."""
    return (
        f"soaking to {status.setpoint_c:g} degC: reads {status.reading_c:.2f}, held "
        f"{status.stable_for_s:.0f}/{status.stable_s:g} s ({status.elapsed_s:.0f} s of {status.timeout_s:g})"
    )


@contextlib.contextmanager
def progress_printer(name: str, run_id: int) -> Iterator[ProgressView | None]:
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
        yield ProgressView(bar, bar.add_task("sweep", total=None, where=""))
