"""Benchmark: the store at the size of a year of nightly runs (not a test).

Builds a synthetic database in /tmp (365 runs of 27 frequencies x 101 levels, 10 raw readings
per point: about 10 million readings), then times what an engineer types the next morning:
`runs`, `report RUN --json` and `export RUN --format csv`, each as the real CLI in a child
process, against two yardsticks measured in the same run on the same machine: the CLI's own
start-up (`nightbench --help`) and the same command on a one-run database. Machines here are
shared and noisy, so the ratios say more than the absolute times. Targets (issue 6): `runs`
under 100 ms, a report under 1 s. The database is deleted afterwards.

    python bench/store.py [--runs 365] [--repeat 7]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from nightbench.plan.load import parse_plan
from nightbench.runs import new_run
from nightbench.store.db import Store

FREQS = [round(100e6 * k) for k in range(1, 28)]  # 27 frequencies
LEVELS = {"start": -95, "stop": 5, "step": 1}  # 101 levels
SETTLE_READINGS, SAMPLES = 6, 4  # 10 raw readings per point
TARGETS = {"runs": 0.100, "report": 1.0}


def plan_text() -> str:
    plan = {
        "name": "nightly-rssi",
        "dut": {"id": "BENCH-0"},
        "instruments": {
            "source": {"driver": "scpi-source", "resource": "TCPIP::127.0.0.1::5025::SOCKET"},
            "meter": {"driver": "scpi-dmm", "resource": "TCPIP::127.0.0.1::5026::SOCKET"},
        },
        "path": {"table": [[50e6, 6.0], [3e9, 8.4]]},
        "limits": {"dut_max_dbm": 5},
        "sweep": {"frequency_hz": FREQS, "power_dbm": LEVELS},
        "settle": {"tolerance_v": 0.0005, "timeout_s": 2},
        "measure": {"samples": SAMPLES},
        "analysis": {"fit_dbm": [-65, -15], "error_limit_db": 1.0, "source_level_accuracy_db": 0.5},
    }
    return yaml.safe_dump(plan, sort_keys=False)


def synthesise(path: Path, runs: int) -> tuple[int, int]:
    """Write `runs` completed runs with executemany in one transaction per run batch."""
    store = Store(path)
    conn = store.conn
    conn.execute("PRAGMA synchronous=OFF")  # synthesis only; the product writes with FULL
    rng = np.random.default_rng(1)
    loaded = parse_plan(plan_text(), "bench.yaml")
    f = np.repeat(np.array(FREQS, dtype=float), 101)
    p = np.tile(np.arange(-95.0, 6.0), len(FREQS))
    n = f.size
    idx = np.arange(n)
    loss = 6.0 + 2.4 * (f - 50e6) / (3e9 - 50e6)
    per_point = SETTLE_READINGS + SAMPLES
    seq = np.tile(np.arange(per_point), n)
    phase = np.where(seq < SETTLE_READINGS, "settle", "measure").tolist()
    t_s = (0.002 * (seq + 1)).tolist()
    ridx = np.repeat(idx, per_point).tolist()
    points = readings = 0
    day0 = time.mktime((2025, 1, 1, 22, 0, 0, 0, 0, -1))
    # each run is created through the product's own path, which commits its own transaction, so
    # all of them are created before the batched inserts below open theirs
    run_ids = [new_run(store, loaded) for _ in range(runs)]
    conn.execute("BEGIN")
    for r, run_id in enumerate(run_ids):
        start = day0 + 86400 * r
        conn.execute(
            "UPDATE runs SET state='completed', dut_id=?, started_at=?, finished_at=? WHERE id=?",
            (
                f"BRD-{r % 40:03d}",
                time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(start)),
                time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(start + 5400)),
                run_id,
            ),
        )
        slope = 0.020 * (1 - 0.03 * f / 1e9) * (1 + rng.normal(0, 0.002))
        floor = 10 * np.log10(10 ** (p / 10) + 10 ** (-82 / 10))
        value = slope * (floor - (-92 + 2 * f / 1e9)) + rng.normal(0, 1e-4, n)
        conn.executemany(
            "INSERT INTO points (run_id, idx, frequency_hz, power_dbm, source_dbm, value_v, stdev_v, samples,"
            " settle_s, settle_readings, settled, overload, measured_at) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
            zip(
                [run_id] * n,
                idx.tolist(),
                f.tolist(),
                p.tolist(),
                (p + loss).tolist(),
                value.tolist(),
                [1e-4] * n,
                [SAMPLES] * n,
                [0.012] * n,
                [SETTLE_READINGS] * n,
                [1] * n,
                [0] * n,
                ["2025-01-01T22:00:00.000"] * n,
            ),
        )
        raw = (np.repeat(value, per_point) + rng.normal(0, 1e-4, n * per_point)).tolist()
        conn.executemany(
            "INSERT INTO readings (run_id, idx, seq, t_s, value_v, phase) VALUES (?,?,?,?,?,?)",
            zip([run_id] * len(raw), ridx, seq.tolist(), t_s, raw, phase),
        )
        points += n
        readings += len(raw)
        if r % 30 == 29:
            conn.execute("COMMIT")
            conn.execute("BEGIN")
    conn.execute("COMMIT")
    conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    store.close()
    return points, readings


def time_cli(args: list[str], repeat: int) -> float:
    """Median wall time of the real CLI in a child process (start-up included, as a user sees it)."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        res = subprocess.run([sys.executable, "-m", "nightbench", *args], capture_output=True, text=True)
        times.append(time.perf_counter() - t0)
        if res.returncode != 0:
            raise SystemExit(f"{args} failed: {res.stderr}")
    return statistics.median(times)


