"""`nightbench report` and `nightbench export`: what a run measured, for people and for programs.

Kept beside cli.py, which registers them, so that each stays under the size limit; the work is in
nightbench.reporting and nightbench.output.export."""

from __future__ import annotations

import sys

import click

from nightbench.cli import DB_HELP, _db, _read_store, friendly


@click.command()
@click.argument("run_ids", metavar="RUN [RUN_B]", nargs=-1, type=int, required=True)
@click.option("--db", help=DB_HELP)
@click.option("--json", "as_json", is_flag=True, help="machine-readable results")
@click.option("--out", type=click.Path(), help="write PNG plots, a Markdown summary and CSV files into this directory")
@click.option("--fit", "fit_dbm", nargs=2, type=float, metavar="LOW HIGH", help="fit range at the DUT, dBm")
@click.option(
    "--limit", "limits", type=float, multiple=True, metavar="DB", help="error limit of the range, dB (repeatable)"
)
@click.option("--law", type=click.Choice(["log", "linear", "square"]), help="the detector law to fit")
@click.option("--reference-c", "reference_c", type=float, metavar="T", help="reference temperature, degC")
@click.option("--save", is_flag=True, help="store this analysis with the run (the views then show it)")
@click.option("--unit", metavar="ID", help="only this unit's groups (a run with several units)")
@friendly
def report(
    run_ids: tuple[int, ...],
    db: str | None,
    as_json: bool,
    out: str | None,
    fit_dbm: tuple[float, float] | None,
    limits: tuple[float, ...],
    law: str | None,
    reference_c: float | None,
    save: bool,
    unit: str | None,
) -> None:
    """Characterisation results of RUN: slope, intercept, conformance, dynamic range, uncertainties.

    With a second run, RUN_B, both side by side and their differences (B minus A). The run's own
    analysis (its latest saved, else its plan's) unless --fit, --limit, --law or --reference-c
    choose otherwise; nothing is written unless --save.
    """
    from nightbench.reporting import run_report

    # read through a read-only open; --save writes through its own, after every choice is checked
    choices = {"fit_dbm": fit_dbm, "limits": limits, "law": law, "reference_c": reference_c}
    run_report(
        run_ids,
        _read_store(db),
        _db(db),
        as_json=as_json,
        out=out,
        choices=choices,
        save=save,
        echo=click.echo,
        unit=unit,
    )


@click.command()
@click.argument("run_id", type=int)
@click.option("--format", "fmt", type=click.Choice(["csv", "json"]), default="csv", show_default=True)
@click.option("--db", help=DB_HELP)
@click.option("-o", "--output", type=click.Path(dir_okay=False), help="file to write (default: stdout)")
@friendly
def export(run_id: int, fmt: str, db: str | None, output: str | None) -> None:
    """One row per point of RUN, as CSV or JSON."""
    from nightbench.output.export import write_export

    store = _read_store(db)
    if output:
        with open(output, "w", encoding="utf-8", newline="") as fh:
            write_export(store, run_id, fmt, fh)
    else:
        write_export(store, run_id, fmt, sys.stdout)
