"""Benchmark: push a year of nightly runs to a shared PostgreSQL store (not a test).

Builds the bench/store.py database (365 runs of 27 frequencies x 101 levels, 10 raw readings per
point: about 1 million points and 10 million readings), starts a throwaway PostgreSQL server as
the tests do (tests/pg.py), and times `push` of the whole year with the readings, then a single
night's run without them (in process, median of several, each into an empty database, and once as
the real CLI in a child process, start-up included). Targets (issue 16): the year in under 2 min,
a night's run in under 1 s. Everything is deleted afterwards.

    python bench/push.py [--runs 365] [--repeat 5]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np

from bench.store import FREQS, SAMPLES, SETTLE_READINGS, plan_text
from nightbench.plan.load import parse_plan
from nightbench.runs import new_run
from nightbench.store.db import Store
from nightbench.store.push import push
from tests.pg import start_cluster

TARGETS = {"year": 120.0, "night": 1.0}


def synthesise(path: Path, runs: int) -> tuple[int, int]:
    """The bench/store.py year (same plan, sizes and law), written run by run: each run created
    through the real Store, then its points and readings with executemany in one transaction."""
    store = Store(path)
    conn = store.conn
    conn.execute("PRAGMA synchronous=OFF")  # synthesis only
    rng = np.random.default_rng(1)
    loaded = parse_plan(plan_text(), "bench.yaml")
    f = np.repeat(np.array(FREQS, dtype=float), 101)
    p = np.tile(np.arange(-95.0, 6.0), len(FREQS))
    n, per_point = f.size, SETTLE_READINGS + SAMPLES
    seq = np.tile(np.arange(per_point), n).tolist()
    phase = ["settle" if s < SETTLE_READINGS else "measure" for s in seq]
    t_s = [0.002 * (s + 1) for s in seq]
    ridx = np.repeat(np.arange(n), per_point).tolist()
    for r in range(runs):
        run_id = new_run(store, loaded)
        value = 0.02 * (10 * np.log10(10 ** (p / 10) + 10 ** (-8.2)) + 92 - 2 * f / 1e9) + rng.normal(0, 1e-4, n)
        raw = (np.repeat(value, per_point) + rng.normal(0, 1e-4, n * per_point)).tolist()
        conn.execute("BEGIN")
        conn.execute(
            "UPDATE runs SET state='completed', dut_id=?, started_at=?, finished_at=? WHERE id=?",
            (f"BRD-{r % 40:03d}", f"2025-01-01T22:00:{r % 60:02d}", f"2025-01-01T23:30:{r % 60:02d}", run_id),
        )
        conn.executemany(
            "INSERT INTO points (run_id, idx, frequency_hz, power_dbm, source_dbm, value_v, stdev_v, samples,"
            " settle_s, settle_readings, settled, overload, measured_at) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
            [
                (run_id, i, fi, pi, pi + 6.0, vi, 1e-4, SAMPLES, 0.012, SETTLE_READINGS, 1, 0, "2025-01-01T22:00:00")
                for i, (fi, pi, vi) in enumerate(zip(f.tolist(), p.tolist(), value.tolist()))
            ],
        )
        conn.executemany(
            "INSERT INTO readings (run_id, idx, seq, t_s, value_v, phase) VALUES (?,?,?,?,?,?)",
            zip([run_id] * len(raw), ridx, seq, t_s, raw, phase),
        )
        conn.execute("COMMIT")
    store.close()
    return runs * n, runs * n * per_point


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=365)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    clusters = start_cluster()
    cluster = next(clusters)
    try:
        with tempfile.TemporaryDirectory(prefix="nightbench-push-", dir="/tmp") as tmp:
            year, night = Path(tmp) / "year.db", Path(tmp) / "night.db"
            t0 = time.perf_counter()
            points, readings = synthesise(year, args.runs)
            print(
                f"synthetic year: {args.runs} runs, {points:,} points, {readings:,} readings, built in "
                f"{time.perf_counter() - t0:.1f} s"
            )
            synthesise(night, 1)
            url = cluster.new_database()
            t0 = time.perf_counter()
            done = push(str(year), url, bench="bench-1", readings=True)
            year_s = time.perf_counter() - t0
            assert done.points == points and done.readings == readings, done
            print(
                f"year with readings: {year_s:.1f} s, {points / year_s:,.0f} points/s, {readings / year_s:,.0f} "
                f"readings/s ({'met' if year_s < TARGETS['year'] else 'MISSED'} <{TARGETS['year']:.0f} s)"
            )
            times = []
            for _ in range(args.repeat):
                url = cluster.new_database()
                t0 = time.perf_counter()
                push(str(night), url, bench="bench-1")
                times.append(time.perf_counter() - t0)
            one = statistics.median(times)
            print(
                f"one night, no readings, in process: {one * 1e3:.0f} ms (median of {args.repeat}; "
                f"{points // args.runs / one:,.0f} points/s; {'met' if one < TARGETS['night'] else 'MISSED'} "
                f"<{TARGETS['night']:.0f} s)"
            )
            url = cluster.new_database()
            t0 = time.perf_counter()
            subprocess.run(
                [sys.executable, "-m", "nightbench", "push", "--db", str(night), "--to", url],
                check=True,
                capture_output=True,
            )
            print(
                f"one night, no readings, the CLI in a child process: {(time.perf_counter() - t0) * 1e3:.0f} ms "
                "(start-up and the store's creation included)"
            )
    finally:
        next(clusters, None)


if __name__ == "__main__":
    main()
