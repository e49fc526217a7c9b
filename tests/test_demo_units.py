"""`nightbench demo --units` and the packaged plans: every plan shipped with the package passes
`check`, the pilot-lot demo's simulator config builds the lot it was designed as, and the demo runs
on its own (one child process, about 6 s) and prints the verdicts that design implies.

References: JCGM 106:2012 8.3.2 (guarded acceptance: pass inside the limits shrunk by U, fail
outside the limits, indeterminate between); JCGM 100:2008 4.3.7 (a rectangular half-width a has
u = a / sqrt(3)) for the least U of an intercept; the simulator's own path model
(simulators/physics.py PathConfig, the bench the demo runs on) for the plan's path table.
"""

from __future__ import annotations

import math
import tomllib
from importlib import resources
from pathlib import Path
from typing import Any

import pytest
import yaml
from click.testing import CliRunner

from nightbench.analysis.report import build_report
from nightbench.cli import main
from nightbench.simulators.physics import BenchConfig, PathConfig
from nightbench.simulators.switch import unit_detectors
from nightbench.store.db import Store
from tests.conftest import cli

PLANS = resources.files("nightbench.plans")
PACKAGED = sorted(p.name for p in PLANS.iterdir() if p.name.endswith(".yaml"))
# designed in plans/demo-units-sim.toml: one board fails on intercept, one sits in the guard band
EXPECTED = {f"P1-0{i}": "pass" for i in range(1, 9)} | {"P1-07": "fail", "P1-08": "indeterminate"}


def _demo_plan() -> dict[str, Any]:
    return yaml.safe_load((PLANS / "demo-units.yaml").read_text(encoding="utf-8"))


def test_the_new_plans_are_packaged():
    # the listing below comes from the installed package, so a plan missing from package data fails here
    assert {"demo-units.yaml", "template-units.yaml", "template-calibration.yaml"} <= set(PACKAGED)
    assert (PLANS / "demo-units-sim.toml").is_file()  # the demo's simulator config ships beside it


@pytest.mark.parametrize("name", PACKAGED)
def test_every_packaged_plan_passes_check(name: str):
    # the real `check` command, in process (one child per plan would cost ~1 s of CPU each); check
    # touches no instrument, so the demo plans' loopback resources and the templates' invented ones
    # need nothing running
    with resources.as_file(PLANS / name) as path:
        res = CliRunner().invoke(main, ["check", str(path)])
    assert res.exit_code == 0, res.output
    assert "valid plan" in res.output


def test_demo_units_sim_config_builds_the_designed_lot():
    config = BenchConfig.from_dict(tomllib.loads((PLANS / "demo-units-sim.toml").read_text(encoding="utf-8")))
    detectors = unit_detectors(config)
    plan = _demo_plan()
    routes = {u["id"]: u["channel"] for u in plan["units"]}
    assert sorted(routes.values()) == sorted(detectors) == list(range(1, 9))  # every board has its own detector
    accept = plan["limits"]["accept"]
    low, high = accept["intercept_dbm"]
    slope_low, slope_high = accept["slope_mv_per_db"]
    # the least U of an intercept: the source level accuracy alone, rectangular (JCGM 100:2008
    # 4.3.7), k = 2: a value within this of a limit can never pass under the guarded rule
    u_min = 2 * plan["analysis"]["source_level_accuracy_db"] / math.sqrt(3)
    for f in map(float, plan["sweep"]["frequency_hz"]):  # PyYAML (YAML 1.1) reads 100e6 as text
        for uid, channel in routes.items():
            d = detectors[channel]
            intercept, slope_mv = d.intercept(f), d.slope(f) * 1000
            if EXPECTED[uid] == "fail":
                assert intercept > high + 1.0, uid  # well outside: noise cannot bring it back
            elif EXPECTED[uid] == "indeterminate":
                assert high - u_min + 0.1 < intercept < high - 0.1, uid  # inside the guard band, off its edges
            else:
                assert low + 2 * u_min < intercept < high - 2 * u_min, uid  # clear of both guard bands
            assert slope_low + 0.3 < slope_mv < slope_high - 0.3, uid
        # the plan's path table is the simulated bench's path (6 dB pad and a cable), to 0.01 dB
        table = dict((float(a), float(b)) for a, b in plan["path"]["table"])
        assert table[f] == pytest.approx(PathConfig().loss(f), abs=0.01)


def test_demo_units_runs_on_its_own(tmp_path: Path):
    db = tmp_path / "demo.db"
    res = cli("demo", "--units", "--db", str(db), timeout=90)
    assert res.returncode == 0, res.stderr
    assert "switch TCPIP::127.0.0.1::" in res.stderr
    lines = res.stdout.splitlines()
    # the results table says which board each row is (one group per board and frequency)
    head = next(i for i, line in enumerate(lines) if line.split()[:3] == ["unit", "freq", "MHz"])
    table = [line.split() for line in lines[head + 1 : head + 1 + 24]]
    assert {r[0] for r in table} == set(EXPECTED) and len({(r[0], r[1]) for r in table}) == 24
    start = next(i for i, line in enumerate(lines) if line.startswith("units, worst first"))
    rows = [line.split() for line in lines[start + 2 : start + 10]]
    assert {r[0]: r[1] for r in rows} == EXPECTED
    assert [r[0] for r in rows[:2]] == ["P1-07", "P1-08"]  # worst first: fail, then indeterminate
    assert "guarded" in lines[start]
    assert any(line.startswith("lot (Cp") for line in lines[start:])
    store = Store(db, create=False)
    report = build_report(store, 1).to_json()
    store.close()
    assert {u["id"]: u["verdict"] for u in report["units"]} == EXPECTED
    assert len(report["groups"]) == 8 * 3  # each board at each of the three frequencies
    assert report["acceptance"]["rule"] == "guarded"


def test_demo_refuses_temperature_with_units(tmp_path: Path):
    db = tmp_path / "demo.db"
    res = cli("demo", "--temperature", "--units", "--db", str(db), timeout=30)
    assert res.returncode == 2
    assert "--temperature and --units" in res.stderr
    assert "Traceback" not in res.stderr
    assert not db.exists()  # refused before the store (or the simulator) was touched
