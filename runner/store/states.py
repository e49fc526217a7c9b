"""The names of run, job and service states, spelled once.

They are stored as text (the database is read with sqlite3 and sqlite-utils too, and
docs/database.md documents the words), so each enum is a StrEnum: a member compares equal to,
formats as and is stored as its word. The schema's CHECK constraints are generated from these.
"""

from __future__ import annotations

from collections.abc import Iterable
from enum import StrEnum


class RunState(StrEnum):
    QUEUED = "queued"
    RUNNING = "running"
    COMPLETED = "completed"
    INTERRUPTED = "interrupted"  # stopped by a signal or a cancel, or its process is gone: resumable
    FAILED = "failed"  # an instrument fault it could not recover from


class JobState(StrEnum):
    """A job's state follows its run's (the same words), plus `cancelled`."""

    QUEUED = RunState.QUEUED.value
    RUNNING = RunState.RUNNING.value
    COMPLETED = RunState.COMPLETED.value
    INTERRUPTED = RunState.INTERRUPTED.value
    FAILED = RunState.FAILED.value
    CANCELLED = "cancelled"


class ServiceState(StrEnum):
    SERVING = "serving"
    STOPPED = "stopped"


JOB_PENDING = (JobState.QUEUED, JobState.INTERRUPTED)  # what `serve` still has to do
JOB_FINISHED = (JobState.COMPLETED, JobState.FAILED, JobState.CANCELLED)  # nothing left to do or cancel


def sql_in(states: Iterable[StrEnum]) -> str:
    """`('queued','running',...)`: the words as an SQL list, for CHECK constraints and queries."""
    return "(" + ",".join(f"'{s.value}'" for s in states) + ")"
