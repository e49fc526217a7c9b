"""Is the process that claims a run (or the service) still there? The one answer for `resume`,
`serve`'s recovery and `queue`'s service status.

A row in the database names a pid, a host and a heartbeat. On this host the pid decides, but a
pid can be reused, above all after a reboot (a power cut is exactly when this question is asked):
on Linux, a process that started after the owner's last heartbeat, or a zombie, is not the owner;
nor is the asking process itself (it claimed nothing yet, so the row is an earlier process's with
the same pid). On another host only the heartbeat can tell, so there it must be old before we
call the owner gone.
"""

from __future__ import annotations

import os
import socket
import time
from datetime import datetime
from pathlib import Path

FOREIGN_STALE_S = 900.0  # a run of another host counts as abandoned after this long without a heartbeat
START_SLACK_S = 2.0  # /proc gives the boot time in whole seconds
PROC = Path("/proc")


def iso_ts(text: str | None) -> float | None:
    """Seconds since the epoch of a stored local ISO time (store.db.now_iso)."""
    return datetime.fromisoformat(text).timestamp() if text else None


def owner_gone(pid: int | None, host: str | None, heartbeat_at: str | None, now_ts: float | None = None) -> bool:
    """True when the process a row names (pid, host, last heartbeat) is certainly not running it."""
    if host in (None, "", socket.gethostname()):
        return pid is None or pid == os.getpid() or not _alive(pid, iso_ts(heartbeat_at))
    beat = iso_ts(heartbeat_at)
    now = time.time() if now_ts is None else now_ts
    return beat is None or now - beat > FOREIGN_STALE_S


def _alive(pid: int, heartbeat_ts: float | None) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # someone else's process: it exists
    state, started = _proc_stat(pid)
    if state in ("Z", "X"):  # a zombie, or ended since os.kill
        return False
    return not (started is not None and heartbeat_ts is not None and started > heartbeat_ts + START_SLACK_S)


def _proc_stat(pid: int) -> tuple[str | None, float | None]:
    """(state letter, start time as epoch seconds) from /proc (Linux); (None, None) where there is
    no /proc, so the pid alone decides; state 'X' (dead) if the process ended since os.kill."""
    if not (PROC / "stat").exists():
        return None, None
    try:
        stat = (PROC / str(pid) / "stat").read_text()
    except (FileNotFoundError, ProcessLookupError):  # it exited since os.kill (or hidepid=2 hides it: not ours)
        return "X", None
    except PermissionError:  # hidepid=1: listed but unreadable; the pid alone decides
        return None, None
    boot = next(int(line.split()[1]) for line in (PROC / "stat").read_text().splitlines() if line.startswith("btime "))
    fields = stat.rsplit(")", 1)[1].split()  # the command name in parentheses may hold spaces
    # proc(5): field 3 is the state, field 22 the start time in clock ticks after boot
    return fields[0], boot + int(fields[19]) / os.sysconf("SC_CLK_TCK")
