"""`nightbench demo`: the demo plan on a freshly started simulated bench."""

from __future__ import annotations

from importlib import resources

import click

DEMO_SOURCE = "TCPIP::127.0.0.1::5025::SOCKET"
DEMO_METER = "TCPIP::127.0.0.1::5026::SOCKET"


def demo_plan_text(source: str, meter: str) -> str:
    """The packaged demo plan with its resources pointed at the running simulator."""
    text = (resources.files("nightbench.plans") / "demo.yaml").read_text(encoding="utf-8")
    return text.replace(DEMO_SOURCE, source).replace(DEMO_METER, meter)


def run_demo(db: str) -> int:
    from nightbench.analysis.report import build_report
    from nightbench.measure.signals import StopFlag
    from nightbench.output.table import render_table
    from nightbench.plan.load import parse_plan
    from nightbench.runs import execute, new_run
    from nightbench.simproc import SimProcess
    from nightbench.store.db import Store

    with SimProcess() as sim:
        click.echo(f"simulated bench: source {sim.resources['source']}, meter {sim.resources['meter']}", err=True)
        loaded = parse_plan(demo_plan_text(sim.resources["source"], sim.resources["meter"]), "plans/demo.yaml")
        store = Store(db)
        run_id = new_run(store, loaded)
        state, error = execute(loaded, store, run_id, StopFlag().install())
    if state != "completed":
        click.echo(f"nightbench: demo run {run_id} {state}: {error}", err=True)
        return 1
    click.echo(render_table(build_report(store, run_id)))
    click.echo(f"\nstored as run {run_id} in {db}; try: nightbench report {run_id} --db {db} --json")
    return 0
