"""`nightbench report`: the command's work, kept out of cli.py so the command line stays thin.

Reads only, unless `--save`: the run's analysis (its latest saved, else its plan's), or the one the
options choose, analysed afresh; with `--save` stored as one more analysis of each run, and only
after every choice has been checked, so bad input writes nothing (docs/design.md).
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from typing import Any

from nightbench.analysis.report import build_report, save_analysis
from nightbench.drivers.errors import InputError
from nightbench.output.table import render_table
from nightbench.output.units import check_unit_option, only_unit, render_units
from nightbench.store.db import Store


def run_report(
    run_ids: tuple[int, ...],
    read_store: Store,
    db_path: str,
    *,
    as_json: bool,
    out: str | None,
    choices: Mapping[str, Any],
    save: bool,
    echo: Callable[..., None],
    unit: str | None = None,
) -> None:
    """Analyse RUN (or RUN and RUN_B side by side) and print, save or write what was asked."""
    if len(run_ids) > 2:
        raise InputError(f"report takes one run, or two to compare; got {len(run_ids)}")
    if save and type(read_store) is not Store:  # a shared store (store/pg.py) is written by push only
        raise InputError("--save stores into a local database file; the shared store takes runs by push only")
    if out:
        from nightbench.output.files import check_out_dir

        check_out_dir(out)
    for run_id in run_ids:
        read_store.run(run_id)  # every run must exist before anything is written
    check_unit_option(read_store, run_ids, unit, save)  # before any analysis (output/units.py)
    reports = [build_report(read_store, run_id, choices, unit) for run_id in run_ids]  # bad choices stop here
    if save:  # only now, with every choice checked: the one write `report` makes
        writer = Store(db_path, create=False)
        for rep in reports:
            echo(f"run {rep.run_id}: stored as analysis {save_analysis(writer, rep)}", err=True)
        writer.close()
    reports = [only_unit(r, unit) for r in reports]  # --unit: the plan's units narrowed to the one
    comparison_text = None
    if len(reports) == 2:
        from nightbench.analysis.compare import compare_reports
        from nightbench.output.table import render_comparison

        cmp = compare_reports(*reports)
        comparison_text = render_comparison(cmp)
        echo(
            json.dumps(cmp.to_json(), indent=1)
            if as_json
            else "\n\n".join([comparison_text, *(render_table(r) for r in reports)])
        )
    else:
        text = "\n".join([render_table(reports[0]), *render_units(reports[0])])
        echo(json.dumps(reports[0].to_json(), indent=1) if as_json else text)
    if out:
        from nightbench.output.files import prepare_dir, write_outputs

        files = write_outputs(read_store, reports, comparison_text, prepare_dir(out))
        echo(f"wrote {len(files)} files to {out}: " + ", ".join(f.name for f in files), err=True)
