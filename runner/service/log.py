"""One line per service event on stderr: `level=info event=job-start job=3 run=7 plan=rx-rssi`.

Plain key=value text reads well in `journalctl`, splits with grep and awk, and holds no colour
codes. Under systemd (stderr is the journal stream) each line starts with its syslog priority
(`<6>`), which journald turns into the entry's priority so `journalctl -p warning` finds problems;
elsewhere (a terminal, a file) each line starts with the local time instead.
"""

from __future__ import annotations

import json
import os
import sys
from typing import Any, TextIO

from nightbench.store.db import now_iso

PRIORITY = {"info": 6, "warning": 4, "error": 3}  # syslog severities (RFC 5424)


def _value(value: Any) -> str:
    text = str(value)
    if text and text.isprintable() and not any(c in text for c in ' "=\\'):
        return text
    return json.dumps(text, ensure_ascii=False)  # quoted, with quotes and newlines escaped


def _to_journal(stream: TextIO) -> bool:
    """systemd sets JOURNAL_STREAM to the device:inode of the journal socket it gave us."""
    expected = os.environ.get("JOURNAL_STREAM")
    if not expected:
        return False
    try:
        st = os.fstat(stream.fileno())
    except (OSError, ValueError):
        return False
    return expected == f"{st.st_dev}:{st.st_ino}"


def log(event: str, level: str = "info", stream: TextIO | None = None, **fields: Any) -> None:
    out = stream or sys.stderr
    prefix = f"<{PRIORITY[level]}>" if _to_journal(out) else f"{now_iso()} "
    parts = [f"level={level}", f"event={event}"]
    parts += [f"{key}={_value(value)}" for key, value in fields.items() if value is not None]
    out.write(prefix + " ".join(parts) + "\n")
    out.flush()
