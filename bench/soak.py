"""Kill soak: SIGKILL a run at hundreds of random instants, resuming each time, then check that
every point is stored exactly once, that no raw reading is orphaned, that the database passes
`PRAGMA integrity_check` after every kill, and that after every restart the first thing the
source hears is RF off. Not a test (it takes minutes); tests/test_safety.py does 20 kills.

    python bench/soak.py [--kills 200] [--seed 1]
"""

from __future__ import annotations

import argparse
import json
import random
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from nightbench.simproc import SimProcess


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--kills", type=int, default=200)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    rng = random.Random(args.seed)
    with tempfile.TemporaryDirectory() as tmp:
        tmp_path = Path(tmp)
        log, db = tmp_path / "source.jsonl", tmp_path / "soak.db"
        with SimProcess("--log", str(log)) as sim:
            freqs = [100e6, 500e6, 900e6]
            levels = 40 * args.kills // len(freqs) + 1
            plan = {
                "name": "soak",
                "instruments": {
                    "source": {"driver": "scpi-source", "resource": sim.resources["source"]},
                    "meter": {"driver": "scpi-dmm", "resource": sim.resources["meter"], "nplc": 0.1},
                },
                "path": {"table": [[f, 6.0 + 0.9 * (f / 1e9) ** 0.5] for f in freqs]},
                "limits": {"dut_max_dbm": 0},
                "sweep": {"frequency_hz": freqs, "power_dbm": {"start": -70, "stop": -10, "points": levels}},
                "settle": {"tolerance_v": 0.0005, "timeout_s": 2},
                "measure": {"samples": 4},
                "analysis": {"fit_dbm": [-60, -20]},
            }
            plan_path = tmp_path / "soak.yaml"
            plan_path.write_text(yaml.safe_dump(plan, sort_keys=False))
            total = len(freqs) * levels
            kills, bad_starts = 0, 0
            t0 = time.monotonic()
            for i in range(args.kills):
                cmd = ["run", str(plan_path)] if i == 0 else ["resume", "1"]
                mark = len(log.read_text().splitlines())
                proc = subprocess.Popen(
                    [sys.executable, "-m", "nightbench", *cmd, "--db", str(db)],
                    stdout=subprocess.DEVNULL,
                    stderr=subprocess.DEVNULL,
                )
                time.sleep(rng.uniform(0.2, 1.0))
                proc.kill()
                proc.wait()
                kills += proc.returncode == -signal.SIGKILL
                with sqlite3.connect(db) as conn:
                    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok", f"kill {i}"
                    assert conn.execute("SELECT COUNT(*) - COUNT(DISTINCT idx) FROM points").fetchone()[0] == 0
                first = log.read_text().splitlines()[mark : mark + 1]
                if i and first and json.loads(first[0])["output"] is not False:
                    bad_starts += 1
            done = subprocess.run(
                [sys.executable, "-m", "nightbench", "resume", "1", "--db", str(db)], capture_output=True, text=True
            )
            with sqlite3.connect(db) as conn:
                idx = [r[0] for r in conn.execute("SELECT idx FROM points ORDER BY idx")]
                orphans = conn.execute(
                    "SELECT COUNT(*) FROM readings r LEFT JOIN points p ON p.run_id=r.run_id "
                    "AND p.idx=r.idx WHERE p.idx IS NULL"
                ).fetchone()[0]
                integrity = conn.execute("PRAGMA integrity_check").fetchone()[0]
    print(f"kills: {kills} SIGKILLs in {time.monotonic() - t0:.0f} s; final resume exit {done.returncode}")
    print(
        f"points: {len(idx)} of {total}, exactly once: {idx == list(range(total))}; orphaned readings: "
        f"{orphans}; integrity_check: {integrity}; restarts whose first source command was not RF off: "
        f"{bad_starts}"
    )
    return 0 if idx == list(range(total)) and not orphans and integrity == "ok" and not bad_starts else 1


if __name__ == "__main__":
    sys.exit(main())
