"""The simulated bench's physics against outside references (named beside each check)."""

from __future__ import annotations

import math
import statistics
import time

import numpy as np
import pytest
from scipy import constants, integrate, signal

from nightbench.simulators.physics import (
    BenchConfig,
    BenchModel,
    DetectorConfig,
    FirstOrderOutput,
    thermal_noise_dbm_per_hz,
    vrms_to_dbm,
)
from tests.conftest import output_settled, session, wait_until


def test_first_order_step_matches_scipy_signal():
    # Reference library: scipy.signal step response of H(s) = 1 / (tau s + 1).
    tau = 0.03
    t = np.linspace(0, 0.2, 101)
    _, ref = signal.step(signal.lti([1.0], [tau, 1.0]), T=t)
    out = FirstOrderOutput(0.0, 0.0)
    out.retarget(1.0, 0.0, tau_rise=tau, tau_fall=99.0)
    assert np.allclose([out.value(x) for x in t], ref, atol=1e-6)


@pytest.mark.parametrize("fraction", [0.1, 0.01, 1e-3])
def test_settling_to_a_fraction_takes_tau_ln_inverse_fraction(fraction):
    # Textbook first-order settling: within a fraction e of the step after tau * ln(1/e).
    tau, step = 0.006, -1.5
    out = FirstOrderOutput(2.0, 0.0)
    out.retarget(2.0 + step, 0.0, tau_rise=1.0, tau_fall=tau)  # a fall uses tau_fall
    t_e = tau * math.log(1 / fraction)
    assert abs(out.value(t_e) - (2.0 + step)) == pytest.approx(fraction * abs(step), rel=1e-9)


def test_integrating_reading_is_the_exact_mean_across_a_change():
    # Reference: scipy.integrate.quad of the piecewise response.
    out = FirstOrderOutput(0.0, 0.0)
    out.retarget(1.0, 0.01, 0.02, 0.05)
    out.retarget(0.2, 0.04, 0.02, 0.05)
    ref, _ = integrate.quad(out.value, 0.0, 0.1, points=[0.01, 0.04], limit=200)
    assert out.mean(0.0, 0.1) == pytest.approx(ref / 0.1, rel=1e-9)


def test_dbm_and_volts_in_50_ohm():
    # Common practice: 0 dBm = 1 mW = 0.2236 V rms in 50 ohm.
    assert vrms_to_dbm(math.sqrt(1e-3 * 50)) == pytest.approx(0.0, abs=1e-12)
    assert vrms_to_dbm(0.2236) == pytest.approx(0.0, abs=0.001)


def test_thermal_noise_density_from_scipy_constants():
    # kT at 290 K (IEEE standard reference temperature) from scipy.constants.k: -174 dBm/Hz.
    ref = 10 * math.log10(constants.k * 290 / 1e-3)
    assert thermal_noise_dbm_per_hz() == pytest.approx(ref, abs=1e-9)
    assert round(ref) == -174
    d = DetectorConfig(noise_bandwidth_hz=1e6, noise_figure_db=10)
    assert d.floor_dbm == pytest.approx(ref + 60 + 10, abs=1e-9)


def test_floor_and_compression_are_power_sums():
    # Common practice: two equal powers add to +3.01 dB (10 log10 2); at the saturation level the
    # harmonic-sum compression is 3.01 dB.
    d = DetectorConfig(ripple_db=0.0)
    assert d.effective_dbm(d.floor_dbm) == pytest.approx(d.floor_dbm + 10 * math.log10(2), abs=0.01)
    assert d.effective_dbm(-math.inf) == pytest.approx(d.floor_dbm, abs=1e-6)
    assert d.effective_dbm(d.saturation_dbm) == pytest.approx(d.saturation_dbm - 10 * math.log10(2), abs=0.01)
    mid = -40.0  # far from both: the log law itself
    assert d.steady_v(mid, 0) == pytest.approx(d.slope_v_per_db * (mid - d.intercept_dbm), rel=1e-4)


def test_ripple_has_the_stage_gain_period():
    d = DetectorConfig(ripple_db=0.3, ripple_period_db=8.0)
    ideal = DetectorConfig(ripple_db=0.0)
    err = [d.effective_dbm(p) - ideal.effective_dbm(p) for p in np.arange(-60, -20, 0.5)]
    assert max(err) == pytest.approx(0.3, abs=0.01) and min(err) == pytest.approx(-0.3, abs=0.01)
    assert d.effective_dbm(-45) - ideal.effective_dbm(-45) == pytest.approx(
        d.effective_dbm(-37) - ideal.effective_dbm(-37), abs=1e-3
    )


def test_temperature_coefficients():
    warm, cold = BenchConfig(temperature_c=85.0), BenchConfig(temperature_c=-40.0)
    d = warm.detector
    assert d.slope(0, 85.0) / d.slope(0, 25.0) == pytest.approx(1 + d.slope_tc_per_c * 60)
    assert d.intercept(0, -40.0) - d.intercept(0, 25.0) == pytest.approx(-65 * d.intercept_tc_db_per_c)
    assert BenchModel(warm).truth_v(-40, 1e8) != BenchModel(cold).truth_v(-40, 1e8)


