"""The simulated chamber's thermal model, in accelerated time.

The chamber's air follows its setpoint as a controlled chamber does: a second-order response
(a PI loop around a thermal mass) that overshoots a little; the DUT, a mass coupled to the air,
follows the air with a first-order lag of its own. Time runs `time_scale` times faster than the
clock, so a soak of simulated tens of minutes takes seconds in a test. With conditioning off the
air relaxes toward the room with a slow first-order lag.
"""

from __future__ import annotations

import math
import random
import threading
from dataclasses import dataclass

STEP_S = 0.5  # integration step, simulated seconds


@dataclass
class ChamberConfig:
    time_scale: float = 1.0  # simulated seconds per clock second
    natural_period_s: float = 120.0  # 1 / natural frequency of the air's response, simulated s
    damping: float = 0.8  # < 1: an overshoot of exp(-pi z / sqrt(1 - z^2)), 1.5 % of the step at 0.8
    dut_tau_s: float = 180.0  # the DUT's lag behind the air (its and its fixture's thermal mass)
    idle_tau_s: float = 1800.0  # conditioning off: the air relaxes to the room this slowly
    noise_c: float = 0.02  # rms noise of the chamber's reading
    min_c: float = -70.0  # setpoints outside are refused (-222)
    max_c: float = 180.0


class ThermalModel:
    """Air and DUT temperatures at a clock time `t`; advanced lazily, thread-safe."""

    def __init__(self, config: ChamberConfig, start_c: float, seed: int = 1) -> None:
        self.config = config
        self.room_c = start_c
        self.air_c = self.dut_c = self.setpoint_c = start_c
        self.air_rate = 0.0  # degC per simulated second
        self.conditioning = False
        self.t_last: float | None = None
        self.rng = random.Random(seed + 7919)  # its own stream: the bench's noise sequence is unchanged
        self.lock = threading.RLock()

    def advance(self, t: float) -> None:
        """Integrate up to clock time t (a time before the last one changes nothing)."""
        with self.lock:
            if self.t_last is None or t <= self.t_last:
                self.t_last = t if self.t_last is None else self.t_last
                return
            sim_s = (t - self.t_last) * self.config.time_scale
            self.t_last = t
            steps = max(1, math.ceil(sim_s / STEP_S))
            h = sim_s / steps
            cfg = self.config
            wn = 1.0 / cfg.natural_period_s
            for _ in range(steps):
                if self.conditioning:
                    accel = wn * wn * (self.setpoint_c - self.air_c) - 2.0 * cfg.damping * wn * self.air_rate
                    self.air_rate += h * accel
                else:
                    self.air_rate = (self.room_c - self.air_c) / cfg.idle_tau_s
                self.air_c += h * self.air_rate
                self.dut_c += h * (self.air_c - self.dut_c) / cfg.dut_tau_s

    def set_setpoint(self, t: float, setpoint_c: float) -> None:
        with self.lock:
            self.advance(t)
            self.setpoint_c = setpoint_c

    def set_conditioning(self, t: float, on: bool) -> None:
        with self.lock:
            self.advance(t)
            self.conditioning = on

    def air_at(self, t: float) -> float:
        with self.lock:
            self.advance(t)
            return self.air_c

    def dut_at(self, t: float) -> float:
        with self.lock:
            self.advance(t)
            return self.dut_c

    def reading(self, t: float) -> float:
        """What the chamber's own sensor reports: the air, plus a little noise."""
        with self.lock:
            return self.air_at(t) + self.rng.gauss(0.0, self.config.noise_c)
