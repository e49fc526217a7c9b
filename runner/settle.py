"""Deciding that a reading has settled (see DESIGN.md, "Settling: what right means")."""

from __future__ import annotations

import math
from dataclasses import dataclass, field


@dataclass
class SettleDetector:
    """Accepts once the recent readings show neither drift nor scatter beyond the tolerance.

    A straight line is fitted to the trailing half of the readings since the change (at least
    `window` of them, so the window grows and averages noise down): the drift it shows across
    the window and the standard error of the window mean must both be small against
    `tolerance_v`. Its known weakness: readings much faster than a long time constant can look
    flat too early; `min_wait_s` is the plan's guard against that.
    """

    tolerance_v: float
    min_wait_s: float = 0.0
    window: int = 6
    times: list[float] = field(default_factory=list)
    values: list[float] = field(default_factory=list)

    def feed(self, t: float, v: float) -> bool:
        """Add a reading taken `t` seconds after the change; True when settled."""
        self.times.append(t)
        self.values.append(v)
        if t < self.min_wait_s or len(self.values) < self.window:
            return False
        w = max(self.window, len(self.values) // 2)
        ts, vs = self.times[-w:], self.values[-w:]
        n = len(vs)
        mt, mv = sum(ts) / n, sum(vs) / n
        stt = sum((x - mt) ** 2 for x in ts)
        slope = sum((x - mt) * (y - mv) for x, y in zip(ts, vs)) / stt if stt > 0 else 0.0
        resid = [y - (mv + slope * (x - mt)) for x, y in zip(ts, vs)]
        s = math.sqrt(sum(r * r for r in resid) / max(n - 2, 1))
        drift = abs(slope) * (ts[-1] - ts[0])
        return drift < self.tolerance_v / 4 and s / math.sqrt(n) < self.tolerance_v / 3
