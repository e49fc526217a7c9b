"""Benchmark: settle detection on the simulated bench, against the physical minimum and a fixed dwell.

    python bench/settle.py [--cells N] [--only I ...] [--tail-share S] [--tries N] [--out FILE]

For a grid of rise/fall time constants and noise levels, plus coarse-step (5 dB) cells and cells
whose output has a slow tail (a 1 % part with a 0.2 s time constant behind the fast main part),
it runs a sweep on the simulator (its own process, real sockets, a real SQLite file) with
`settle.level_order: fast-edge`, then computes from the simulator's own model, per cell:

- within: share of points whose value lies within tolerance of the model's true settled output,
  allowing 3 standard errors of the averaging noise (the model's noise over `samples` readings);
- time/min: measured sweep time (first setting to last point stored) over the physical minimum,
  the sum over visited steps of the time the output needs to come within tolerance (first order:
  tau * ln(|step| / tolerance); with a tail, the time until main part and tail together are
  within tolerance, the tail carried over from earlier steps as it decays), plus the requested
  readings (samples x integration time);
- fixed/time: a fixed dwell long enough for the worst step of the planned order (the same
  accuracy: every point within tolerance), with this run's own per-point overheads, over the
  measured time; `fixed/min` is that dwell over the physical minimum, the most any detector
  could gain;
- order: physical minimum of the planned order over that of the visited order (what fast-edge
  ordering saved).

Then the large-step check, in process: `--tries` synthetic streams (the two-part stream of
tests/test_settle_tail.py, checked there against scipy) in which small steps teach the detector a
fast time constant and a step of 0.6-1.0 V follows, with a 1 % tail of 0.1-0.3 s; it counts the
large steps accepted with the reported value outside tolerance of the final value.

Sweeps are short where time constants are long (levels 15 dB apart at 300 ms) so the whole grid
runs in a few minutes. Ratios come from one run on a shared machine: rerun before quoting.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np
import yaml

from nightbench.measure.engine import Engine
from nightbench.measure.signals import StopFlag
from nightbench.measure.sweep import Point, expand
from nightbench.plan.load import parse_plan
from nightbench.runs import new_run
from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig, BenchModel
from nightbench.store.db import Store
from tests.test_settle_tail import sweep_then_big_step

TAUS_S = (0.001, 0.03, 0.3)
NOISE_V = (0.05e-3, 0.3e-3)  # detector output noise, rms at a 20 ms window
TOLERANCE_V = 0.0005
SAMPLES = 4
NPLC = 0.1
FREQS_HZ = [100e6, 900e6]
LEVEL_STEP_DB = {0.001: 2, 0.03: 4, 0.3: 15}  # by the slower edge: short sweeps for long taus
TAIL_TAU_S = 0.2


@dataclass(frozen=True)
class Cell:
    rise_s: float
    fall_s: float
    noise_v: float
    step_db: float | None = None  # None: LEVEL_STEP_DB by the slower edge
    tail_share: float = 0.0  # share of each step in a slow part with time constant TAIL_TAU_S
    freqs: int = 2  # frequencies swept (100 MHz to 900 MHz): more make an overnight-scale sweep

    def frequencies_hz(self) -> list[float]:
        return FREQS_HZ if self.freqs == 2 else [float(f) for f in np.linspace(FREQS_HZ[0], FREQS_HZ[1], self.freqs)]

    def detector(self) -> dict[str, float]:
        d = {"tau_rise_s": self.rise_s, "tau_fall_s": self.fall_s, "output_noise_v": self.noise_v}
        if self.tail_share:
            d |= {"tail_share": self.tail_share, "tau_tail_s": TAIL_TAU_S}
        return d

    def levels_step_db(self) -> float:
        return self.step_db or LEVEL_STEP_DB[max(self.rise_s, self.fall_s)]


def grid_cells() -> list[Cell]:
    """The first-order grid, then coarse steps (5 dB, no tail), then a 1 % slow tail (5 and 2 dB),
    then two overnight-scale sweeps (hundreds of points, several frequencies): what the tail
    guard's probes cost once spread over a long run, first order and with a tail."""
    cells = [Cell(r, f, n) for n in NOISE_V for r in TAUS_S for f in TAUS_S]
    cells += [Cell(0.002, 0.006, NOISE_V[0], 5), Cell(0.001, 0.03, NOISE_V[0], 5)]
    cells += [Cell(0.002, 0.006, NOISE_V[0], 5, 0.01), Cell(0.002, 0.006, NOISE_V[0], 2, 0.01)]
    cells += [Cell(0.001, 0.03, NOISE_V[0], 2, freqs=8), Cell(0.002, 0.006, NOISE_V[0], 2, 0.01, freqs=4)]
    return cells


def config_text(detector: dict[str, float]) -> str:
    return "[detector]\n" + "".join(f"{k} = {v}\n" for k, v in detector.items())


