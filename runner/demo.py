"""`nightbench demo`: the demo plan on a freshly started simulated bench; `--temperature` runs the
over-temperature variant (three chamber temperatures, seconds long in accelerated simulated time),
`--units` the pilot lot (eight boards behind the simulated switch, judged against the lot's limits)."""

from __future__ import annotations

import contextlib
from importlib import resources

import click

from nightbench.drivers.errors import InputError

DEMO_SOURCE = "TCPIP::127.0.0.1::5025::SOCKET"
DEMO_METER = "TCPIP::127.0.0.1::5026::SOCKET"
DEMO_CHAMBER = "TCPIP::127.0.0.1::5027::SOCKET"
DEMO_SWITCH = "TCPIP::127.0.0.1::5029::SOCKET"
DEMO_TIME_SCALE = "600"  # simulated chamber seconds per real second: a 10-minute soak takes one
UNITS_PLAN = "demo-units.yaml"
UNITS_SIM_CONFIG = "demo-units-sim.toml"  # a detector per switch route: the lot's spread


def demo_plan_text(source: str, meter: str, chamber: str | None = None) -> str:
    """The packaged demo plan (the temperature variant with a chamber) pointed at the running simulator."""
    name = "demo.yaml" if chamber is None else "demo-temperature.yaml"
    text = (resources.files("nightbench.plans") / name).read_text(encoding="utf-8")
    text = text.replace(DEMO_SOURCE, source).replace(DEMO_METER, meter)
    return text if chamber is None else text.replace(DEMO_CHAMBER, chamber)


def units_plan_text(source: str, meter: str, switch: str) -> str:
    """The packaged pilot-lot demo plan pointed at the running simulator."""
    text = (resources.files("nightbench.plans") / UNITS_PLAN).read_text(encoding="utf-8")
    return text.replace(DEMO_SOURCE, source).replace(DEMO_METER, meter).replace(DEMO_SWITCH, switch)


def drift_lines(over: dict) -> list[str]:
    """The over-temperature summary the demo prints after the table."""
    lines = [f"\nover temperature, against the {over['reference_c']:g} degC line:"]
    for g in over["groups"]:
        worst = g["max_abs_error_vs_reference_db"]
        lines.append(
            f"  {g['frequency_hz'] / 1e6:7.1f} MHz {g['temperature_c']:6g} degC: max |error| "
            + ("-" if worst is None else f"{worst:.2f} dB")
            + f", within the limit {g['range_low_dbm']} to {g['range_high_dbm']} dBm"
        )
    for d in over["drift"]:
        slope, intercept = d["slope_tc_mv_per_db_per_c"], d["intercept_tc_db_per_c"]
        if slope is not None and intercept is not None:
            lines.append(
                f"  {d['frequency_hz'] / 1e6:7.1f} MHz drift: slope {slope * 1000:+.2f} µV/dB per degC, "
                f"intercept {intercept:+.4f} dB per degC"
            )
    return lines


def run_demo(db: str, temperature: bool = False, units: bool = False) -> int:
    from nightbench.analysis.report import build_report
    from nightbench.measure.signals import StopFlag
    from nightbench.output.table import render_table
    from nightbench.output.units import render_units
    from nightbench.plan.load import parse_plan
    from nightbench.runs import execute, new_run
    from nightbench.simproc import SimProcess
    from nightbench.store.db import Store

    if temperature and units:  # refused before anything starts: two demos, two runs
        raise InputError("demo: --temperature and --units are two separate demos; give one of them")
    with contextlib.ExitStack() as stack:
        if units:  # the packaged config as a real file for the child, even from a zipped install
            config = stack.enter_context(resources.as_file(resources.files("nightbench.plans") / UNITS_SIM_CONFIG))
            args: tuple[str, ...] = ("--config", str(config))
        else:
            args = ("--chamber-time-scale", DEMO_TIME_SCALE) if temperature else ()
        sim = stack.enter_context(SimProcess(*args))
        r = sim.resources
        click.echo(
            f"simulated bench: source {r['source']}, meter {r['meter']}"
            + (f", chamber {r['chamber']} (time x{DEMO_TIME_SCALE})" if temperature else "")
            + (f", switch {r['switch']} (eight boards on routes 1-8)" if units else ""),
            err=True,
        )
        if units:
            name, text = f"plans/{UNITS_PLAN}", units_plan_text(r["source"], r["meter"], r["switch"])
        else:
            chamber = r["chamber"] if temperature else None
            name = "plans/demo-temperature.yaml" if temperature else "plans/demo.yaml"
            text = demo_plan_text(r["source"], r["meter"], chamber)
        loaded = parse_plan(text, name)
        store = Store(db)
        run_id = new_run(store, loaded)
        state, error = execute(loaded, store, run_id, StopFlag().install())
    if state != "completed":
        click.echo(f"nightbench: demo run {run_id} {state}: {error}", err=True)
        return 1
    report = build_report(store, run_id)
    click.echo("\n".join([render_table(report), *render_units(report)]))
    over = report.over_temperature()
    if over is not None:
        click.echo("\n".join(drift_lines(over)))
    click.echo(f"\nstored as run {run_id} in {db}; try: nightbench report {run_id} --db {db} --json")
    return 0
