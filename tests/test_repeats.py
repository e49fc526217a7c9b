"""`measure.repeats`: each group's levels swept N times, passes alternately up and down.

The contract checked here is the one docs/run-record.md and measure/sweep.py state: pass 0 up,
pass 1 down, ...; `idx` a function of the plan alone (so a resume finds every point under the
same index); points_total counting the repeats; without repeats, nothing changes. One real run
on the simulated bench (a CLI child interrupted by SIGINT in a down pass, then resumed) checks
the stored order, v_points and the resume.
"""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
import yaml

from nightbench.drivers.errors import InputError
from nightbench.measure.order import visit_order
from nightbench.measure.sweep import expand
from nightbench.plan.load import parse_plan
from tests.conftest import OFFLINE, assert_never_above, cli, plan_dict, wait_until

LEVELS = [-60.0, -50.0, -40.0, -30.0]


def loaded(**overrides: Any):
    plan = plan_dict(OFFLINE, **overrides)
    return parse_plan(yaml.safe_dump(plan, sort_keys=False), "plan.yaml")


def test_passes_alternate_up_and_down_within_each_frequency_with_indices_in_visiting_order():
    pts = expand(
        loaded(
            sweep={"frequency_hz": [100e6, 200e6], "power_dbm": [-40, -60, -30, -50]},  # written out of order
            measure={"samples": 2, "repeats": 3},
        )
    )
    assert [p.index for p in pts] == list(range(2 * 3 * 4)), "idx is the position in the visiting order"
    for k, f in enumerate((100e6, 200e6)):
        group = pts[k * 12 : (k + 1) * 12]
        assert {p.frequency_hz for p in group} == {f}
        # the documented contract: pass 0 up, pass 1 down, pass 2 up again
        assert [p.power_dbm for p in group] == LEVELS + LEVELS[::-1] + LEVELS
        assert [p.repeat for p in group] == [0] * 4 + [1] * 4 + [2] * 4
        assert [p.direction for p in group] == ["up"] * 4 + ["down"] * 4 + ["up"] * 4
    # the source level stays DUT level plus path loss (6.28 dB in plan_dict), whatever the pass
    assert all(p.source_dbm == pytest.approx(p.power_dbm + 6.28, abs=1e-3) for p in pts)


def test_without_repeats_the_points_are_exactly_as_before():
    pts = expand(loaded(sweep={"frequency_hz": [100e6, 200e6], "power_dbm": [-40, -60, -30]}))
    # planned nesting order, written level order, no pass: what every run before repeats stored
    assert [(p.frequency_hz, p.power_dbm) for p in pts] == [
        (f, lv) for f in (100e6, 200e6) for lv in (-40.0, -60.0, -30.0)
    ]
    assert {p.repeat for p in pts} == {0} and {p.direction for p in pts} == {None}


def test_with_the_level_axis_outermost_a_pass_visits_every_frequency_at_each_level():
    pts = expand(
        loaded(
            sweep={"power_dbm": [-60, -50, -40], "frequency_hz": [100e6, 200e6]}, measure={"samples": 2, "repeats": 2}
        )
    )
    freqs = (100e6, 200e6)
    up = [(lv, f, "up") for lv in (-60.0, -50.0, -40.0) for f in freqs]
    down = [(lv, f, "down") for lv in (-40.0, -50.0, -60.0) for f in freqs]
    assert [(p.power_dbm, p.frequency_hz, p.direction) for p in pts] == up + down


def test_fast_edge_does_not_reorder_imposed_passes():
    lp = loaded(
        sweep={"frequency_hz": [100e6], "power_dbm": LEVELS},
        settle={"tolerance_v": 0.0005, "timeout_s": 2, "level_order": "fast-edge"},
        measure={"samples": 2, "repeats": 2},
    )
    pts = expand(lp)
    # taus saying "the fall is much faster": fast-edge alone would sweep downward
    visited = list(visit_order(pts, lp.order, lambda: (1.0, 0.01), fast_edge=True))
    assert visited == pts
    without = expand(loaded(sweep={"frequency_hz": [100e6], "power_dbm": LEVELS}))
    turned = [p.power_dbm for p in visit_order(without, lp.order, lambda: (1.0, 0.01), fast_edge=True)]
    assert turned == sorted(LEVELS, reverse=True), "the same taus do turn a plan without repeats"


