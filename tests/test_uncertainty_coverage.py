"""Coverage (issue 14): over 200 seeded simulated runs, the stated 95.45 % intervals of slope and
intercept contain the truth 93-97 % of the time.

Each run is made in process from the simulator's own physics (nightbench.simulators.physics: the
detector law with its ripple, its output noise at the meter's integration window, the meter's own
noise), with the bench's Type B errors DRAWN per seed from the distributions the plan states: a
source level offset and a path loss error (rectangular), a mismatch with a uniform phase, a meter
gain and offset (rectangular). The product's own analysis (analyse_group) then states U. The truth
is the noise-free law of the simulated part over the same fit range, as tests/test_laws.py takes it.

The bench's stated values are chosen so that no single non-normal term dominates the intercept: a
sum of a few comparable terms is close to normal, which is when a t-based k gives its nominal
coverage (JCGM 100:2008 G.2.3, G.6.6); docs/uncertainty.md gives the rates and what happens when one
rectangular term dominates (over-coverage).
"""

from __future__ import annotations

import math

import numpy as np

from nightbench.analysis.fit import analyse_group, fit_line
from nightbench.analysis.stated import Stated
from nightbench.simulators.physics import DetectorConfig, MeterConfig

RUNS = 200
FREQUENCY = 500e6
LEVELS = np.arange(-65.0, -14.0, 1.0)
FIT = (-65.0, -15.0)
NPLC, LINE_HZ, SAMPLES = 0.1, 50.0, 4
STATED = {
    "source_level_accuracy_db": 0.1,
    "path_loss_accuracy_db": 0.1,
    "meter_gain_accuracy_pct": 0.01,
    "meter_offset_accuracy_v": 0.002,
}
GAMMA_SOURCE, GAMMA_DUT = 0.1, 0.1


def _one_run(seed: int, det: DetectorConfig, meter: MeterConfig) -> list[dict]:
    rng = np.random.default_rng(seed)
    offset_db = (
        rng.uniform(-1, 1) * STATED["source_level_accuracy_db"] + rng.uniform(-1, 1) * STATED["path_loss_accuracy_db"]
    )
    offset_db += 20 * math.log10(abs(1 - GAMMA_SOURCE * GAMMA_DUT * np.exp(1j * rng.uniform(0, 2 * math.pi))))
    gain = rng.uniform(-1, 1) * STATED["meter_gain_accuracy_pct"] / 100
    meter_offset = rng.uniform(-1, 1) * STATED["meter_offset_accuracy_v"]
    rows = []
    for p in LEVELS:
        # the simulator's noise: the detector's at the meter's window, the meter's own scaled by 1/sqrt(NPLC)
        sigma = math.hypot(det.noise_v(p, NPLC / LINE_HZ), meter.noise_v / math.sqrt(NPLC))
        samples = det.steady_v(p + offset_db, FREQUENCY) * (1 + gain) + meter_offset + rng.normal(0, sigma, SAMPLES)
        rows.append(
            {
                "power_dbm": float(p),
                "value_v": float(samples.mean()),
                "stdev_v": float(samples.std(ddof=1)),
                "samples": SAMPLES,
                "settled": 1,
                "overload": 0,
            }
        )
    return rows


def _coverage() -> dict[str, float]:
    det, meter = DetectorConfig(), MeterConfig()
    truth = fit_line(LEVELS, [det.steady_v(p, FREQUENCY) for p in LEVELS])  # noise-free law, same fit range
    stated = Stated(accuracy=STATED, gamma_source=GAMMA_SOURCE, gamma_dut=GAMMA_DUT)
    hits = {"slope": 0, "intercept": 0}
    for seed in range(RUNS):
        g = analyse_group(FREQUENCY, _one_run(seed, det, meter), FIT, 1.0, stated)
        hits["slope"] += abs(g.slope_mv_per_db - truth.slope_v_per_db * 1e3) <= g.slope_u_mv_per_db
        hits["intercept"] += abs(g.intercept_dbm - truth.intercept_dbm) <= g.intercept_u_db
    return {k: v / RUNS for k, v in hits.items()}


def test_stated_95_percent_intervals_cover_the_truth_93_to_97_percent_of_the_time():
    # issue 14 acceptance, slope and intercept from one set of runs (one test: under xdist a shared
    # fixture would be built once per worker); the observed rates are in docs/uncertainty.md (seeds 0..199)
    coverage = _coverage()
    assert 0.93 <= coverage["slope"] <= 0.97, coverage
    assert 0.93 <= coverage["intercept"] <= 0.97, coverage