def plan_for(resources: dict[str, str], model: BenchModel, cell: Cell, tail_share: float | None) -> dict:
    loss, freqs = model.config.path.loss, cell.frequencies_hz()
    return {
        "name": "bench-settle",
        "instruments": {
            "source": {"driver": "scpi-source", "resource": resources["source"]},
            "meter": {"driver": "scpi-dmm", "resource": resources["meter"], "nplc": NPLC},
        },
        "path": {"table": [[f, loss(f)] for f in freqs]},
        "limits": {"dut_max_dbm": 0},
        "sweep": {"frequency_hz": freqs, "power_dbm": {"start": -70, "stop": -10, "step": cell.levels_step_db()}},
        "settle": {"tolerance_v": TOLERANCE_V, "timeout_s": 8, "level_order": "fast-edge"}
        | ({} if tail_share is None else {"tail_share": tail_share}),
        "measure": {"samples": SAMPLES},
        "analysis": {"fit_dbm": [-60, -20]},
    }


def reading_noise_v(model: BenchModel, dut_dbm: float, window_s: float) -> float:
    """The model's rms noise of one reading (its own noise_v if it has one, else the 1/sqrt(T) law)."""
    det = model.config.detector
    if hasattr(det, "noise_v"):
        return det.noise_v(dut_dbm, window_s)
    return det.output_noise_v * math.sqrt(0.02 / window_s)


def time_to_within(main_v: float, tau_s: float, tail_v: float, tau_tail_s: float) -> float:
    """Time until main_v exp(-t/tau) + tail_v exp(-t/tau_tail) stays within tolerance (first
    order alone: tau ln(|main_v| / tolerance); with a tail, found on a 10 us grid)."""
    if not tail_v:
        return tau_s * math.log(abs(main_v) / TOLERANCE_V) if abs(main_v) > TOLERANCE_V else 0.0
    t = np.arange(0.0, 12.0 * max(tau_s, tau_tail_s), 1e-5)
    out = np.flatnonzero(np.abs(main_v * np.exp(-t / tau_s) + tail_v * np.exp(-t / tau_tail_s)) > TOLERANCE_V)
    return float(t[out[-1] + 1]) if out.size else 0.0


def physical_minimum_s(points: list[Point], model: BenchModel, window_s: float) -> tuple[float, float]:
    """(total, worst step): time to within tolerance after each step, plus the readings. The main
    part is taken as settled at each change; a tail's lag is carried from step to step as it decays."""
    det = model.config.detector
    rho, tau_tail = det.tail_share, det.tau_tail_s
    prev = model.truth_v(-math.inf, points[0].frequency_hz)  # RF off before the first point
    tail = rho * prev  # the tail's own value
    total = worst = 0.0
    for p in points:
        v = model.truth_v(p.power_dbm, p.frequency_hz)
        step = v - prev
        tau = det.tau_rise_s if step > 0 else det.tau_fall_s
        need = time_to_within((1.0 - rho) * -step, tau, tail - rho * v, tau_tail)
        spent = need + SAMPLES * window_s
        total += spent
        worst = max(worst, need)
        if rho:
            tail = rho * v + (tail - rho * v) * math.exp(-spent / tau_tail)
        prev = v
    return total, worst


class SweepTimer(Engine):
    """The engine, noting when the first point's setting starts: sweep time excludes opening the bench."""

    first_move = 0.0

    def move_to(self, point: Point) -> None:
        if not self.first_move:
            self.first_move = time.perf_counter()
        super().move_to(point)


def run_cell(cell: Cell, workdir: Path, plan_tail_share: float | None = None) -> dict:
    name = f"{cell.rise_s}-{cell.fall_s}-{cell.noise_v}-{cell.levels_step_db()}-{cell.tail_share}-{cell.freqs}"
    cfg_path = workdir / f"sim-{name}.toml"
    cfg_path.write_text(config_text(cell.detector()))
    model = BenchModel(BenchConfig.from_dict({"detector": cell.detector()}))
    window = model.integration_s(NPLC)
    with SimProcess("--config", str(cfg_path)) as sim:
        plan = plan_for(sim.resources, model, cell, plan_tail_share)
        loaded = parse_plan(yaml.safe_dump(plan, sort_keys=False), "bench-settle.yaml")
        store = Store(workdir / f"bench-{name}.db")
        run_id = new_run(store, loaded)
        visited: list[Point] = []
        stamps: list[float] = []

        def progress(point: Point, result: object, done: int, total: int) -> None:
            visited.append(point)
            stamps.append(time.perf_counter())

        engine = SweepTimer(loaded, store, run_id, StopFlag(), progress)
        state, error = engine.run()
        elapsed = stamps[-1] - engine.first_move
    if state != "completed":
        raise SystemExit(f"cell {name}: run {state}: {error}")
    rows = {r["idx"]: dict(r) for r in store.points(run_id)}
    store.close()
    within = 0
    for r in rows.values():
        truth = model.truth_v(r["power_dbm"], r["frequency_hz"])
        se = reading_noise_v(model, r["power_dbm"], window) / math.sqrt(r["samples"])
        within += r["value_v"] is not None and abs(r["value_v"] - truth) <= TOLERANCE_V + 3 * se
    minimum, _ = physical_minimum_s(visited, model, window)
    planned_min, worst = physical_minimum_s(expand(loaded), model, window)
    settle_total = sum(r["settle_s"] for r in rows.values())
    fixed = elapsed - settle_total + len(rows) * worst
    ideal_fixed = len(rows) * (worst + SAMPLES * window)
    return {
        "rise_ms": cell.rise_s * 1e3,
        "fall_ms": cell.fall_s * 1e3,
        "noise_mv": cell.noise_v * 1e3,
        "step_db": cell.levels_step_db(),
        "tail": cell.tail_share,
        "freqs": cell.freqs,
        "points": len(rows),
        "within": within / len(rows),
        "unsettled": sum(1 for r in rows.values() if not r["settled"]),
        "time_s": elapsed,
        "min_s": minimum,
        "time_min": elapsed / minimum,
        "fixed_time": fixed / elapsed,
        "fixed_min": ideal_fixed / minimum,
        "order": planned_min / minimum,
    }


