"""Several units, in process (fast): decision rules, the lot's arithmetic, the plan keys, the unit
axis and the simulated switch.

References: JCGM 106:2012 (simple acceptance 8.2, guarded acceptance 8.3.2), JCGM 100:2008 5.1.2
(uncorrelated inputs combine as a root sum of squares), the defining formulas of Cp and Cpk
(common practice; no published worked example is used), SCPI-1999 ROUTe (CLOSe, CLOSe? with
1/0 per channel, OPEN:ALL) and IEEE 488.2 *IDN?.
"""

from __future__ import annotations

import math
from typing import Any

import pytest
import yaml

from nightbench.analysis.accept import decide, dynamic_range_u, worst
from nightbench.analysis.lot import capability, lot_summary
from nightbench.drivers.errors import InputError, InstrumentError
from nightbench.measure.sweep import expand
from nightbench.plan.load import parse_plan
from nightbench.simulators.physics import BenchConfig, BenchModel
from nightbench.simulators.switch import SimSwitch, unit_detectors
from tests.conftest import OFFLINE, cli, plan_dict

SWITCH = "TCPIP::127.0.0.1::3::SOCKET"


# -- decision rules (JCGM 106:2012) -------------------------------------------------------------
def test_a_value_in_the_guard_band_passes_simple_and_is_indeterminate_guarded():
    # slope 20.95 mV/dB, U = 0.1 mV/dB, limits [19, 21]: inside the tolerance, within U of its top
    assert decide(20.95, 0.1, 19.0, 21.0, "simple") == ("pass", "simple")
    assert decide(20.95, 0.1, 19.0, 21.0, "guarded") == ("indeterminate", "guarded")
    assert decide(19.05, 0.1, 19.0, 21.0, "guarded")[0] == "indeterminate"  # the low side too
    assert decide(20.85, 0.1, 19.0, 21.0, "guarded")[0] == "pass"  # inside [19.1, 20.9]
    for rule in ("simple", "guarded"):
        assert decide(21.05, 0.1, 19.0, 21.0, rule)[0] == "fail"  # outside the tolerance: fail either way
        assert decide(18.0, 0.1, 19.0, 21.0, rule)[0] == "fail"


def test_open_sides_missing_values_and_unknown_u():
    assert decide(1e6, 0.5, 60.0, None, "guarded")[0] == "pass"  # no upper limit
    assert decide(60.3, 0.5, 60.0, None, "guarded")[0] == "indeterminate"
    assert decide(59.0, 0.5, 60.0, None, "guarded")[0] == "fail"
    assert decide(60.3, None, 60.0, None, "guarded") == ("pass", "simple (U unknown)")
    assert decide(None, 0.1, 19.0, 21.0, "simple")[0] == "indeterminate"  # conformity not shown
    with pytest.raises(ValueError, match="decision rule"):
        decide(20.0, 0.1, 19.0, 21.0, "lenient")


def test_a_unit_is_its_worst_quantity():
    assert worst(["pass", "indeterminate", "pass"]) == "indeterminate"
    assert worst(["pass", "fail", "indeterminate"]) == "fail"
    assert worst(["pass", None]) == "pass" and worst([None]) is None


def test_dynamic_range_u_is_the_root_sum_of_squares_of_its_ends():
    assert dynamic_range_u(0.3, 0.4) == pytest.approx(0.5)  # JCGM 100:2008 5.1.2, |c| = 1 for both ends
    assert dynamic_range_u(0.3, None) is None


# -- the lot (Cp, Cpk: the defining formulas, common practice) ---------------------------------------
def _units(name: str, values: list[float]) -> list[dict[str, Any]]:
    return [
        {"id": f"U{i}", "quantities": [{"name": name, "frequency_hz": 1e8, "temperature_c": None, "value": v}]}
        for i, v in enumerate(values)
    ]