@pytest.mark.parametrize("bad", [0, -1, 101, 1.5])
def test_repeats_outside_1_to_100_are_refused_naming_the_key(bad):
    with pytest.raises(InputError) as info:
        loaded(measure={"samples": 2, "repeats": bad})
    assert info.value.key == "measure.repeats" and info.value.line is not None


# -- one real run: interrupted in a down pass, resumed --------------------------------------------


def stored(db: Path) -> list[sqlite3.Row]:
    with sqlite3.connect(db) as conn:
        conn.row_factory = sqlite3.Row
        return conn.execute(
            "SELECT idx, frequency_hz, power_dbm, repeat, direction, measured_at FROM v_points ORDER BY idx"
        ).fetchall()


def count(db: Path) -> int:
    try:
        with sqlite3.connect(db) as conn:
            return conn.execute("SELECT COUNT(*) FROM points").fetchone()[0]
    except sqlite3.Error:
        return 0


def test_a_run_with_repeats_stores_up_then_down_and_resumes_exactly_where_a_down_pass_stopped(bench, write_plan, db):
    plan = plan_dict(
        bench.resources,
        sweep={"frequency_hz": [100e6, 300e6], "power_dbm": LEVELS},
        measure={"samples": 4, "repeats": 2},
    )
    path = write_plan(plan)
    run = subprocess.Popen(
        [sys.executable, "-m", "nightbench", "run", str(path), "--db", str(db)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        # the first frequency's down pass is idx 4..7: stop once it has begun
        wait_until(lambda: count(db) >= 5, "the first point of a down pass", timeout_s=60)
        run.send_signal(signal.SIGINT)
        _, err = run.communicate(timeout=30)
    finally:
        if run.poll() is None:
            run.kill()
            run.wait()
    assert run.returncode == 130, err
    before = {r["idx"] for r in stored(db)}
    k = len(before)
    assert before == set(range(k)), "every point before the stop is stored, in visiting order"
    assert 5 <= k < 8, f"stopped at {k}: the test needs the stop inside the first down pass (idx 4..7)"

    res = cli("resume", "1", "--db", str(db))
    assert res.returncode == 0, res.stderr
    rows = stored(db)
    assert [r["idx"] for r in rows] == list(range(16)), "no point lost, none twice"
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT points_total FROM runs WHERE id=1").fetchone()[0] == 16, "totals count repeats"
        roles = sorted(r[0] for r in conn.execute("SELECT role FROM instruments WHERE run_id=1"))
        starts = conn.execute(
            "SELECT COUNT(*) FROM events WHERE run_id=1 AND kind='instruments' AND message LIKE 'source:%'"
        ).fetchone()[0]
    assert roles == ["meter", "source"] and starts == 2, "each start (the run, the resume) records the instruments"
    new = sorted((r for r in rows if r["idx"] not in before), key=lambda r: r["measured_at"])
    assert new[0]["idx"] == k and new[0]["direction"] == "down", "the resume starts at the first missing point"
    assert [r["idx"] for r in new] == list(range(k, 16)), "and goes on in the plan's order"
    for f, start in ((100e6, 0), (300e6, 8)):
        group = rows[start : start + 8]
        assert {r["frequency_hz"] for r in group} == {f}
        assert [r["power_dbm"] for r in group] == LEVELS + LEVELS[::-1]
        assert [r["direction"] for r in group] == ["up"] * 4 + ["down"] * 4
        assert [r["repeat"] for r in group] == [0] * 4 + [1] * 4
    assert_never_above(bench.log, 0.0)
