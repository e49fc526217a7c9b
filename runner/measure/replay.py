"""A resumed run starts where it left off: its last stored points are replayed through the settle
detector, so it begins with the time constants, noise and tail evidence they taught instead of
learning afresh (a cold detector is slow on its first points of each direction).

The detector learns only from readings (`record` then `end`); judging does not change what it
knows, so replaying the stored readings of a point teaches exactly what measuring it did. The one
thing not replayed is the step history a slow tail sums over: RF has been off since, and those
tails have decayed.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from datetime import datetime
from typing import Any

from nightbench.measure.settle import LEARN_KEEP, NOISE_KEEP, Direction, SettleDetector
from nightbench.measure.tailguard import TAIL_KEEP

# enough for every kind of memory to fill, and for a long look at the tail made well before the
# interruption to count again (tail.py: the share evidence lasts the run); a few hundred points replay in
# well under a second
REPLAY_POINTS = max(LEARN_KEEP * 4, NOISE_KEEP, TAIL_KEEP, 512)


def replay(detector: SettleDetector, points: Iterable[Mapping[str, Any]]) -> int:
    """Feed stored points (as `Store.recent_readings` gives them: in measuring order, each with
    `power_dbm`, `measured_at`, `overload` and `readings` of (t_s, value_v, phase)) through the
    detector; returns how many taught it. Overloaded points are skipped, as the engine never
    ends them either."""
    last_dbm: float | None = None
    taught = 0
    for point in points:
        values = [(t, v) for t, v, _ in point["readings"] if v is not None]
        level = float(point["power_dbm"])
        if point["overload"] or not values:
            last_dbm = level
            continue
        hint: Direction | None = None  # the first one's predecessor is unknown: teach no polarity
        if last_dbm is not None:
            hint = "rise" if level > last_dbm else "fall" if level < last_dbm else None
        # measured_at is stamped when the point was stored: its change came its last reading earlier
        at = datetime.fromisoformat(point["measured_at"]).timestamp() - values[-1][0]
        detector.begin(hint, at=at, from_off=last_dbm is None)
        for t, v in values:
            detector.record(t, v)
        detector.end()
        last_dbm = level
        taught += 1
    detector.forget_steps()
    return taught
