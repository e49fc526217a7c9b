"""The soak: no point at a temperature is measured until the chamber has proven it is there.

"There" means the chamber's reading stayed within `soak.tolerance_c` of the setpoint for
`soak.stable_s` WITHOUT A BREAK: a reading that overshoots out of the band restarts the count, so a
chamber that swings through the setpoint on its way is not taken for one that holds it. The
chamber measures its air; the DUT lags behind the air by its own thermal time constant, so
`stable_s` must also cover the DUT catching up (docs/temperature.md). A soak that is not stable by
`timeout_s` is a SoakTimeout carrying the last readings.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from nightbench.drivers.errors import NightbenchError
from nightbench.drivers.roles import ChamberRole
from nightbench.measure.signals import StopFlag
from nightbench.plan.model import Soak

LAST_READINGS = 8  # shown in a timeout's message


class SoakTimeout(NightbenchError):
    """The chamber did not hold the setpoint in time: the run fails (exit 1), RF off, chamber to end_c."""


@dataclass(frozen=True)
class SoakStatus:
    """What the progress display shows during a soak."""

    setpoint_c: float
    reading_c: float
    elapsed_s: float
    stable_for_s: float  # how long the reading has been inside the band without a break (0: outside)
    stable_s: float
    timeout_s: float


SoakProgress = Callable[[SoakStatus], None]


def poll_s(rule: Soak) -> float:
    """Seconds between readings: at least 20 per stable_s (a swing out of the band is seen), at
    most one every 2 s (a chamber's serial line is no place for a flood)."""
    return min(2.0, max(0.02, rule.stable_s / 20.0))


def soak(
    chamber: ChamberRole,
    rule: Soak,
    setpoint_c: float,
    stop: StopFlag,
    readings: list[tuple[float, float]],
    *,
    started: float,
    progress: SoakProgress | None = None,
    clock: Callable[[], float] = time.monotonic,
) -> bool:
    """Set the chamber to `setpoint_c`, start conditioning, and wait until the soak rule holds.

    Readings are appended to `readings` as (seconds since `started`, degC), so the caller has them
    whatever happens. Returns True when stable, False when the stop flag was set (the caller
    raises). SoakTimeout past `started + timeout_s`; InstrumentError from the chamber as it comes.
    """
    chamber.set_temperature(setpoint_c)
    chamber.start()
    inside_since: float | None = None
    wait = poll_s(rule)
    while True:
        value = chamber.temperature()
        t = clock() - started
        readings.append((t, value))
        if abs(value - setpoint_c) <= rule.tolerance_c:
            inside_since = t if inside_since is None else inside_since
        else:
            inside_since = None
        stable_for = 0.0 if inside_since is None else t - inside_since
        if progress is not None:
            progress(SoakStatus(setpoint_c, value, t, stable_for, rule.stable_s, rule.timeout_s))
        if inside_since is not None and stable_for >= rule.stable_s:
            return True
        if t >= rule.timeout_s:
            last = ", ".join(f"{v:.2f}" for _, v in readings[-LAST_READINGS:])
            raise SoakTimeout(
                f"the chamber did not hold {setpoint_c:g} ± {rule.tolerance_c:g} degC for {rule.stable_s:g} s "
                f"within soak.timeout_s = {rule.timeout_s:g} s; its last readings: {last} degC"
            )
        if stop.wait(wait):
            return False