def test_cp_and_cpk_against_the_defining_formulas():
    values = [19.8, 20.1, 20.3, 19.9, 20.0, 20.6]
    n = len(values)
    mean = sum(values) / n
    s = math.sqrt(sum((v - mean) ** 2 for v in values) / (n - 1))  # sample standard deviation, n - 1
    (row,) = lot_summary(_units("slope_mv_per_db", values), {"slope_mv_per_db": (19.0, 21.0)})
    assert row["n"] == n and row["mean"] == pytest.approx(mean) and row["std"] == pytest.approx(s)
    assert row["min"] == 19.8 and row["max"] == 20.6
    assert row["cp"] == pytest.approx((21.0 - 19.0) / (6 * s))  # Cp = (USL - LSL) / 6s
    assert row["cpk"] == pytest.approx(min(21.0 - mean, mean - 19.0) / (3 * s))  # off-centre: Cpk < Cp
    assert row["cpk"] < row["cp"]


def test_one_sided_limits_give_no_cp_and_cpk_from_the_one_side():
    values = [62.0, 65.5, 63.0, 64.5]
    mean = sum(values) / len(values)
    s = math.sqrt(sum((v - mean) ** 2 for v in values) / (len(values) - 1))
    (row,) = lot_summary(_units("dynamic_range_db", values), {"dynamic_range_db": (60.0, None)})
    assert row["cp"] is None and row["cpk"] == pytest.approx((mean - 60.0) / (3 * s))
    (upper,) = lot_summary(_units("intercept_dbm", [-90.5, -91.0, -90.0]), {"intercept_dbm": (None, -89.0)})
    assert upper["cp"] is None and upper["cpk"] == pytest.approx((-89.0 - (-90.5)) / (3 * 0.5))
    assert capability([20.0], 19.0, 21.0) == (None, None, None)  # one unit: no spread to judge


# -- plan keys: bad input names file, line and key ---------------------------------------------------
def _plan(**changes: Any) -> dict[str, Any]:
    plan = plan_dict(OFFLINE, sweep={"frequency_hz": [100e6, 200e6], "power_dbm": [-60, -40, -20]})
    plan["instruments"]["switch"] = {"driver": "scpi-switch", "resource": SWITCH}
    plan["units"] = [{"id": "A", "channel": 1}, {"id": "B", "channel": 2, "path": {"loss_db": 8.0}}]
    plan["limits"]["accept"] = {"slope_mv_per_db": [19, 21]}
    plan.update(changes)
    return plan


def _refusal(plan: dict[str, Any]) -> InputError:
    with pytest.raises(InputError) as info:
        parse_plan(yaml.safe_dump(plan, sort_keys=False), "units.yaml")
    return info.value


@pytest.mark.parametrize(
    ("change", "key", "words"),
    [
        (lambda p: p["instruments"].pop("switch"), "units", "switch"),
        (lambda p: p.pop("units"), "instruments", "units"),
        (lambda p: p["units"].append({"id": "C", "channel": 2}), "units.2.channel", "channel 2"),
        (lambda p: p["units"].append({"id": "A", "channel": 3}), "units.2.id", "unique"),
        (lambda p: p["limits"]["accept"].update(slope_mv_per_db=[21, 19]), "limits.accept.slope_mv_per_db", "low"),
        (lambda p: p["limits"]["accept"].update(rule="lenient"), "limits.accept.rule", ""),
        (lambda p: p["units"][0].update(channel=0), "units.0.channel", ""),
        (lambda p: p["units"][1]["path"].update(loss_db=200.0), "units.1.path", "source"),
    ],
)
def test_bad_unit_keys_are_refused_by_file_line_and_key(change, key, words):
    plan = _plan()
    change(plan)
    err = _refusal(plan)
    assert err.file == "units.yaml" and err.line is not None and err.key == key, (err.key, str(err))
    assert words in str(err)


def test_check_refuses_units_without_a_switch_with_exit_2(write_plan):
    plan = _plan()
    plan["instruments"].pop("switch")
    res = cli("check", str(write_plan(plan)))
    assert res.returncode == 2 and "units" in res.stderr and "meter channels" in res.stderr
    assert "Traceback" not in res.stderr


