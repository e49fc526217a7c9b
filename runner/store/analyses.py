"""A run's stored analyses: the run's own at completion and each `report --save`, with their groups
(the fits table) and every point's error; the Store's methods for them (docs/database.md).

Kept apart from db.py so each stays small; `Store` inherits these and provides `conn`, `_sql`,
`_transaction`, `absent` and `schema_version`.
"""

from __future__ import annotations

import contextlib
import json
import sqlite3
from collections.abc import Sequence
from typing import Any

from nightbench.store.fields import FIT_COLUMNS


class AnalysesMixin:
    conn: sqlite3.Connection
    schema_version: int

    def _sql(self, doing: str) -> contextlib.AbstractContextManager[None]:  # provided by Store
        raise NotImplementedError

    def _transaction(self) -> Any:  # provided by Store
        raise NotImplementedError

    def absent(self, table: str) -> bool:  # provided by Store
        raise NotImplementedError

    # -- analyses and fits -------------------------------------------------------------------
    def save_analysis(
        self,
        run_id: int,
        settings: dict[str, Any],
        rows: list[dict[str, Any]],
        errors: Sequence[tuple[int, float | None]] = (),
        *,
        origin: str = "run",
    ) -> int:
        """Store one analysis of a run in one transaction: its settings (law, fit_dbm, error_limits_db,
        reference_c), its groups (rows keyed by FIT_COLUMNS) and each point's error (idx, dB). The
        run's own analysis (origin 'run', at completion) replaces the previous one of that origin;
        `report --save` (origin 'report') adds one. Returns the analysis id (analysis.report builds the rows)."""
        with self._sql(f"storing an analysis of run {run_id}"), self._transaction():
            if origin == "run":
                old = "SELECT id FROM analyses WHERE run_id=? AND origin='run'"
                self.conn.execute(f"DELETE FROM point_errors WHERE analysis_id IN ({old})", (run_id,))
                self.conn.execute(
                    f"DELETE FROM fits WHERE run_id=? AND (analysis_id IS NULL OR analysis_id IN ({old}))",
                    (run_id, run_id),
                )
                self.conn.execute("DELETE FROM analyses WHERE run_id=? AND origin='run'", (run_id,))
            at = _now()
            cur = self.conn.execute(
                "INSERT INTO analyses (run_id, origin, law, fit_low_dbm, fit_high_dbm, error_limits_json, reference_c,"
                " analysed_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    run_id,
                    origin,
                    settings["law"],
                    settings["fit_dbm"][0],
                    settings["fit_dbm"][1],
                    json.dumps(list(settings["error_limits_db"])),
                    settings.get("reference_c"),
                    at,
                ),
            )
            analysis_id = int(cur.lastrowid or 0)
            self.conn.executemany(
                f"INSERT INTO fits (run_id, {', '.join(FIT_COLUMNS)}, analysed_at, analysis_id)"
                f" VALUES (?, {', '.join('?' * len(FIT_COLUMNS))}, ?, ?)",
                [(run_id, *(r[c] for c in FIT_COLUMNS), at, analysis_id) for r in rows],
            )
            self.conn.executemany(
                "INSERT INTO point_errors (analysis_id, run_id, idx, error_db) VALUES (?, ?, ?, ?)",
                [(analysis_id, run_id, idx, err) for idx, err in errors],
            )
        return analysis_id

    def replace_fits(self, run_id: int, rows: list[dict[str, Any]]) -> None:
        """The run's own analysis with the plan's settings as the rows name them (no point errors)."""
        first = rows[0] if rows else {"fit_low_dbm": 0.0, "fit_high_dbm": 0.0, "error_limit_db": 1.0}
        settings = {
            "law": (first.get("law") or "log"),
            "fit_dbm": (first["fit_low_dbm"], first["fit_high_dbm"]),
            "error_limits_db": [first["error_limit_db"]],
        }
        self.save_analysis(run_id, settings, rows, [], origin="run")

    def analyses(self, run_id: int) -> list[dict[str, Any]]:
        """The run's stored analyses, oldest first, with their settings (none in a file before version 5)."""
        if self.absent("analyses"):
            return []
        with self._sql(f"reading the analyses of run {run_id}"):
            rows = self.conn.execute("SELECT * FROM analyses WHERE run_id=? ORDER BY id", (run_id,)).fetchall()
        return [
            {
                "id": r["id"],
                "origin": r["origin"],
                "law": r["law"],
                "fit_dbm": (r["fit_low_dbm"], r["fit_high_dbm"]),
                "error_limits_db": [float(x) for x in json.loads(r["error_limits_json"])],
                "reference_c": r["reference_c"],
                "analysed_at": r["analysed_at"],
            }
            for r in rows
        ]

    def fits(self, run_id: int, analysis_id: int | None = None) -> list[sqlite3.Row]:
        """The groups of one analysis (default: the run's latest, as v_fits shows)."""
        if self.absent("fits"):
            return []
        if self.schema_version < 5:  # an older file read as it is: one analysis per run
            with self._sql(f"reading the fit results of run {run_id}"):
                return self.conn.execute(
                    "SELECT * FROM fits WHERE run_id=? ORDER BY frequency_hz, temperature_c", (run_id,)
                ).fetchall()
        with self._sql(f"reading the fit results of run {run_id}"):
            if analysis_id is None:
                row = self.conn.execute("SELECT MAX(id) FROM analyses WHERE run_id=?", (run_id,)).fetchone()
                analysis_id = row[0]
            if analysis_id is None:  # not analysed yet
                return []
            return self.conn.execute(  # '=' not 'IS ?': the same SQL serves the shared PostgreSQL store
                "SELECT * FROM fits WHERE run_id=? AND analysis_id = ? ORDER BY frequency_hz, temperature_c",
                (run_id, analysis_id),
            ).fetchall()

    # -- soaks ------------------------------------------------------------------------------
    def start_soak(self, run_id: int, temperature_c: float) -> int:
        """A soak begins (outcome 'soaking' until finish_soak: a kill leaves it so, and says so)."""
        with self._sql(f"storing a soak of run {run_id}"):
            cur = self.conn.execute(
                "INSERT INTO soaks (run_id, temperature_c, started_at, outcome, readings_json) VALUES (?, ?, ?, ?, ?)",
                (run_id, temperature_c, _now(), "soaking", "[]"),
            )
        return int(cur.lastrowid or 0)

    def finish_soak(self, soak_id: int, *, seconds: float, outcome: str, readings: list[tuple[float, float]]) -> None:
        """How a soak ended ('stable', 'timeout', 'interrupted', 'failed'), its duration and the
        chamber's readings meanwhile as [seconds since the start, degC] pairs."""
        with self._sql(f"storing the end of soak {soak_id}"):
            self.conn.execute(
                "UPDATE soaks SET finished_at=?, seconds=?, outcome=?, readings_json=? WHERE id=?",
                (_now(), seconds, outcome, json.dumps([[round(t, 3), v] for t, v in readings]), soak_id),
            )

    def soaks(self, run_id: int) -> list[sqlite3.Row]:
        if self.absent("soaks"):
            return []
        with self._sql(f"reading the soaks of run {run_id}"):
            return self.conn.execute("SELECT * FROM soaks WHERE run_id=? ORDER BY id", (run_id,)).fetchall()


def _now() -> str:
    from nightbench.store.db import now_iso

    return now_iso()
