"""Benchmark: settle detection on the simulated bench, against the physical minimum and a fixed dwell.

    python bench/settle.py [--cells N] [--out FILE]

For a grid of rise/fall time constants and noise levels it runs a sweep on the simulator (its
own process, real sockets, a real SQLite file) with `settle.level_order: fast-edge`, then
computes from the simulator's own model, per cell:

- within: share of points whose value lies within tolerance of the model's true settled output,
  allowing 3 standard errors of the averaging noise (the model's noise over `samples` readings);
- time/min: measured sweep time (first setting to last point stored) over the physical minimum,
  the sum over visited steps of the time a first-order output needs to come within tolerance,
  tau * ln(|step| / tolerance), plus the
  requested readings (samples x integration time);
- fixed/time: a fixed dwell long enough for the worst step of the planned order (the same
  accuracy: every point within tolerance), with this run's own per-point overheads, over the
  measured time; `fixed/min` is that dwell over the physical minimum, the most any detector
  could gain;
- order: physical minimum of the planned order over that of the visited order (what fast-edge
  ordering saved).

Sweeps are short where time constants are long (levels 15 dB apart at 300 ms) so the whole grid
runs in a few minutes. Ratios come from one run on a shared machine: rerun before quoting.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import yaml

from nightbench.measure.engine import Engine
from nightbench.measure.signals import StopFlag
from nightbench.measure.sweep import Point, expand
from nightbench.plan.load import parse_plan
from nightbench.runs import new_run
from nightbench.simproc import SimProcess
from nightbench.simulators.physics import BenchConfig, BenchModel
from nightbench.store.db import Store

TAUS_S = (0.001, 0.03, 0.3)
NOISE_V = (0.05e-3, 0.3e-3)  # detector output noise, rms at a 20 ms window
TOLERANCE_V = 0.0005
SAMPLES = 4
NPLC = 0.1
FREQS_HZ = (100e6, 900e6)
LEVEL_STEP_DB = {0.001: 2, 0.03: 4, 0.3: 15}  # by the slower edge: short sweeps for long taus


def config_text(rise_s: float, fall_s: float, noise_v: float) -> str:
    return f"[detector]\ntau_rise_s = {rise_s}\ntau_fall_s = {fall_s}\noutput_noise_v = {noise_v}\n"


def plan_for(resources: dict[str, str], model: BenchModel, step_db: float) -> dict:
    loss = model.config.path.loss
    return {
        "name": "bench-settle",
        "instruments": {
            "source": {"driver": "scpi-source", "resource": resources["source"]},
            "meter": {"driver": "scpi-dmm", "resource": resources["meter"], "nplc": NPLC},
        },
        "path": {"table": [[f, loss(f)] for f in FREQS_HZ]},
        "limits": {"dut_max_dbm": 0},
        "sweep": {"frequency_hz": list(FREQS_HZ), "power_dbm": {"start": -70, "stop": -10, "step": step_db}},
        "settle": {"tolerance_v": TOLERANCE_V, "timeout_s": 8, "level_order": "fast-edge"},
        "measure": {"samples": SAMPLES},
        "analysis": {"fit_dbm": [-60, -20]},
    }


def reading_noise_v(model: BenchModel, dut_dbm: float, window_s: float) -> float:
    """The model's rms noise of one reading (its own noise_v if it has one, else the 1/sqrt(T) law)."""
    det = model.config.detector
    if hasattr(det, "noise_v"):
        return det.noise_v(dut_dbm, window_s)
    return det.output_noise_v * math.sqrt(0.02 / window_s)


def physical_minimum_s(points: list[Point], model: BenchModel, window_s: float) -> tuple[float, float]:
    """(total, worst step): first-order time to within tolerance after each step, plus the readings."""
    det = model.config.detector
    prev = model.truth_v(-math.inf, points[0].frequency_hz)  # RF off before the first point
    total = worst = 0.0
    for p in points:
        v = model.truth_v(p.power_dbm, p.frequency_hz)
        step = v - prev
        tau = det.tau_rise_s if step > 0 else det.tau_fall_s
        need = tau * math.log(abs(step) / TOLERANCE_V) if abs(step) > TOLERANCE_V else 0.0
        total += need + SAMPLES * window_s
        worst = max(worst, need)
        prev = v
    return total, worst


class SweepTimer(Engine):
    """The engine, noting when the first point's setting starts: sweep time excludes opening the bench."""

    first_move = 0.0

    def move_to(self, point: Point) -> None:
        if not self.first_move:
            self.first_move = time.perf_counter()
        super().move_to(point)


def run_cell(rise_s: float, fall_s: float, noise_v: float, workdir: Path) -> dict:
    cfg_path = workdir / f"sim-{rise_s}-{fall_s}-{noise_v}.toml"
    cfg_path.write_text(config_text(rise_s, fall_s, noise_v))
    model = BenchModel(
        BenchConfig.from_dict({"detector": {"tau_rise_s": rise_s, "tau_fall_s": fall_s, "output_noise_v": noise_v}})
    )
    window = model.integration_s(NPLC)
    with SimProcess("--config", str(cfg_path)) as sim:
        plan = plan_for(sim.resources, model, LEVEL_STEP_DB[max(rise_s, fall_s)])
        loaded = parse_plan(yaml.safe_dump(plan, sort_keys=False), "bench-settle.yaml")
        store = Store(workdir / f"bench-{rise_s}-{fall_s}-{noise_v}.db")
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
        raise SystemExit(f"cell {rise_s}/{fall_s}/{noise_v}: run {state}: {error}")
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
        "rise_ms": rise_s * 1e3,
        "fall_ms": fall_s * 1e3,
        "noise_mv": noise_v * 1e3,
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
    "| rise ms | fall ms | noise mV @20ms | points | within | unsettled | time s | min s | time/min "
    "| fixed/time | fixed/min | order |"
)


def row_text(c: dict) -> str:
    return (
        f"| {c['rise_ms']:g} | {c['fall_ms']:g} | {c['noise_mv']:g} | {c['points']} | {100 * c['within']:.1f} % "
        f"| {c['unsettled']} | {c['time_s']:.2f} | {c['min_s']:.2f} | {c['time_min']:.2f} "
        f"| {c['fixed_time']:.1f} | {c['fixed_min']:.1f} | {c['order']:.2f} |"
    )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--cells", type=int, default=0, help="run only the first N cells (0: all)")
    parser.add_argument("--out", help="also write the table (markdown) to this file")
    args = parser.parse_args(argv)
    grid = [(r, f, n) for n in NOISE_V for r in TAUS_S for f in TAUS_S]
    if args.cells:
        grid = grid[: args.cells]
    lines = [HEADER, "|" + " --- |" * (HEADER.count("|") - 1)]
    print("\n".join(lines), flush=True)
    cells = []
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        for rise, fall, noise in grid:
            cell = run_cell(rise, fall, noise, Path(tmp))
            cells.append(cell)
            lines.append(row_text(cell))
            print(lines[-1], flush=True)
    points = sum(c["points"] for c in cells)
    within = sum(c["within"] * c["points"] for c in cells) / points
    total, minimum = sum(c["time_s"] for c in cells), sum(c["min_s"] for c in cells)
    fixed = sum(c["fixed_time"] * c["time_s"] for c in cells)
    summary = (
        f"all cells: {points} points, {100 * within:.1f} % within tolerance, time/min "
        f"{total / minimum:.2f}, fixed/time {fixed / total:.1f}; "
        f"benchmark wall time {time.perf_counter() - started:.0f} s"
    )
    print(summary)
    if args.out:
        Path(args.out).write_text("\n".join(lines + ["", summary]) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
