"""Path correction to the DUT plane: constant, table, Touchstone files, coupler taps, chains.

Outside references: the open Touchstone 1.1 / 2.0 specifications, read through scikit-rf (a
reference library, test-only); numpy.interp and scipy.interpolate for the interpolation; the
published directional-coupler mainline-loss formula; and the simulator's own path law, seen
through its instrument log, for the acceptance run.
"""

from __future__ import annotations

import cmath
import math
import sqlite3
import warnings
from pathlib import Path

import numpy as np
import pytest
import yaml
from scipy.interpolate import interp1d

from nightbench.drivers.errors import InputError
from nightbench.measure.sweep import expand
from nightbench.plan.load import load_plan, parse_plan
from nightbench.plan.path import mainline_loss_db
from nightbench.plan.touchstone import parse_touchstone
from nightbench.runs import new_run, snapshot_plan
from nightbench.simulators.physics import BenchConfig
from nightbench.store.db import Store
from tests.conftest import DATA, OFFLINE, cli, plan_dict

TOUCHSTONE_FILES = sorted(DATA.glob("ts*.s2p"))


def _skrf(path: Path):
    import skrf

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return skrf.Network(str(path))


def _matrix(data) -> np.ndarray:
    """Our (S11, S21, S12, S22) tuples as scikit-rf's [n, 2, 2] array (s[:, 1, 0] is S21)."""
    return np.array([[[s11, s12], [s21, s22]] for s11, s21, s12, s22 in data.s])


def _line_of(text: str, fragment: str) -> int:
    return next(i for i, line in enumerate(text.splitlines(), start=1) if fragment in line)


# -- Touchstone parsing against scikit-rf -----------------------------------------------------


def test_the_reference_files_cover_both_versions_all_formats_and_units():
    seen = [parse_touchstone(p.read_text(), str(p)) for p in TOUCHSTONE_FILES]
    assert {d.version for d in seen} == {"1.1", "2.0"}
    assert {d.data_format for d in seen} == {"ri", "ma", "db"}
    assert {d.frequency_unit for d in seen} == {"hz", "khz", "mhz", "ghz"}