HEADER = (
    "| rise ms | fall ms | noise mV @20ms | step dB | tail | freqs | points | within | unsettled | time s | min s "
    "| time/min | fixed/time | fixed/min | order |"
)


def row_text(c: dict) -> str:
    tail = f"{100 * c['tail']:g} % @ {TAIL_TAU_S * 1e3:g} ms" if c["tail"] else "-"
    return (
        f"| {c['rise_ms']:g} | {c['fall_ms']:g} | {c['noise_mv']:g} | {c['step_db']:g} | {tail} | {c['freqs']} "
        f"| {c['points']} "
        f"| {100 * c['within']:.1f} % "
        f"| {c['unsettled']} | {c['time_s']:.2f} | {c['min_s']:.2f} | {c['time_min']:.2f} "
        f"| {c['fixed_time']:.1f} | {c['fixed_min']:.1f} | {c['order']:.2f} |"
    )


def large_tail_steps(tries: int) -> str:
    """Large steps with a 1 % slow tail after a learned fast time constant: none may be accepted
    with the reported value outside tolerance (the same streams as tests/test_settle_tail.py,
    other seeds)."""
    started = time.perf_counter()
    outside, errors, spent = 0, [], []
    for seed in range(10_000, 10_000 + tries):
        accepted, err, took = sweep_then_big_step(seed, 0.01, 0.6 + 0.4 * (seed % 5) / 4)
        outside += accepted and abs(err) > TOLERANCE_V
        errors.append(abs(err))
        spent.append(took)
    return (
        f"large steps with a 1 % tail of 0.1-0.3 s: {outside} of {tries} accepted outside tolerance; "
        f"largest |error| {max(errors) * 1e3:.3f} mV (tolerance {TOLERANCE_V * 1e3:g} mV); time on the step "
        f"median {1e3 * float(np.median(spent)):.0f} ms, max {1e3 * max(spent):.0f} ms; "
        f"{time.perf_counter() - started:.0f} s"
    )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--cells", type=int, default=0, help="run only the first N cells (0: all)")
    parser.add_argument("--only", type=int, nargs="*", help="run only these cells (0-based indices)")
    parser.add_argument(
        "--tail-share", type=float, help="the plans' settle.tail_share (default: the plan default, 2 %%)"
    )
    parser.add_argument("--tries", type=int, default=1000, help="large tail steps to try (0: skip)")
    parser.add_argument("--out", help="also write the table (markdown) to this file")
    args = parser.parse_args(argv)
    grid = grid_cells()
    if args.cells:
        grid = grid[: args.cells]
    if args.only:
        grid = [grid[i] for i in args.only]
    lines = [HEADER, "|" + " --- |" * (HEADER.count("|") - 1)]
    print("\n".join(lines), flush=True)
    cells = []
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        for spec in grid:
            cell = run_cell(spec, Path(tmp), args.tail_share)
            cells.append(cell)
            lines.append(row_text(cell))
            print(lines[-1], flush=True)
    points = sum(c["points"] for c in cells)
    within = sum(c["within"] * c["points"] for c in cells) / points
    total, minimum = sum(c["time_s"] for c in cells), sum(c["min_s"] for c in cells)
    fixed = sum(c["fixed_time"] * c["time_s"] for c in cells)
    summary = (
        f"all cells (plan settle.tail_share: {'default' if args.tail_share is None else args.tail_share}): "
        f"{points} points, {100 * within:.1f} % within tolerance, time/min "
        f"{total / minimum:.2f}, fixed/time {fixed / total:.1f}; "
        f"benchmark wall time {time.perf_counter() - started:.0f} s"
    )
    print(summary, flush=True)
    tries = large_tail_steps(args.tries) if args.tries else ""
    print(tries)
    if args.out:
        Path(args.out).write_text("\n".join(lines + ["", summary, "", tries]) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
