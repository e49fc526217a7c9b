"""Plan format v1: loading, validation messages, expansion (docs/design.md, "Plans")."""

from __future__ import annotations

from pathlib import Path

import pytest

from nightbench.drivers.errors import InputError
from nightbench.measure.sweep import expand
from nightbench.plan.load import load_plan, parse_plan
from tests.conftest import OFFLINE, cli, plan_dict

REPO = Path(__file__).resolve().parent.parent


def test_demo_plan_is_valid():
    loaded = load_plan(REPO / "plans" / "demo.yaml")
    assert loaded.plan.name == "demo-rssi-b7"
    assert len(expand(loaded)) == 3 * 101


def test_every_documented_key_is_accepted(write_plan):
    text = """
name: rx-rssi-70mhz
description: free text
dut: {id: RXB-0042, notes: "..."}
instruments:
  source:
    driver: scpi-source
    resource: "TCPIP::127.0.0.1::5025::SOCKET"
    timeout_s: 2
  meter:
    driver: scpi-dmm
    resource: "ASRL/dev/ttyUSB0::INSTR"
    nplc: 0.1
path:
  loss_db: 6.5
limits:
  dut_max_dbm: 10
sweep:
  frequency_hz: [50e6, 70e6, 90e6]
  power_dbm: {start: -95, stop: 5, step: 1}
settle:
  tolerance_v: 0.0005
  timeout_s: 5
measure:
  samples: 4
analysis:
  fit_dbm: [-70, -10]
  error_limit_db: 1.0
"""
    loaded = load_plan(write_plan(text))
    # PyYAML alone reads 70e6 as a string (YAML 1.1); the plan loader must read a number.
    assert loaded.plan.sweep.axis_values("frequency_hz") == [50e6, 70e6, 90e6]
    assert loaded.path.loss(70e6) == 6.5


def test_numbers_in_exponent_form_everywhere(write_plan):
    plan = plan_dict(OFFLINE)
    text = write_plan(plan).read_text().replace("loss_db: 6.28", "table: [[50e6, 6], [1.5e+8, 7]]")
    text = text.replace("tolerance_v: 0.0005", "tolerance_v: 5e-4")
    loaded = parse_plan(text, "p.yaml")
    assert loaded.path.loss(100e6) == pytest.approx(6.5)
    assert loaded.plan.settle.tolerance_v == 5e-4


def test_type_b_accuracies_default_to_not_stated_and_accept_exponents():
    plan = plan_dict(OFFLINE)
    assert parse_plan(_yaml(plan), "p.yaml").plan.analysis.meter_offset_accuracy_v == 0.0
    text = _yaml(plan).replace("error_limit_db: 1.0", "error_limit_db: 1.0\n  meter_offset_accuracy_v: 5e-5")
    assert parse_plan(text, "p.yaml").plan.analysis.meter_offset_accuracy_v == 5e-5


def test_endpoints_inclusive_and_outer_axis_first():
    loaded = parse_plan(
        _yaml(
            plan_dict(
                OFFLINE,
                sweep={
                    "power_dbm": {"start": -10, "stop": -20, "step": -5},
                    "frequency_hz": {"start": 1e6, "stop": 3e6, "points": 3},
                },
                analysis={"fit_dbm": [-20, -10]},
            )
        ),
        "p.yaml",
    )
    assert loaded.order == ("power_dbm", "frequency_hz")
    points = expand(loaded)
    assert [(p.power_dbm, p.frequency_hz) for p in points[:4]] == [(-10, 1e6), (-10, 2e6), (-10, 3e6), (-15, 1e6)]
    assert points[-1].power_dbm == -20 and len(points) == 9
    assert points[0].source_dbm == pytest.approx(-10 + 6.28)


def test_unknown_key_names_file_line_and_key(write_plan):
    plan = plan_dict(OFFLINE)
    text = _yaml(plan).replace("samples: 4", "sampels: 4")
    path = write_plan(text)
    with pytest.raises(InputError) as info:
        load_plan(path)
    err = info.value
    assert err.key == "measure.sampels"
    assert err.line == text.splitlines().index("  sampels: 4") + 1
    assert str(path) in str(err)


def test_sweep_order_is_refused_like_any_unknown_key():
    # The nesting order is the order of the axes in the file. An `order` key used to be accepted
    # and silently ignored: a plan that asked for levels outermost would have run frequencies outermost.
    text = _yaml(plan_dict(OFFLINE)).replace("sweep:\n", "sweep:\n  order: [power_dbm, frequency_hz]\n")
    with pytest.raises(InputError) as info:
        parse_plan(text, "p.yaml")
    assert info.value.key == "sweep.order"
    assert info.value.line == text.splitlines().index("  order: [power_dbm, frequency_hz]") + 1
    assert "unknown key" in info.value.message


