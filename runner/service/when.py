"""`submit --at WHEN`: the earliest time a job may start.

People type a wall-clock time ("22:30", tonight's), or a full ISO 8601 local date-time for
another day. Both are read as local time, with the local daylight-saving rules of that date.
"""

from __future__ import annotations

import re
from datetime import datetime, time, timedelta

from nightbench.drivers.errors import InputError

_CLOCK = re.compile(r"^([01]?\d|2[0-3]):([0-5]\d)$")
EXAMPLE = "give an ISO 8601 local date-time such as 2026-03-04T22:30, or HH:MM for the next such time"


def parse_when(text: str, now: datetime | None = None) -> datetime:
    """An aware datetime. HH:MM is the next such wall-clock time after `now` (naive local; today
    if it is still ahead, else tomorrow); an ISO 8601 date-time without an offset is local time."""
    now = now or datetime.now()
    value = text.strip()
    clock = _CLOCK.match(value)
    if clock:
        at = time(int(clock[1]), int(clock[2]))
        day = now.date() if datetime.combine(now.date(), at) > now else now.date() + timedelta(days=1)
        # naive local, then astimezone(): the offset of THAT date, so 22:30 stays 22:30 across a DST change
        return datetime.combine(day, at).astimezone()
    try:
        parsed = datetime.fromisoformat(value)
    except ValueError:
        raise InputError(f"--at {text!r} is not a time: {EXAMPLE}") from None
    return parsed.astimezone() if parsed.tzinfo is None else parsed
