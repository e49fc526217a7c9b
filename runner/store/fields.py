"""The result fields of one fitted group, declared once.

The same list drives the `report --json` groups, the terminal and Markdown tables, results.csv,
the B - A comparison, and the SQL of the `fits` table and the `v_fits` view. It lives in the
store because the store is the lowest layer that needs it (the store imports nothing above it);
analysis and output import it from here.

The JSON group keys (docs/design.md) and the v_fits columns (docs/database.md) are contracts:
add fields at the end of their kind, never rename one. A new stored field also needs a schema
version and a migration (store/schema.py), because `CREATE TABLE IF NOT EXISTS` leaves old files as
they are.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Field:
    name: str  # JSON key; also the SQL and CSV column unless `columns` says otherwise
    unit: str  # of the value as stored and in JSON ('' for counts and text)
    fmt: str = ""  # format spec of a value in the tables
    header: str | None = None  # column label in the tables; None: no column of its own
    public: bool = True  # in the `report --json` groups
    sql: str = "REAL"  # type (and constraint) in the fits table
    view: bool = True  # a column of v_fits
    csv: bool = True  # a column of results.csv
    columns: tuple[str, ...] = ()  # SQL/CSV columns of a pair value (fit_dbm is stored as low, high)
    scale: float = 1.0  # the tables show value * scale ...
    shown_unit: str | None = None  # ... in this unit (default: `unit`)
    with_u: str | None = None  # the field of its expanded uncertainty: shown as 'value ±U'
    to: str | None = None  # the other end of a span: shown as 'low .. high'
    diff: str | None = None  # its key in the B - A comparison
    since: int = 2  # schema version that added it: later ones come after analysed_at (old files gain them)
    as_json: bool = False  # a list or dict in JSON, stored as JSON text
    laws: tuple[str, ...] = ()  # the laws it applies to (analysis/laws.py); () for every law

    @property
    def sql_columns(self) -> tuple[str, ...]:
        return self.columns or (self.name,)

    @property
    def table_unit(self) -> str:
        return self.unit if self.shown_unit is None else self.shown_unit

    def split(self, value: Any) -> tuple[Any, ...]:
        """The value as its SQL columns: a pair becomes two, anything else stays one."""
        if self.columns:
            values = tuple(value)
            assert len(values) == len(self.columns), (self.name, value)
            return values
        return (value,)


FIELDS: tuple[Field, ...] = (
    Field("frequency_hz", "Hz", ".3f", "freq", sql="REAL NOT NULL", scale=1e-6, shown_unit="MHz"),
    Field("temperature_c", "C", ".1f"),
    Field(
        "slope_mv_per_db",
        "mV/dB",
        ".3f",
        "slope",
        with_u="slope_u_mv_per_db",
        diff="slope_diff_mv_per_db",
        laws=("log",),
    ),
    Field("slope_u_mv_per_db", "mV/dB", ".3f"),
    Field("intercept_dbm", "dBm", ".2f", "intercept", with_u="intercept_u_db", diff="intercept_diff_db", laws=("log",)),
    Field("intercept_u_db", "dB", ".2f"),
    Field("fit_dbm", "dBm", "g", sql="REAL NOT NULL", csv=False, columns=("fit_low_dbm", "fit_high_dbm")),
    Field("error_limit_db", "dB", "g", sql="REAL NOT NULL", csv=False),
    Field("range_low_dbm", "dBm", ".1f", "range", to="range_high_dbm", diff="range_low_diff_db"),
    Field("range_high_dbm", "dBm", ".1f", diff="range_high_diff_db"),
    Field("dynamic_range_db", "dB", ".1f", "DR", diff="dynamic_range_diff_db"),
    Field("max_abs_error_db", "dB", ".3f", "max|err|", diff="max_abs_error_diff_db"),
    Field("points", "", "d", "points", sql="INTEGER NOT NULL"),
    Field("unsettled_points", "", "d", "unsettled", sql="INTEGER NOT NULL"),
    Field("overload_points", "", "d", public=False, sql="INTEGER NOT NULL"),
    Field("residual_sd_v", "V", ".3g", public=False, view=False, csv=False),
    Field("note", "", "s", public=False, sql="TEXT", view=False, csv=False),
    Field("uncertainty_json", "", "s", public=False, sql="TEXT", view=False, csv=False),
    # version 5: the analysis chosen at report time (docs/design.md); slope and intercept are the
    # `log` law's, the natural parameters below the other laws' (None where they do not apply)
    Field("law", "", "s", sql="TEXT", since=5),
    Field(
        "responsivity_v_per_mw",
        "V/mW",
        ".4g",
        "responsivity",
        with_u="responsivity_u_v_per_mw",
        since=5,
        laws=("square",),
    ),
    Field("responsivity_u_v_per_mw", "V/mW", ".2g", since=5),
    Field("gain_v_per_v", "V/V", ".4g", "gain", with_u="gain_u_v_per_v", since=5, laws=("linear",)),
    Field("gain_u_v_per_v", "V/V", ".2g", since=5),
    Field(
        "offset_v",
        "V",
        ".3f",
        "offset",
        with_u="offset_u_v",
        scale=1e3,
        shown_unit="mV",
        since=5,
        laws=("square", "linear"),
    ),
    Field("offset_u_v", "V", ".3f", scale=1e3, shown_unit="mV", since=5),
    Field("ranges", "", "s", sql="TEXT", csv=False, since=5, as_json=True),
    # version 6: each U's coverage factor (t distribution, 95.45 %) and effective degrees of freedom
    # (Welch-Satterthwaite; NULL: infinite), and the range ends' expanded uncertainties (docs/uncertainty.md)
    Field("slope_k", "", ".2f", since=6, laws=("log",)),
    Field("slope_nu_eff", "", ".1f", since=6, laws=("log",)),
    Field("intercept_k", "", ".2f", since=6, laws=("log",)),
    Field("intercept_nu_eff", "", ".1f", since=6, laws=("log",)),
    Field("range_low_u_db", "dB", ".2f", since=6),
    Field("range_high_u_db", "dB", ".2f", since=6),
    Field("unit_id", "", "s", sql="TEXT", since=6),  # the unit of a run with several (plan `units`), else NULL
)

BY_NAME = {f.name: f for f in FIELDS}
PUBLIC_KEYS = tuple(f.name for f in FIELDS if f.public)
FIT_COLUMNS = tuple(c for f in FIELDS for c in f.sql_columns)
# v_fits: the version-2 columns, analysed_at, then what later versions added (old positions kept)
VIEW_COLUMNS = (
    *(c for f in FIELDS if f.view and f.since < 5 for c in f.sql_columns),
    "analysed_at",
    *(c for f in FIELDS if f.view and f.since >= 5 for c in f.sql_columns),
    "analysis_id",
)
CSV_COLUMNS = tuple(c for f in FIELDS if f.csv for c in f.sql_columns)
TABLE_FIELDS = tuple(f for f in FIELDS if f.header is not None)


def table_fields(law: str) -> tuple[Field, ...]:
    """The table columns of an analysis with this law (a law's own parameters only with that law)."""
    return tuple(f for f in TABLE_FIELDS if not f.laws or law in f.laws)


def row_values(values: dict[str, Any], fields: Sequence[Field] = FIELDS, *, stored: bool = False) -> dict[str, Any]:
    """Field values by name -> values by SQL/CSV column (pairs split; JSON-typed fields as text when `stored`)."""
    return {
        c: json.dumps(v) if stored and f.as_json and v is not None else v
        for f in fields
        for c, v in zip(f.sql_columns, f.split(values[f.name]))
    }


def added_fit_columns(since: int) -> tuple[tuple[str, str, str], ...]:
    """(table, column, declaration) of the fits columns added by schema `since` and later (store/schema.py)."""
    return tuple(("fits", c, f.sql) for f in FIELDS if f.since >= since for c in f.sql_columns)


def fits_table_sql() -> str:
    """`CREATE TABLE fits`: the run, the version-2 columns in declaration order, when it was analysed,
    the later columns (the order an older file reaches by ALTER TABLE), and the analysis they belong to."""
    old = [f"    {c} {f.sql}" for f in FIELDS if f.since < 5 for c in f.sql_columns]
    new = [f"    {c} {f.sql}" for f in FIELDS if f.since >= 5 for c in f.sql_columns]
    return (
        "CREATE TABLE IF NOT EXISTS fits (\n    run_id INTEGER NOT NULL REFERENCES runs(id),\n"
        + ",\n".join([*old, "    analysed_at TEXT NOT NULL", *new, "    analysis_id INTEGER REFERENCES analyses(id)"])
        + "\n);\n"
    )