@pytest.mark.parametrize("path", TOUCHSTONE_FILES, ids=lambda p: p.name)
def test_touchstone_matches_scikit_rf(path):
    # Reference library: scikit-rf reads the same file (Touchstone 1.1 / 2.0 specifications).
    ours = parse_touchstone(path.read_text(), str(path))
    ref = _skrf(path)
    np.testing.assert_allclose(ours.frequency_hz, ref.f, rtol=1e-12)
    np.testing.assert_allclose(_matrix(ours), ref.s, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(ours.loss_db(), -ref.s_db[:, 1, 0], atol=1e-9)
    assert ours.reference_ohm == tuple(ref.z0[0].real)


def test_option_line_fields_may_come_in_any_order():
    # Touchstone 1.1: the option line's fields are order-free and each is optional. scikit-rf
    # reads them by position, so it parses the canonical line and we parse a reordered copy.
    path = DATA / "ts11-cable-ri-hz.s2p"
    text = path.read_text().replace("# HZ S RI R 50", "# r 50 ri hz")
    ours = parse_touchstone(text, "reordered.s2p")
    np.testing.assert_allclose(_matrix(ours), _skrf(path).s, rtol=1e-9)


def test_two_port_data_order_is_honoured():
    # Touchstone 2.0: [Two-Port Data Order] 12_21 lists N12 before N21; the file is slightly
    # non-reciprocal on purpose, so swapping the order must change which value is S21.
    path = DATA / "ts20-cable-ri-ghz.s2p"
    text = path.read_text()
    as_written = parse_touchstone(text, "a.s2p")
    swapped = parse_touchstone(text.replace("12_21", "21_12", 1), "b.s2p")
    assert [s[1] for s in swapped.s] == [s[2] for s in as_written.s]
    assert as_written.s[-1][1] != as_written.s[-1][2]


V2_HEAD = "[Version] 2.0\n# MHz S DB R 50\n[Number of Ports] 2\n[Two-Port Data Order] 21_12\n"


@pytest.mark.parametrize(
    "text, line, fragment",
    [
        ("# MHz S DB R 50\n100 -30 0 -1 0 -1 0 -30 0\n200 -30 0 -1 O -1 0 -30 0\n", 3, "'O' is not a number"),
        ("# MHz Y RI R 50\n100 0 0 1 0 1 0 0 0\n", 1, "S parameters"),
        ("# MHz S DB Q 50\n100 -30 0 -1 0 -1 0 -30 0\n", 1, "unknown option 'q'"),
        ("100 -30 0 -1 0 -1 0 -30 0\n# MHz S DB R 50\n", 1, "before the option line"),
        ("# MHz S DB\n100 -30 0 -1 0 -1 0 -30 0\n90 -30 0 -1 0 -1 0 -30 0\n", 3, "increase"),
        ("# MHz S DB\n100 -30 0 -1 0 -1 0 -30 0\n200 -30 0 -1 0\n", 3, "part-way"),
        ("# MHz S MA\n100 0.1 0 0 0 0 0 0.1 0\n", 2, "|S21| is zero"),
        (V2_HEAD + "[Number of Frequencies] 2\n[Network Data]\n100 -30 0 -1 0 -1 0 -30 0\n", 5, "says 2"),
        (V2_HEAD.replace("Ports] 2", "Ports] 3") + "[Number of Frequencies] 1\n[Network Data]\n", 3, "two-port"),
        (V2_HEAD + "[Network Data]\n100 -30 0 -1 0 -1 0 -30 0\n", None, "[Number Of Frequencies]"),
        (V2_HEAD + "[Number of Frequencies] 1\n[Shoe Size] 9\n", 6, "unknown keyword"),
        (V2_HEAD.replace("2.0", "3.7") + "[Number of Frequencies] 1\n", 1, "version '3.7'"),
    ],
)
def test_bad_touchstone_names_file_and_line(text, line, fragment):
    with pytest.raises(InputError) as info:
        parse_touchstone(text, "cal/bad.s2p").loss_db()
    assert info.value.file == "cal/bad.s2p"
    assert info.value.line == line
    assert fragment in info.value.message


def test_a_file_named_for_another_port_count_is_refused():
    with pytest.raises(InputError, match="two-port"):
        parse_touchstone("# MHz S DB\n100 -1 0 -1 0 -1 0 -1 0 -1 0 -1 0 -1 0 -1 0 -1 0\n", "splitter.s3p")


# -- tables: sorting, duplicates, interpolation, extrapolation ----------------------------


def _plan_text(path: dict, freqs: list[float], **kw) -> str:
    return yaml.safe_dump(
        plan_dict(OFFLINE, path=path, sweep={"frequency_hz": freqs, "power_dbm": [-40, -30, -20]}, **kw),
        sort_keys=False,
    )


def test_table_is_sorted_and_interpolated_linearly_in_db():
    rows = [[900e6, 6.72], [100e6, 6.08], [500e6, 6.4], [100e6, 6.08], [2e9, 7.9]]
    freqs = [100e6, 300e6, 700e6, 1.234e9, 2e9]
    loaded = parse_plan(_plan_text({"table": rows}, freqs), "p.yaml")
    ref_f, ref_l = zip(*sorted({tuple(r) for r in rows}))
    # Reference library: numpy.interp, linear interpolation between the sorted rows.
    np.testing.assert_allclose([loaded.path.loss(f) for f in freqs], np.interp(freqs, ref_f, ref_l), rtol=1e-12)


def test_table_duplicate_with_another_loss_is_refused_at_its_row():
    text = _plan_text({"table": [[100e6, 6.0], [500e6, 6.4], [100e6, 6.1]]}, [100e6])
    with pytest.raises(InputError) as info:
        parse_plan(text, "p.yaml")
    assert info.value.key == "path.table.2"
    assert info.value.line == _line_of(text, "- 100000000.0") + 4  # the third row's first line
    assert "twice" in info.value.message


def test_frequency_beyond_the_table_is_refused_unless_extrapolation_is_asked_for():
    table = [[100e6, 6.0], [500e6, 6.4], [900e6, 7.0]]
    text = _plan_text({"table": table}, [100e6, 1.2e9])
    with pytest.raises(InputError) as info:
        parse_plan(text, "p.yaml")
    assert info.value.key == "path.table" and info.value.line == _line_of(text, "table:")
    assert "1.2e+09 Hz lies outside" in info.value.message and "extrapolate" in info.value.message

    f = [50e6, 1.2e9]
    held = parse_plan(_plan_text({"table": table, "extrapolate": "hold"}, f), "p.yaml")
    linear = parse_plan(_plan_text({"table": table, "extrapolate": "linear"}, f), "p.yaml")
    tf, tl = zip(*table)
    # Reference library: scipy interp1d, end values held / end segments extended.
    hold_ref = interp1d(tf, tl, bounds_error=False, fill_value=(tl[0], tl[-1]))
    linear_ref = interp1d(tf, tl, fill_value="extrapolate")
    np.testing.assert_allclose([held.path.loss(x) for x in f], hold_ref(f), rtol=1e-12)
    np.testing.assert_allclose([linear.path.loss(x) for x in f], linear_ref(f), rtol=1e-12)


@pytest.mark.parametrize(
    "path, key, fragment",
    [
        ({"loss_db": 6, "table": [[1e8, 6]]}, "path", "exactly one of"),
        ({"loss_db": 6, "extrapolate": "linear"}, "path", "extrapolate applies"),
        ({"table": [[1e8, 6]], "extrapolate": "sometimes"}, "path.extrapolate", "none"),
        ({"elements": [{"loss_db": 3}, {"los_db": 2}]}, "path.elements.1.los_db", "unknown key"),
        ({"elements": [{"coupler": {"coupling_db": 20, "arm": "side"}}]}, "path.elements.0.coupler.arm", "mainline"),
        ({"coupler": {"coupling_db": 0, "arm": "coupled"}}, "path.coupler.coupling_db", "greater than 0"),
        ({"elements": []}, "path.elements", "at least 1"),
    ],
)
def test_bad_path_keys_are_refused_with_their_key(path, key, fragment):
    with pytest.raises(InputError) as info:
        parse_plan(_plan_text(path, [100e6]), "p.yaml")
    assert info.value.key == key
    assert fragment in info.value.message


# -- couplers and chains ----------------------------------------------------------------------


def test_coupler_mainline_loss_matches_the_published_formula():
    # Published formula (ideal lossless coupler): mainline loss = 10 log10(1 / (1 - 10^(-C/10))),
    # C = 10 dB gives 0.458 dB and C = 20 dB 0.0436 dB (values as quoted in issue 9).
    assert mainline_loss_db(10) == pytest.approx(0.458, abs=5e-4)
    assert mainline_loss_db(20) == pytest.approx(0.0436, abs=5e-5)


def test_a_20_db_coupler_taps_one_percent():
    # Common practice (trade fact, docs/design.md): a 20 dB coupler taps 1 % of the power; the
    # mainline keeps the rest, so the two arms' powers add up to the input power.
    def loss(arm: str) -> float:
        text = _plan_text({"coupler": {"coupling_db": 20, "arm": arm}}, [100e6])
        return parse_plan(text, "p.yaml").path.loss(100e6)

    coupled, mainline = 10 ** (-loss("coupled") / 10), 10 ** (-loss("mainline") / 10)
    assert coupled == pytest.approx(0.01, rel=1e-12)
    assert coupled + mainline == pytest.approx(1.0, rel=1e-12)


def test_chain_losses_add(write_plan, tmp_path):
    cal = tmp_path / "cal"
    cal.mkdir()
    (cal / "jumper.s2p").write_text((DATA / "ts11-cable-ri-hz.s2p").read_text())
    elements = [
        {"name": "jumper", "touchstone": "cal/jumper.s2p"},
        {"name": "pad", "loss_db": 10},
        {"name": "tap", "coupler": {"coupling_db": 10, "arm": "coupled", "excess_loss_db": 0.3}},
        {"name": "adapter", "table": [[1e7, 0.05], [3e9, 0.25]]},
    ]
    freqs = [100e6, 777e6]
    loaded = load_plan(write_plan(_plan_text({"elements": elements}, freqs)))
    ref = _skrf(DATA / "ts11-cable-ri-hz.s2p")
    for f in freqs:
        # scikit-rf's |S21| in dB, interpolated linearly in dB (numpy.interp), plus the others
        jumper = -np.interp(f, ref.f, ref.s_db[:, 1, 0])
        expected = jumper + 10 + (10 + 0.3) + np.interp(f, [1e7, 3e9], [0.05, 0.25])
        assert loaded.path.loss(f) == pytest.approx(expected, abs=1e-9)
    for point in expand(loaded):
        wanted = point.power_dbm + loaded.path.loss(point.frequency_hz)  # rounded down to 0.001 dB
        assert wanted - 0.001 < point.source_dbm <= wanted + 1e-9


def test_missing_touchstone_file_names_plan_line_and_key(write_plan):
    text = _plan_text({"elements": [{"loss_db": 1}, {"touchstone": "cal/nowhere.s2p"}]}, [100e6])
    path = write_plan(text)
    with pytest.raises(InputError) as info:
        load_plan(path)
    assert info.value.file == str(path) and info.value.key == "path.elements.1.touchstone"
    assert info.value.line == _line_of(text, "cal/nowhere.s2p")
    assert "no such file" in info.value.message


def test_bad_touchstone_in_a_plan_is_exit_2_naming_file_line_and_plan_key(write_plan, tmp_path, db):
    (tmp_path / "cable.s2p").write_text("! cable\n# MHz S DB\n100 -30 0 -1 0 -1 0 -30 0\n200 -30 0 -1\n")
    plan = write_plan(plan_dict(OFFLINE, path={"elements": [{"loss_db": 1}, {"touchstone": "cable.s2p"}]}))
    res = cli("run", str(plan), "--db", str(db))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert f"{tmp_path / 'cable.s2p'}, line 4, key 'path.elements.1.touchstone'" in res.stderr
    assert not db.exists(), "bad input must not create a database"


# -- check --------------------------------------------------------------------------------------


def test_check_shows_loss_and_source_range_per_frequency_and_refuses_beyond_the_source(write_plan, tmp_path):
    (tmp_path / "cable.s2p").write_text((DATA / "ts20-pad-db-mhz-lower.s2p").read_text())
    plan = plan_dict(
        OFFLINE,
        path={"elements": [{"name": "pad", "touchstone": "cable.s2p"}, {"loss_db": 3}]},
        sweep={"frequency_hz": [100e6, 1e9], "power_dbm": [-60, -40, -20, -10]},
    )
    res = cli("check", str(write_plan(plan)))
    assert res.returncode == 0, res.stderr
    ref = _skrf(DATA / "ts20-pad-db-mhz-lower.s2p")
    for f in (100e6, 1e9):
        loss = -ref.s_db[list(ref.f).index(f), 1, 0] + 3
        row = next(line for line in res.stdout.splitlines() if f"{f / 1e6:.3f} MHz" in line)
        assert f"path loss {loss:7.3f} dB" in row
        assert f"source {-60 + loss:7.2f} .. {-10 + loss:7.2f} dBm" in row

    plan["instruments"]["source"]["max_dbm"] = 0.0
    res = cli("check", str(write_plan(plan, "hot.yaml")))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert "key 'sweep.power_dbm'" in res.stderr and "outside its limits" in res.stderr


# -- snapshot -----------------------------------------------------------------------------------


def test_snapshot_keeps_the_file_content_and_resume_uses_it(bench, write_plan, tmp_path, db):
    original = (DATA / "ts11-amp-db-mhz-noise.s2p").read_text()
    cal = tmp_path / "cal"
    cal.mkdir()
    (cal / "path.s2p").write_text(original)
    plan = plan_dict(
        bench.resources,
        path={"touchstone": "cal/path.s2p"},
        limits={"dut_max_dbm": -20},
        sweep={"frequency_hz": [100e6, 1e9], "power_dbm": [-50, -40, -30]},
    )
    loaded = load_plan(write_plan(plan))
    store = Store(db)
    run_id = new_run(store, loaded)  # recorded (queued), not yet run
    assert store.run_files(run_id) == {"cal/path.s2p": original}
    expected = {p.index: p.source_dbm for p in expand(loaded)}
    store.close()

    # the file is edited on disk after the run was recorded: the run must not notice
    (cal / "path.s2p").write_text(original.replace("# MHz S DB R 50", "# GHz S DB R 50"))
    res = cli("resume", str(run_id), "--db", str(db))
    assert res.returncode == 0, res.stderr
    conn = sqlite3.connect(db)
    stored = dict(conn.execute("SELECT idx, source_dbm FROM points WHERE run_id=?", (run_id,)).fetchall())
    assert stored == pytest.approx(expected, abs=1e-9)
    (cal / "path.s2p").unlink()
    again = snapshot_plan(Store(db), run_id)
    assert again.files == {"cal/path.s2p": original}
    assert again.path.loss(1e9) == pytest.approx(loaded.path.loss(1e9), abs=1e-12)


# -- acceptance: the simulated bench, path given only as a Touchstone file ---------------------


def test_run_with_touchstone_path_reproduces_the_simulators_dut_levels(bench, write_plan, tmp_path, db):
    law = BenchConfig().path  # the simulator's path, whatever its law in frequency
    grid = np.arange(1e6, 3e9 + 1, 1e6)
    lines = ["! generated by the test from the simulator's path law", "# MHz S MA R 50"]
    for f in grid:
        s21 = cmath.rect(10 ** (-law.loss(f) / 20), -2 * math.pi * f * 3e-9)
        lines.append(
            f"{f / 1e6:g} 0.02 0 {abs(s21):.12f} {math.degrees(cmath.phase(s21)):.6f} "
            f"{abs(s21):.12f} {math.degrees(cmath.phase(s21)):.6f} 0.02 0"
        )
    (tmp_path / "bench-path.s2p").write_text("\n".join(lines) + "\n")
    freqs = [100e6, 433.92e6, 915.5e6, 2.4537e9]  # off the file's grid on purpose
    plan = plan_dict(
        bench.resources,
        path={"touchstone": "bench-path.s2p"},
        sweep={"frequency_hz": freqs, "power_dbm": {"start": -60, "stop": -10, "step": 10}},
    )
    res = cli("run", str(write_plan(plan)), "--db", str(db))
    assert res.returncode == 0, res.stderr

    seen: dict[tuple[float, float], float] = {}
    for e in bench.events():
        if e["output"] and e["dut_dbm"] is not None:
            seen[(e["frequency_hz"], round(e["level_dbm"], 3))] = e["dut_dbm"]
    conn = sqlite3.connect(db)
    points = conn.execute("SELECT frequency_hz, power_dbm, source_dbm FROM points ORDER BY idx").fetchall()
    assert len(points) == len(freqs) * 6
    for f, power, source in points:
        # the DUT-plane level the simulator actually produced for this setting, from its log
        assert abs(seen[(f, round(source, 3))] - power) <= 0.02, (f, power, source)