@pytest.mark.parametrize(
    "fit, words",
    [
        ([0, 10], "lies wholly outside the sweep's levels (-70 to -10 dBm)"),  # above every level
        ([-95, -75], "lies wholly outside the sweep's levels (-70 to -10 dBm)"),  # below every level
        ([-42, -33], "holds 2 of the sweep's levels (-40, -35 dBm); a line fit with uncertainties needs at least 3"),
        ([-10, 0], "holds 1 of the sweep's levels (-10 dBm)"),  # touches the top level only
    ],
)
def test_a_fit_range_the_sweep_does_not_fill_is_refused(fit, words):
    # levels -70 .. -10 dBm in 5 dB steps (plan_dict); the report's line fit needs 3 levels in range
    text = _yaml(plan_dict(OFFLINE, analysis={"fit_dbm": fit, "error_limit_db": 1.0}))
    with pytest.raises(InputError) as info:
        parse_plan(text, "p.yaml")
    assert info.value.key == "analysis.fit_dbm"
    assert info.value.line == text.splitlines().index("  fit_dbm:") + 1
    assert words in info.value.message


def test_a_fit_range_with_three_levels_endpoints_included_is_accepted():
    loaded = parse_plan(_yaml(plan_dict(OFFLINE, analysis={"fit_dbm": [-20, -10]})), "p.yaml")
    assert loaded.plan.analysis.fit_dbm == (-20, -10)


@pytest.mark.parametrize(
    "edit, key",
    [
        (lambda p: p["limits"].update(dut_max_dbm=-30), "sweep.power_dbm"),
        (lambda p: p["sweep"].update(power_dbm={"start": -70, "stop": -10, "step": 7}), "sweep.power_dbm"),
        (lambda p: p["settle"].update(timeout_s=-1), "settle.timeout_s"),
        (lambda p: p["instruments"]["source"].update(resource="127.0.0.1:5025"), "instruments.source.resource"),
        (lambda p: p["instruments"]["meter"].update(driver="volt-o-matic"), "instruments.meter.driver"),
        (lambda p: p["analysis"].update(fit_dbm=[-10, -60]), "analysis.fit_dbm"),
        (lambda p: p["analysis"].update(source_level_accuracy_db=-0.5), "analysis.source_level_accuracy_db"),
    ],
)
def test_bad_values_are_refused_with_their_key(edit, key):
    plan = plan_dict(OFFLINE)
    edit(plan)
    with pytest.raises(InputError) as info:
        parse_plan(_yaml(plan), "p.yaml")
    assert info.value.key == key


def test_nan_is_refused():
    text = _yaml(plan_dict(OFFLINE)).replace("tolerance_v: 0.0005", "tolerance_v: .nan")
    with pytest.raises(InputError) as info:
        parse_plan(text, "p.yaml")
    assert info.value.key == "settle.tolerance_v"


def test_yaml_objects_are_never_constructed():
    text = "!!python/object/apply:os.system ['echo pwned']\n"
    with pytest.raises(InputError):
        parse_plan(text, "p.yaml")


def test_check_cli_exit_codes(write_plan, db):
    good = write_plan(plan_dict(OFFLINE), "good.yaml")
    ok = cli("check", str(good))
    assert ok.returncode == 0, ok.stderr
    bad = write_plan(_yaml(plan_dict(OFFLINE)).replace("name:", "nmae:"), "bad.yaml")
    res = cli("check", str(bad))
    assert res.returncode == 2
    assert "bad.yaml, line 1" in res.stderr and "nmae" in res.stderr
    assert "Traceback" not in res.stderr
    res = cli("run", str(bad), "--db", str(db))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert not db.exists(), "bad input must not create a database"


def test_unreachable_instrument_is_a_clear_failure(write_plan, db):
    res = cli("run", str(write_plan(plan_dict(OFFLINE))), "--db", str(db), timeout=60)
    assert res.returncode == 1
    assert "Traceback" not in res.stderr
    assert "TCPIP::127.0.0.1::1::SOCKET" in res.stderr and "refused" in res.stderr


def _yaml(plan):
    import yaml

    return yaml.safe_dump(plan, sort_keys=False)


@pytest.mark.parametrize("name", sorted(p.name for p in (REPO / "plans").glob("*.yaml")))
def test_every_shipped_plan_passes_check(name):
    res = cli("check", str(REPO / "plans" / name))
    assert res.returncode == 0, res.stderr
