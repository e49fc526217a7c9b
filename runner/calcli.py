"""`nightbench calibrate PLAN -o FILE`: a level calibration with a power sensor (docs/calibration.md).

Kept beside cli.py, which registers the command. Bad input (no `calibration` section, an output
folder that does not exist) is refused before any instrument is contacted; the file appears
whole or not at all (written beside its target, then renamed). With `--db` one event row (no
run) records what was calibrated, or why it failed; without it nothing is written but FILE.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import TYPE_CHECKING

import click

from nightbench.cli import friendly

if TYPE_CHECKING:
    from nightbench.measure.calibrate import CalibrationResult
    from nightbench.plan.load import LoadedPlan


def _target(out: str) -> Path:
    from nightbench.drivers.errors import InputError

    path = Path(out)
    if path.is_dir():
        raise InputError("is a directory; -o names the calibration file to write", file=out)
    if not path.parent.is_dir():
        raise InputError(f"the folder {path.parent} does not exist", file=out)
    return path


def write_atomically(path: Path, text: str) -> None:
    """Write beside the target, flush to disk, rename over it: a kill leaves the old file or the new."""
    from nightbench.drivers.errors import InputError

    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise InputError(f"cannot write: {exc.strerror}", file=str(path)) from exc


def file_text(loaded: LoadedPlan, result: CalibrationResult) -> str:
    from datetime import UTC, datetime

    from nightbench.plan.calibration import format_calibration

    spec = loaded.plan.calibration
    assert spec is not None
    span = spec.levels_dbm
    notes = (
        f"plan: {loaded.plan.name} ({loaded.file})",
        f"source: {result.source_identity}",
        f"levels_dbm: {span.start:g} to {span.stop:g} step {span.step:g} at the DUT plane",
        f"samples: {spec.samples} sensor readings per level (mean in dBm)",
    )
    date = datetime.now(UTC).isoformat(timespec="seconds")
    return format_calibration(result.sensor_identity, date, spec.sensor.accuracy_db, result.rows, notes)


@click.command("calibrate")
@click.argument("plan", type=click.Path(dir_okay=True))
@click.option("-o", "--output", "out", required=True, metavar="FILE", help="the calibration file to write (CSV)")
@click.option("--db", help="record one event (what was calibrated, or why it failed) in this database file")
@click.option("--json", "as_json", is_flag=True, help="print the result as JSON")
@friendly
def _calibrate(plan: str, out: str, db: str | None, as_json: bool) -> None:
    """Measure the DUT-plane level with the plan's power sensor where the DUT goes; write FILE.

    Every plan frequency at calibration.levels_dbm, never above limits.dut_max_dbm, RF off on
    every way out. A plan then uses FILE as its path: `path: {calibration: FILE}`."""
    import json

    from nightbench.drivers.errors import InputError, NightbenchError
    from nightbench.measure.calibrate import CalibrationInterrupted, Calibrator
    from nightbench.measure.signals import EXIT_CODES, StopFlag
    from nightbench.plan.load import load_plan
    from nightbench.store.db import Store

    loaded = load_plan(plan)
    if loaded.plan.calibration is None:
        raise InputError("calibrate needs a calibration section (sensor, levels_dbm)", file=plan, key="calibration")
    target = _target(out)
    store = Store(db) if db else None  # a bad --db is refused before any instrument is contacted
    stop = StopFlag().install()
    try:
        result = Calibrator(loaded, stop).run()
        write_atomically(target, file_text(loaded, result))
    except NightbenchError as exc:
        if store is not None:
            store.event(None, "calibration", f"calibration for {out} failed: {exc}")
        if isinstance(exc, CalibrationInterrupted):
            click.echo(f"nightbench: {exc}", err=True)
            sys.exit(EXIT_CODES.get(stop.reason or "", 1))
        raise
    freqs = sorted({f for f, _, _ in result.rows})
    dut = [d for _, _, d in result.rows]
    corr = [s - d for _, s, d in result.rows]
    summary = {
        "file": str(target),
        "sensor": result.sensor_identity,
        "accuracy_db": loaded.plan.calibration.sensor.accuracy_db,
        "frequency_hz": freqs,
        "rows": len(result.rows),
        "dut_dbm": [min(dut), max(dut)],
        "correction_db": [min(corr), max(corr)],
    }
    if store is not None:
        store.event(
            None,
            "calibration",
            f"wrote {target}: {len(freqs)} frequencies, {len(result.rows)} levels, sensor {result.sensor_identity}",
        )
    if as_json:
        click.echo(json.dumps(summary))
        return
    click.echo(
        f"wrote {target}: {len(result.rows)} levels at {len(freqs)} frequencies, DUT plane "
        f"{min(dut):.2f} to {max(dut):.2f} dBm, correction {min(corr):.3f} to {max(corr):.3f} dB "
        f"(sensor {result.sensor_identity})"
    )


calibrate: click.Command = _calibrate  # declared, so cli.py can register it across the import cycle
