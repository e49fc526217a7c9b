"""The SQLite schema: tables, triggers and the stable views, and the version that names them.

Kept apart from db.py (which reads and writes) so the schema reads as one document; the stable
views' names and columns are a contract (docs/database.md), generated from store/fields.py.
"""

from __future__ import annotations

from nightbench.store.fields import VIEW_COLUMNS, added_fit_columns, fits_table_sql
from nightbench.store.states import JobState, RunState, sql_in

# 2: fits, run_counts, and the v_points / v_fits views; 3: jobs, service; 4: temperature_c,
# chamber_c and dut_c on points, and the soaks table; 5: analyses (several per run, each with its
# parameters), the laws' fields on fits, point_errors, v_fits_all and v_points.error_db (docs/database.md);
# 6: repeat, direction and unit_id on points (measure.repeats, units), and the instruments table (the run record)
SCHEMA_VERSION = 6

# the CHECK constraints come from store/states.py (generated text identical to the words written before)
SCHEMA = f"""
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN {sql_in(RunState)}),
    plan_file TEXT,
    plan_text TEXT NOT NULL,
    plan_json TEXT NOT NULL,
    dut_id TEXT,
    points_total INTEGER NOT NULL,
    created_at TEXT NOT NULL,
    started_at TEXT,
    finished_at TEXT,
    error TEXT,
    pid INTEGER,
    host TEXT,
    heartbeat_at TEXT,
    source_idn TEXT,
    meter_idn TEXT
);
CREATE TABLE IF NOT EXISTS run_files (
    run_id INTEGER NOT NULL REFERENCES runs(id),
    path TEXT NOT NULL,
    text TEXT NOT NULL,
    PRIMARY KEY (run_id, path)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS points (
    run_id INTEGER NOT NULL REFERENCES runs(id),
    idx INTEGER NOT NULL,
    frequency_hz REAL NOT NULL,
    power_dbm REAL NOT NULL,
    source_dbm REAL NOT NULL,
    value_v REAL,
    stdev_v REAL,
    samples INTEGER NOT NULL,
    settle_s REAL NOT NULL,
    settle_readings INTEGER NOT NULL,
    settled INTEGER NOT NULL,
    overload INTEGER NOT NULL DEFAULT 0,
    measured_at TEXT NOT NULL,
    temperature_c REAL,
    chamber_c REAL,
    dut_c REAL,
    repeat INTEGER NOT NULL DEFAULT 0,
    direction TEXT CHECK (direction IN ('up', 'down')),
    unit_id TEXT,
    PRIMARY KEY (run_id, idx)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS readings (
    run_id INTEGER NOT NULL,
    idx INTEGER NOT NULL,
    seq INTEGER NOT NULL,
    t_s REAL NOT NULL,
    value_v REAL,
    phase TEXT NOT NULL CHECK (phase IN ('settle','measure')),
    PRIMARY KEY (run_id, idx, seq)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY,
    run_id INTEGER,
    at TEXT NOT NULL,
    kind TEXT NOT NULL,
    message TEXT NOT NULL
);
-- one analysis of a run: the run's own when it completes (origin 'run', the plan's settings), or
-- one stored by `report --save` (origin 'report'); its groups are in fits, its points' errors in point_errors
CREATE TABLE IF NOT EXISTS analyses (
    id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs(id),
    origin TEXT NOT NULL CHECK (origin IN ('run', 'report')),
    law TEXT NOT NULL,
    fit_low_dbm REAL NOT NULL,
    fit_high_dbm REAL NOT NULL,
    error_limits_json TEXT NOT NULL,
    reference_c REAL,
    analysed_at TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS analyses_run ON analyses(run_id);
{fits_table_sql()}CREATE INDEX IF NOT EXISTS fits_run ON fits(run_id);
CREATE TABLE IF NOT EXISTS point_errors (
    analysis_id INTEGER NOT NULL REFERENCES analyses(id),
    run_id INTEGER NOT NULL,
    idx INTEGER NOT NULL,
    error_db REAL,
    PRIMARY KEY (analysis_id, idx)
) WITHOUT ROWID;
-- points per run, kept by the database itself in the same transaction as each point, so listing
-- runs costs one row per run instead of counting every point of a year (bench/store.py)
CREATE TABLE IF NOT EXISTS run_counts (run_id INTEGER PRIMARY KEY, points_done INTEGER NOT NULL);
CREATE TRIGGER IF NOT EXISTS points_counted AFTER INSERT ON points BEGIN
    INSERT INTO run_counts (run_id, points_done) VALUES (NEW.run_id, 1)
    ON CONFLICT (run_id) DO UPDATE SET points_done = points_done + 1;
END;
CREATE TRIGGER IF NOT EXISTS points_uncounted AFTER DELETE ON points BEGIN
    UPDATE run_counts SET points_done = points_done - 1 WHERE run_id = OLD.run_id;
END;
-- the overnight queue (service/queue.py): a job is a plan snapshot waiting for `serve`, then its run
CREATE TABLE IF NOT EXISTS jobs (
    id INTEGER PRIMARY KEY,
    plan_name TEXT NOT NULL,
    plan_file TEXT,
    plan_text TEXT NOT NULL,
    files_json TEXT NOT NULL,
    points_total INTEGER NOT NULL,
    not_before TEXT NOT NULL,
    not_before_ts REAL NOT NULL,
    submitted_at TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN {sql_in(JobState)}),
    run_id INTEGER REFERENCES runs(id),
    cancel_requested INTEGER NOT NULL DEFAULT 0,
    error TEXT
);
-- the run record: each instrument as the run found and left it (identity, the state it was put in
-- and read back, its calibration-due date), so an auditor can repeat the setup
CREATE TABLE IF NOT EXISTS instruments (
    run_id INTEGER NOT NULL REFERENCES runs(id),
    role TEXT NOT NULL,
    driver TEXT NOT NULL,
    resource TEXT NOT NULL,
    identity TEXT,
    calibration_due TEXT,
    state_json TEXT NOT NULL DEFAULT '{{}}',
    recorded_at TEXT NOT NULL,
    PRIMARY KEY (run_id, role)
) WITHOUT ROWID;
-- each soak at a chamber setpoint: how long it took and what the chamber read meanwhile
CREATE TABLE IF NOT EXISTS soaks (
    id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs(id),
    temperature_c REAL NOT NULL,
    started_at TEXT NOT NULL,
    finished_at TEXT,
    seconds REAL,
    outcome TEXT NOT NULL,
    readings_json TEXT NOT NULL
);
-- the one `serve` of this database and its heartbeat (service/serve.py)
CREATE TABLE IF NOT EXISTS service (
    id INTEGER PRIMARY KEY CHECK (id = 1),
    pid INTEGER NOT NULL,
    host TEXT NOT NULL,
    state TEXT NOT NULL,
    started_at TEXT NOT NULL,
    heartbeat_at TEXT NOT NULL
);
"""