def time_call(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=365)
    parser.add_argument("--repeat", type=int, default=7)
    args = parser.parse_args()
    from nightbench.analysis.report import build_report

    with tempfile.TemporaryDirectory(prefix="nightbench-bench-", dir="/tmp") as tmp:
        big, small = Path(tmp) / "year.db", Path(tmp) / "one.db"
        t0 = time.perf_counter()
        points, readings = synthesise(big, args.runs)
        build_s = time.perf_counter() - t0
        synthesise(small, 1)
        size_mb = big.stat().st_size / 1e6
        print(
            f"synthetic store: {args.runs} runs, {points:,} points, {readings:,} readings, {size_mb:.0f} MB, "
            f"built in {build_s:.1f} s ({readings / build_s:,.0f} readings/s)"
        )
        mid = str(args.runs // 2 + 1)
        out = str(Path(tmp) / "export.csv")
        startup = time_cli(["--help"], args.repeat)
        print(f"CLI start-up (nightbench --help): {startup * 1e3:.0f} ms (median of {args.repeat})")
        commands = {
            "runs": ["runs"],
            "runs --json": ["runs", "--json"],
            "report": ["report", mid, "--json"],
            "export": ["export", mid, "--format", "csv", "-o", out],
        }
        print(f"{'command':<14} {'year db':>9} {'one-run db':>11} {'year/one':>9} {'minus start-up':>15} {'target':>8}")
        for name, argv in commands.items():
            on_big = time_cli(argv + ["--db", str(big)], args.repeat)
            one_argv = [a if a != mid else "1" for a in argv]
            on_small = time_cli(one_argv + ["--db", str(small)], args.repeat)
            target = TARGETS.get(name.split()[0])
            verdict = "" if target is None else f"{'met' if on_big < target else 'MISSED'} <{target * 1e3:.0f} ms"
            print(
                f"{name:<14} {on_big * 1e3:7.0f} ms {on_small * 1e3:8.0f} ms {on_big / on_small:9.2f} "
                f"{(on_big - startup) * 1e3:12.0f} ms {verdict:>8}"
            )
        store = Store(big, create=False)
        in_runs = time_call(store.runs, args.repeat)
        in_report = time_call(lambda: build_report(store, int(mid)), args.repeat)
        store.close()
        print(f"in process: Store.runs() {in_runs * 1e3:.1f} ms, build_report(run {mid}) {in_report * 1e3:.1f} ms")
    print("database deleted" if not big.exists() else f"database left at {big}")


if __name__ == "__main__":
    os.environ.setdefault("PYTHONDONTWRITEBYTECODE", "1")
    main()
