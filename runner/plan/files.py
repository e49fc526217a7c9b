"""Files a plan refers to (a Touchstone file today; more kinds later), and their snapshot.

A run must not change when someone edits a referenced file the next morning: the report and a
resume are rebuilt from what the run used. So a plan's references are read once, by the path
written in the plan (relative to the plan's folder), and their texts travel with the plan
(`LoadedPlan.files`, stored in the `run_files` table). Parsing from a snapshot reads those texts
and never the disk.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from nightbench.drivers.errors import InputError
from nightbench.plan.yamlfile import read_text

MAX_REFERENCED_BYTES = 16 << 20  # a dense network-analyser sweep runs to a few MB


class PlanProblem(ValueError):
    """A problem the plan's line map can place: `key` is the key path it belongs to.

    Raised below the plan loader (a missing file, a table row, a frequency a table does not
    cover), which turns it into an InputError naming the plan file, line and key.
    """

    def __init__(self, message: str, key: tuple[Any, ...]) -> None:
        super().__init__(message)
        self.key = key


class PlanFiles:
    """Reads referenced files from disk (relative to `base_dir`) or from a run's snapshot."""

    def __init__(
        self,
        base_dir: Path | None,
        snapshot: Mapping[str, str] | None = None,
        snapshot_label: str = "the run's snapshot",
    ) -> None:
        self.base_dir = base_dir or Path(".")
        self.snapshot = dict(snapshot) if snapshot is not None else None
        self.snapshot_label = snapshot_label
        self.texts: dict[str, str] = {}

    def read(self, written: str, key: tuple[Any, ...]) -> tuple[str, str]:
        """(text, name for messages) of the file the plan calls `written`; remembered for the snapshot."""
        if self.snapshot is not None:
            if written not in self.snapshot:
                raise PlanProblem(f"'{written}' is not in {self.snapshot_label}", key)
            text, name = self.snapshot[written], f"{written} ({self.snapshot_label})"
        else:
            path = self.base_dir / written
            try:
                text = read_text(path, what="a data file", max_bytes=MAX_REFERENCED_BYTES)
            except InputError as exc:
                raise PlanProblem(f"{path}: {exc.message}", key) from None
            name = str(path)
        self.texts[written] = text
        return text, name
