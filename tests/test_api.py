"""The Python API for notebooks: read-only, arrays that match the file, re-analysis with other settings."""

from __future__ import annotations

import hashlib
import sqlite3
from pathlib import Path

import numpy as np
import pytest

import nightbench
from nightbench.drivers.errors import InputError
from tests.conftest import store_run


def law(p: float, f: float) -> float:
    """A known detector law with a little cubic bow, so a fit range with the same centre still
    changes the slope."""
    return 0.02 * (p + 90.0) + 2e-7 * (p + 10.0) ** 3


def digest(path: Path) -> str:
    """The database's content: the main file and whatever its write-ahead log holds (SQLite may
    create an empty -wal and a -shm index beside a WAL file on any open, a reader's included)."""
    wal = path.with_name(path.name + "-wal")
    return hashlib.sha256(path.read_bytes() + (wal.read_bytes() if wal.exists() else b"")).hexdigest()


@pytest.fixture
def stored(db: Path) -> tuple[Path, int]:
    return db, store_run(db, law, frequencies=[100e6, 900e6], levels=[float(p) for p in range(-80, 1, 2)])


def test_points_match_the_file_read_with_sqlite3(stored):
    db, run_id = stored
    with nightbench.open_db(db) as results:
        pts = results.points(run_id)
        assert [r["id"] for r in results.runs()] == [run_id]
    # reference: the standard library's sqlite3 reading the same table
    conn = sqlite3.connect(db)
    ref = conn.execute("SELECT power_dbm, value_v FROM points WHERE run_id=? ORDER BY idx", (run_id,)).fetchall()
    assert pts["power_dbm"].dtype == float
    assert np.array_equal(pts["power_dbm"], [r[0] for r in ref])
    assert np.array_equal(pts["value_v"], [r[1] for r in ref])


def test_report_with_another_fit_range_matches_numpy_polyfit_and_writes_nothing(stored):
    db, run_id = stored
    before = digest(db)
    with nightbench.open_db(db) as results:
        plan = results.report(run_id)
        other = results.report(run_id, fit_dbm=(-70, -10), error_limit_db=0.5)
    assert digest(db) == before, "the API only reads"
    assert other.settings.fit_dbm == (-70.0, -10.0) and other.settings.error_limit_db == 0.5
    levels = np.arange(-70, -9, 2, dtype=float)
    # reference: numpy.polyfit over the same levels of the known law
    slope, offset = np.polyfit(levels, [law(p, 100e6) for p in levels], 1)
    group = other.groups[0]
    assert group.slope_mv_per_db == pytest.approx(slope * 1e3, rel=1e-9)
    assert group.intercept_dbm == pytest.approx(-offset / slope, rel=1e-9)
    assert plan.groups[0].slope_mv_per_db != pytest.approx(group.slope_mv_per_db, rel=1e-6)


def test_missing_database_is_refused_and_not_created(tmp_path):
    with pytest.raises(InputError, match=r"no such database|does not exist|not found"):
        nightbench.open_db(tmp_path / "typo.db")
    assert not (tmp_path / "typo.db").exists()


def test_frames_need_pandas_or_say_so(stored):
    db, run_id = stored
    with nightbench.open_db(db) as results:
        try:
            import pandas  # noqa: F401
        except ImportError:
            with pytest.raises(InputError, match="pandas is not installed"):
                results.points_frame(run_id)
            return
        frame = results.points_frame(run_id)
        assert len(frame) == len(results.points(run_id)["idx"])
