"""The Python API for notebooks and scripts: open a result database, list runs, load a run's
points and fits as numpy arrays (or pandas DataFrames, when pandas is installed), re-analyse.

Everything here reads: the database is opened read-only, so a notebook left open next to a
running night can neither block nor change it.

    import nightbench
    db = nightbench.open_db("lab.db")
    db.runs()                                # list of dicts, as `nightbench runs --json`
    pts = db.points(3)                       # {"frequency_hz": array, "power_dbm": array, ...}
    rep = db.report(3, fit_dbm=(-70, -10))   # the typed report, re-analysed with other settings
    rep = db.report(3, law="square", error_limit_db=[0.5, 1, 3])   # another law, three ranges
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from nightbench.drivers.errors import InputError
from nightbench.store.db import Store

if TYPE_CHECKING:
    from nightbench.analysis.report import Report


def _columns(rows: Sequence[Any]) -> dict[str, np.ndarray]:
    """Rows as columns: floats where every value is a number (None -> nan), objects otherwise."""
    if not rows:
        return {}
    out: dict[str, np.ndarray] = {}
    for key in rows[0].keys():  # noqa: SIM118 - sqlite3.Row iterates values, not keys
        values = [r[key] for r in rows]
        numeric = all(v is None or isinstance(v, int | float) for v in values)
        out[key] = (
            np.array([np.nan if v is None else v for v in values], dtype=float)
            if numeric
            else np.array(values, dtype=object)
        )
    return out


def _frame(columns: dict[str, np.ndarray]) -> Any:
    try:
        import pandas as pd
    except ImportError as exc:
        raise InputError("pandas is not installed: use the numpy arrays (points/fits), or pip install pandas") from exc
    return pd.DataFrame(columns)


class Results:
    """One result database, read-only."""

    def __init__(self, path: str | Path) -> None:
        self.store = Store.open_readonly(path)

    def close(self) -> None:
        self.store.close()

    def __enter__(self) -> Results:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def runs(self) -> list[dict[str, Any]]:
        return self.store.runs()

    def points(self, run_id: int) -> dict[str, np.ndarray]:
        """Every stored point of a run, column by column (levels at the DUT in power_dbm)."""
        self.store.run(run_id)
        return _columns(self.store.points(run_id))

    def fits(self, run_id: int) -> dict[str, np.ndarray]:
        """The fit results stored when the run completed, one entry per group."""
        self.store.run(run_id)
        return _columns(self.store.fits(run_id))

    def points_frame(self, run_id: int) -> Any:
        """`points` as a pandas DataFrame (pandas is optional; InputError without it)."""
        return _frame(self.points(run_id))

    def fits_frame(self, run_id: int) -> Any:
        return _frame(self.fits(run_id))

    def report(
        self,
        run_id: int,
        *,
        fit_dbm: tuple[float, float] | None = None,
        error_limit_db: float | Sequence[float] | None = None,
        law: str | None = None,
        reference_c: float | None = None,
    ) -> Report:
        """Analyse a run again: with its own analysis (its latest saved, else its plan's), or with
        another fit range, error limit(s) (several give one range each), law (log, linear, square)
        or reference temperature; stores nothing. Bad choices are an InputError."""
        from nightbench.analysis.report import build_report

        limits = (
            ()
            if error_limit_db is None
            else (error_limit_db,)
            if isinstance(error_limit_db, int | float)
            else tuple(error_limit_db)
        )
        choices = {"fit_dbm": fit_dbm, "limits": limits, "law": law, "reference_c": reference_c}
        return build_report(self.store, run_id, choices)


def open_db(path: str | Path) -> Results:
    """Open a nightbench database for reading (InputError if it is missing or not one)."""
    return Results(path)
