"""`nightbench demo`: the demo plan on a freshly started simulated bench; `--temperature` runs the
over-temperature variant (three chamber temperatures, seconds long in accelerated simulated time)."""

from __future__ import annotations

from importlib import resources

import click

DEMO_SOURCE = "TCPIP::127.0.0.1::5025::SOCKET"
DEMO_METER = "TCPIP::127.0.0.1::5026::SOCKET"
DEMO_CHAMBER = "TCPIP::127.0.0.1::5027::SOCKET"
DEMO_TIME_SCALE = "600"  # simulated chamber seconds per real second: a 10-minute soak takes one


def demo_plan_text(source: str, meter: str, chamber: str | None = None) -> str:
    """The packaged demo plan (the temperature variant with a chamber) pointed at the running simulator."""
    name = "demo.yaml" if chamber is None else "demo-temperature.yaml"
    text = (resources.files("nightbench.plans") / name).read_text(encoding="utf-8")
    text = text.replace(DEMO_SOURCE, source).replace(DEMO_METER, meter)
    return text if chamber is None else text.replace(DEMO_CHAMBER, chamber)


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


def run_demo(db: str, temperature: bool = False) -> int:
    from nightbench.analysis.report import build_report
    from nightbench.measure.signals import StopFlag
    from nightbench.output.table import render_table
    from nightbench.plan.load import parse_plan
    from nightbench.runs import execute, new_run
    from nightbench.simproc import SimProcess
    from nightbench.store.db import Store

    args = ("--chamber-time-scale", DEMO_TIME_SCALE) if temperature else ()
    with SimProcess(*args) as sim:
        r = sim.resources
        click.echo(
            f"simulated bench: source {r['source']}, meter {r['meter']}"
            + (f", chamber {r['chamber']} (time x{DEMO_TIME_SCALE})" if temperature else ""),
            err=True,
        )
        chamber = r["chamber"] if temperature else None
        name = "plans/demo-temperature.yaml" if temperature else "plans/demo.yaml"
        loaded = parse_plan(demo_plan_text(r["source"], r["meter"], chamber), name)
        store = Store(db)
        run_id = new_run(store, loaded)
        state, error = execute(loaded, store, run_id, StopFlag().install())
    if state != "completed":
        click.echo(f"nightbench: demo run {run_id} {state}: {error}", err=True)
        return 1
    report = build_report(store, run_id)
    click.echo(render_table(report))
    over = report.over_temperature()
    if over is not None:
        click.echo("\n".join(drift_lines(over)))
    click.echo(f"\nstored as run {run_id} in {db}; try: nightbench report {run_id} --db {db} --json")
    return 0