# columns added to tables an older file already has (CREATE TABLE IF NOT EXISTS leaves those as
# they were): (table, column, declaration), added where missing before SCHEMA runs
ADDED_COLUMNS = (
    ("points", "temperature_c", "REAL"),
    ("points", "chamber_c", "REAL"),
    ("points", "dut_c", "REAL"),
    ("points", "repeat", "INTEGER NOT NULL DEFAULT 0"),
    ("points", "direction", "TEXT CHECK (direction IN ('up', 'down'))"),
    ("points", "unit_id", "TEXT"),
    *added_fit_columns(5),
    ("fits", "analysis_id", "INTEGER REFERENCES analyses(id)"),
)

# run on every migration: the counts of a file written before run_counts existed, and an analysis
# (the run's own: a straight line in dB, the settings its rows name) for fits stored before version 5
BACKFILL = """
INSERT OR REPLACE INTO run_counts (run_id, points_done) SELECT run_id, COUNT(*) FROM points GROUP BY run_id;
INSERT INTO analyses (run_id, origin, law, fit_low_dbm, fit_high_dbm, error_limits_json, reference_c, analysed_at)
SELECT run_id, 'run', 'log', MIN(fit_low_dbm), MAX(fit_high_dbm), json_array(MIN(error_limit_db)), NULL,
       MAX(analysed_at)
FROM fits WHERE analysis_id IS NULL GROUP BY run_id;
UPDATE fits SET law = COALESCE(law, 'log'),
       analysis_id = (SELECT MAX(a.id) FROM analyses a WHERE a.run_id = fits.run_id)
WHERE analysis_id IS NULL;
"""

LATEST = "(SELECT MAX(a.id) FROM analyses a WHERE a.run_id = {run})"  # a run's latest analysis

# The stable views: their names and columns are a documented contract (docs/database.md); the
# tables under them may change, so they are dropped and re-created whenever the schema version moves.
# v_fits lists the declared result fields (store/fields.py) in their order, for each run's latest
# analysis; v_fits_all every analysis, with its origin. v_points.error_db is the latest analysis's.
_FIT_COLUMNS = ", ".join(f"f.{c}" for c in VIEW_COLUMNS)
VIEWS = f"""
DROP VIEW IF EXISTS v_points;
CREATE VIEW v_points AS
SELECT p.run_id, r.name AS run_name, r.dut_id, r.state AS run_state, r.started_at AS run_started_at,
       r.finished_at AS run_finished_at, r.source_idn, r.meter_idn,
       p.idx, p.frequency_hz, p.temperature_c, p.power_dbm, p.source_dbm, p.value_v, p.stdev_v,
       p.samples, p.settle_s, p.settle_readings, p.settled, p.overload, p.measured_at,
       p.chamber_c, p.dut_c, e.error_db, p.repeat, p.direction, p.unit_id
FROM points p JOIN runs r ON r.id = p.run_id
LEFT JOIN point_errors e ON e.analysis_id = {LATEST.format(run="p.run_id")} AND e.idx = p.idx;
DROP VIEW IF EXISTS v_fits;
CREATE VIEW v_fits AS
SELECT f.run_id, r.name AS run_name, r.dut_id, r.state AS run_state, r.started_at AS run_started_at,
       r.finished_at AS run_finished_at, {_FIT_COLUMNS}
FROM fits f JOIN runs r ON r.id = f.run_id
WHERE f.analysis_id = {LATEST.format(run="f.run_id")};
DROP VIEW IF EXISTS v_fits_all;
CREATE VIEW v_fits_all AS
SELECT f.run_id, r.name AS run_name, r.dut_id, r.state AS run_state, r.started_at AS run_started_at,
       r.finished_at AS run_finished_at, {_FIT_COLUMNS}, a.origin AS analysis_origin
FROM fits f JOIN runs r ON r.id = f.run_id JOIN analyses a ON a.id = f.analysis_id;
"""
