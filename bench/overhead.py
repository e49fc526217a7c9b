"""Per-point overhead of nightbench's engine against a bare pyvisa loop (issue 4 benchmark).

Both talk to the simulated bench in its own process, configured with zero settling (no time
constants, no noise) and the shortest meter aperture, so what is left is I/O and bookkeeping.
The bare loop sends exactly the messages nightbench sent for each point (the same number of
readings, taken from the stored run), with no parsing, checking or storing. Printed as ratios
measured in one run, since these machines are shared and noisy.

Also measures the Nagle/delayed-ACK question of FIELD-NOTES trap 10: four small settings and
*OPC? as separate writes vs one joined program message, each with and without TCP_NODELAY.

    python bench/overhead.py [--points 400] [--repeats 3]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from nightbench.drivers.visa import resource_manager, set_nodelay
from nightbench.measure.engine import Engine
from nightbench.measure.signals import StopFlag
from nightbench.plan.load import parse_plan
from nightbench.runs import new_run
from nightbench.simproc import SimProcess
from nightbench.store.db import Store

ZERO_SETTLING = """
[source]
level_settle_s = 0.0
[detector]
tau_rise_s = 1e-7
tau_fall_s = 1e-7
output_noise_v = 0.0
floor_noise_v = 0.0
ripple_db = 0.0
[meter]
noise_v = 0.0
default_nplc = 0.001
"""


def plan_text(resources: dict, points: int) -> str:
    return yaml.safe_dump(
        {
            "name": "overhead",
            "instruments": {
                "source": {"driver": "scpi-source", "resource": resources["source"]},
                "meter": {"driver": "scpi-dmm", "resource": resources["meter"], "nplc": 0.001},
            },
            "path": {"loss_db": 6.0},
            "limits": {"dut_max_dbm": 0},
            "sweep": {
                "frequency_hz": [100e6],
                "power_dbm": {"start": -80, "stop": -80 + 0.1 * (points - 1), "points": points},
            },
            "settle": {"tolerance_v": 0.001, "timeout_s": 1},
            "measure": {"samples": 4},
            "analysis": {"fit_dbm": [-70, -50]},
        },
        sort_keys=False,
    )


def run_nightbench(resources: dict, points: int, db: Path) -> tuple[float, list[dict]]:
    loaded = parse_plan(plan_text(resources, points), "overhead.yaml")
    store = Store(db)
    run_id = new_run(store, loaded)
    t0 = time.perf_counter()
    state, error = Engine(loaded, store, run_id, StopFlag()).run()
    elapsed = time.perf_counter() - t0
    assert state == "completed", error
    return elapsed, [dict(r) for r in store.points(run_id)]


def run_bare(resources: dict, rows: list[dict]) -> float:
    """The same messages, straight through pyvisa: the floor nightbench is measured against."""
    rm = resource_manager()
    src, dmm = rm.open_resource(resources["source"]), rm.open_resource(resources["meter"])
    for inst in (src, dmm):
        inst.read_termination = inst.write_termination = "\n"
    for inst in (src, dmm):
        set_nodelay(inst)
    t0 = time.perf_counter()
    src.query("*IDN?")
    dmm.query("*IDN?")
    src.query(":OUTPut:STATe OFF;:OUTPut:STATe?;*OPC?;:SYSTem:ERRor?")
    dmm.query(":CONFigure:VOLTage:DC;:TRIGger:SOURce IMMediate;:SENSe:VOLTage:DC:NPLCycles 0.001;*OPC?;:SYSTem:ERRor?")
    first = True
    for r in rows:
        if first:
            src.query(f":SOURce:FREQuency:CW {r['frequency_hz']:.3f} HZ;:SOURce:FREQuency:CW?;*OPC?;:SYSTem:ERRor?")
        src.query(f":SOURce:POWer:LEVel {r['source_dbm']:.3f} DBM;:SOURce:POWer:LEVel?;*OPC?;:SYSTem:ERRor?")
        if first:
            src.query(":OUTPut:STATe ON;:OUTPut:STATe?;*OPC?;:SYSTem:ERRor?")
            first = False
        for _ in range(r["settle_readings"] + r["samples"] - 1):
            float(dmm.query("READ?"))
        dmm.query("READ?;:SYSTem:ERRor?")
    src.query(":OUTPut:STATe OFF;:OUTPut:STATe?;*OPC?;:SYSTem:ERRor?")
    elapsed = time.perf_counter() - t0
    src.close()
    dmm.close()
    return elapsed


def nagle(resources: dict, n: int = 60) -> dict[str, float]:
    """Median ms for FREQ, POW, OUTP, POW settings and *OPC?: separate writes vs one message."""
    rm = resource_manager()
    out = {}
    for nodelay in (False, True):
        inst = rm.open_resource(resources["source"])
        inst.read_termination = inst.write_termination = "\n"
        assert set_nodelay(inst, nodelay)
        inst.query("*IDN?")
        for joined in (False, True):
            times = []
            for i in range(n):
                level = -60 + (i % 10)
                t0 = time.perf_counter()
                if joined:
                    inst.query(f":FREQ 1E8;:POW {level};:OUTP ON;:POW {level};*OPC?")
                else:
                    for msg in (":FREQ 1E8", f":POW {level}", ":OUTP ON", f":POW {level}"):
                        inst.write(msg)
                    inst.query("*OPC?")
                times.append(time.perf_counter() - t0)
            out[f"{'joined' if joined else 'separate'} writes, TCP_NODELAY {'on' if nodelay else 'off'}"] = (
                1e3 * statistics.median(times)
            )
        inst.query(":OUTP OFF;*OPC?")
        inst.close()
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=400)
    parser.add_argument("--repeats", type=int, default=10)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        config = Path(tmp) / "zero.toml"
        config.write_text(ZERO_SETTLING)
        with SimProcess("--config", str(config)) as sim:
            ratios, nb_times, bare_times = [], [], []
            _, rows = run_nightbench(sim.resources, args.points, Path(tmp) / "warm.db")  # warm-up
            for i in range(args.repeats):
                if i % 2:  # alternate which goes first, so drift on a shared machine cancels
                    bare = run_bare(sim.resources, rows)
                    nb, rows = run_nightbench(sim.resources, args.points, Path(tmp) / f"o{i}.db")
                else:
                    nb, rows = run_nightbench(sim.resources, args.points, Path(tmp) / f"o{i}.db")
                    bare = run_bare(sim.resources, rows)
                nb_times.append(nb)
                bare_times.append(bare)
                ratios.append(nb / bare)
            queries = sum(r["settle_readings"] + r["samples"] + 1 for r in rows)
            print(
                f"sweep: {args.points} points, {queries} queries per run ({queries / args.points:.1f} per point), "
                f"simulator in its own process, zero settling"
            )
            print(
                f"nightbench engine: median {statistics.median(nb_times) * 1e3:.0f} ms "
                f"({statistics.median(nb_times) / args.points * 1e3:.3f} ms/point)"
            )
            print(
                f"bare pyvisa loop:  median {statistics.median(bare_times) * 1e3:.0f} ms "
                f"({statistics.median(bare_times) / args.points * 1e3:.3f} ms/point)"
            )
            print(f"ratio nightbench / bare, paired runs: {', '.join(f'{r:.2f}' for r in ratios)}")
            print(
                f"  median of paired ratios {statistics.median(ratios):.3f}; best-of ratio "
                f"{min(nb_times) / min(bare_times):.3f} (target <= 1.10)"
            )
            print("settings + *OPC? (median of 60):")
            for name, ms in nagle(sim.resources).items():
                print(f"  {name:<36} {ms:7.3f} ms")
    return 0


if __name__ == "__main__":
    sys.exit(main())