# -- the unit axis: inside temperature, outside frequency; stable indexes; each unit's own path -------
def test_units_are_an_axis_inside_temperature_with_their_own_source_levels():
    plan = _plan(sweep={"temperature_c": [25, 50], "frequency_hz": [100e6, 200e6], "power_dbm": [-60, -40, -20]})
    plan["instruments"]["chamber"] = {"driver": "scpi-chamber", "resource": OFFLINE["meter"], "min_c": -40, "max_c": 85}
    plan["soak"] = {"tolerance_c": 0.5, "stable_s": 2.0, "timeout_s": 20.0, "end_c": 25.0}
    loaded = parse_plan(yaml.safe_dump(plan, sort_keys=False), "units.yaml")
    points = expand(loaded)
    assert [p.index for p in points] == list(range(2 * 2 * 2 * 3))
    order = [(p.temperature_c, p.unit_id) for p in points]
    assert order == [(t, u) for t in (25, 50) for u in ("A", "B") for _ in range(6)]
    assert points[0].frequency_hz == points[2].frequency_hz != points[3].frequency_hz  # frequency inside
    a = {(p.frequency_hz, p.power_dbm): p.source_dbm for p in points if p.unit_id == "A"}
    b = {(p.frequency_hz, p.power_dbm): p.source_dbm for p in points if p.unit_id == "B"}
    assert all(b[k] == pytest.approx(a[k] - 6.28 + 8.0) for k in a)  # B's own 8 dB path, A's the plan's
    assert expand(loaded) == points  # a function of the plan alone: a resume finds the same indexes


# -- the simulated switch, in process -----------------------------------------------------------------
def _switch(units: list[dict[str, Any]], faults: list[dict[str, Any]] | None = None) -> SimSwitch:
    from nightbench.simulators.faults import FaultInjector

    config = BenchConfig.from_dict({"unit": units})
    return SimSwitch(BenchModel(config), faults=FaultInjector(faults or []))


def test_sim_switch_routes_the_meter_to_one_units_detector():
    switch = _switch([{"channel": 1, "intercept_dbm": -80.0}, {"channel": 2, "intercept_dbm": -95.0}])
    model = switch.model
    assert switch.execute("*IDN?").startswith("Nightbench Simulated Instruments,")  # IEEE 488.2 10.14
    assert not model.connected and model.steady_output_v() == 0.0  # every route open: no detector
    switch.execute(":ROUTe:CLOSe (@2)")
    assert switch.execute(":ROUT:CLOS? (@1,2)") == "0,1"  # SCPI-1999: 1 closed, 0 open, per channel
    assert model.config.detector.intercept_dbm == -95.0
    switch.execute("ROUT:CLOS (@1)")  # break before make: one route at a time
    assert switch.execute("ROUT:CLOS? (@1:2)") == "1,0" and model.config.detector.intercept_dbm == -80.0
    switch.execute("ROUTe:OPEN:ALL")
    assert switch.execute("ROUT:CLOS? (@1,2)") == "0,0" and not model.connected
    switch.execute("ROUT:CLOS (@99)")
    assert switch.execute("SYST:ERR?").startswith("-222,")
    assert [e["closed"] for e in switch.history] == [None, 2, 1, None]
    assert all(e["output"] is False for e in switch.history)


def test_sim_switch_stuck_route_reads_open_and_the_driver_names_it(inproc_bench):
    from nightbench.drivers.switch import ScpiSwitch
    from nightbench.drivers.transport import Link

    config = BenchConfig.from_dict(
        {"unit": [{"channel": 3}], "fault": [{"kind": "stuck_route", "instrument": "switch", "channel": 3}]}
    )
    bench = inproc_bench(config, serial=False)
    switch = ScpiSwitch.open(Link(bench.resources()["switch"]))
    try:
        switch.prove()
        with pytest.raises(InstrumentError, match="route 3 reads open"):
            switch.select(3)
        switch.select(3)  # the fault fired once: the relay closes now
        assert switch.closed == 3 and bench.switch.closed == 3
    finally:
        switch.close()


def test_sim_unit_tables_are_checked():
    with pytest.raises(ValueError, match="twice"):
        unit_detectors(BenchConfig.from_dict({"unit": [{"channel": 1}, {"channel": 1}]}))
    with pytest.raises(ValueError, match="wobble"):
        unit_detectors(BenchConfig.from_dict({"unit": [{"channel": 1, "wobble": 2}]}))