def test_noise_grows_toward_the_floor():
    d = DetectorConfig()
    assert d.noise_v(d.floor_dbm - 20, 0.02) > 3 * d.noise_v(-20, 0.02)
    # white noise averaged over a window T falls as 1/sqrt(T)
    assert d.noise_v(-20, 0.002) == pytest.approx(d.noise_v(-20, 0.02) * math.sqrt(10))


def test_nplc_integration_time():
    # NPLC integration time = NPLC / line frequency (DMM practice: 1 PLC = 20 ms at 50 Hz).
    assert BenchModel().integration_s(1) == pytest.approx(0.02)
    sixty = BenchConfig()
    sixty.meter.line_hz = 60
    assert BenchModel(sixty).integration_s(10) == pytest.approx(10 / 60)


def test_a_reading_takes_at_least_its_aperture(inproc_bench):
    bench = inproc_bench()
    meter = session(bench.resources()["meter"])
    meter.apply(["VOLT:DC:NPLC 5"])  # 100 ms at 50 Hz
    t0 = time.monotonic()
    meter.query("READ?")
    assert time.monotonic() - t0 >= 0.1


def test_reading_right_after_a_step_differs_as_the_time_constant_predicts(inproc_bench):
    config = BenchConfig()
    config.detector.tau_rise_s = 0.3
    config.detector.output_noise_v = config.detector.floor_noise_v = 0.0
    config.meter.noise_v = 0.0
    config.source.level_settle_s = 0.0
    bench = inproc_bench(config)
    res = bench.resources()
    src, meter = session(res["source"]), session(res["meter"])
    meter.apply(["VOLT:DC:NPLC 0.05"])  # 1 ms aperture
    src.apply(["FREQ 100MHZ", "POW -80", "OUTP ON"])
    wait_until(lambda: output_settled(bench.model, 1e-7), "the output to settle at the low level")
    model = bench.model
    v0 = model.truth_v(model.dut_dbm(), 100e6)
    t_before = time.monotonic()
    src.apply(["POW -20"])
    t_set = time.monotonic()
    reading = float(meter.query("READ?"))
    t_after = time.monotonic()
    v1 = model.truth_v(model.dut_dbm(), 100e6)
    t_step = model.output.segments[-1].t0  # when the simulator applied the step (same clock)
    assert t_before <= t_step <= t_set

    # The reading began after the setting was confirmed (t_set) and ended by t_after, so the
    # first-order law v1 - (v1 - v0) exp(-dt / tau) brackets it.
    def law(t):
        return v1 - (v1 - v0) * math.exp(-(t - t_step) / 0.3)

    assert law(t_set) - 1e-5 <= reading <= law(t_after) + 1e-5
    assert reading < v1 - 0.5 * (v1 - v0), "a reading right after the step is still far from the final value"
    time.sleep(3.0)  # the law under test: 10 tau later it has arrived (within 5e-5 of the step)
    assert float(meter.query("READ?")) == pytest.approx(v1, abs=abs(v1 - v0) * 5e-5 + 1e-5)


def test_meter_range_overload_and_resolution(inproc_bench):
    # SCPI-1999 vol. 1, 7.2.1 (from memory): an overrange reading is reported as +9.9E37.
    bench = inproc_bench()
    res = bench.resources()
    src, meter = session(res["source"]), session(res["meter"])
    src.apply(["FREQ 100MHZ", "POW -10", "OUTP ON"])  # ~1.6 V out
    wait_until(lambda: output_settled(bench.model, 1e-3), "the output to reach ~1.6 V")
    meter.apply(["VOLT:DC:RANG 0.1"])
    assert float(meter.query("READ?")) == pytest.approx(9.9e37)
    meter.apply(["VOLT:DC:RANG 10"])
    values = [float(meter.query("READ?")) for _ in range(5)]
    step = 10 * bench.config.meter.resolution_ppm * 1e-6
    assert all(abs(v / step - round(v / step)) < 1e-6 for v in values)
    assert statistics.pstdev(values) > 0, "noise is present"


def test_source_level_accuracy_and_own_settling_time():
    config = BenchConfig()
    config.source.level_offset_db, config.source.flatness_db_per_ghz = 0.2, -0.5
    config.source.level_settle_s = 0.001
    model = BenchModel(config, t=0.0)
    model.set_source(0.0, frequency_hz=2e9, level_dbm=-30.0, output_on=True)
    assert model.dut_dbm() == pytest.approx(-30.0 + 0.2 - 1.0 - config.path.loss(2e9))
    before = model.output.value(0.0)
    assert model.output.value(0.0009) == before, "nothing moves before the source has settled"
    assert model.output.value(0.0011) != before


def test_cable_loss_grows_as_root_frequency():
    # Common practice: coaxial cable loss is dominated by skin effect, proportional to sqrt(f).
    path = BenchConfig().path
    cable = [path.loss(f) - path.pad_db for f in (0.25e9, 1e9, 4e9)]
    assert cable[1] / cable[0] == pytest.approx(2.0) and cable[2] / cable[1] == pytest.approx(2.0)
