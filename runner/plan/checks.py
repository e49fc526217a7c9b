"""Checks across sections of a plan: what no single key can be wrong about alone.

They run before anything is written or contacted, so a plan that cannot give a useful night (too
many points, a level above the DUT ceiling, a source setting beyond its limits, a fit range the
sweep does not cover) is refused in `check`, `run` and `submit` alike.
"""

from __future__ import annotations

from collections.abc import Callable

from nightbench.drivers.errors import InputError
from nightbench.plan.files import PlanProblem
from nightbench.plan.messages import at_key, from_problem
from nightbench.plan.model import MAX_POINTS, Plan
from nightbench.plan.path import Calibrated, PathModel, source_for
from nightbench.plan.yamlfile import KeyPath

# The analysis fits a line with uncertainties to the levels within analysis.fit_dbm, endpoints
# included to FIT_SLACK_DB, and needs MIN_FIT_LEVELS of them (analysis/fit.py uses the same numbers).
MIN_FIT_LEVELS = 3
FIT_SLACK_DB = 1e-9
# A level this far above a calibration's highest is still its top correction, held: calibrate lands
# its levels within the sensor's noise (a few mdB) and the 0.001 dB setting resolution of the target.
CALIBRATION_TOP_SLACK_DB = 0.02


def check_consistency(plan: Plan, path: PathModel, file: str, lines: dict[KeyPath, int]) -> None:
    """Raise InputError (file, line, key) for the first cross-section problem."""

    def fail(message: str, *key: str) -> InputError:
        return at_key(message, key, file, lines)

    freqs = plan.sweep.axis_values("frequency_hz")
    levels = plan.sweep.axis_values("power_dbm")
    count = len(freqs) * len(levels) * max(1, len(plan.temperatures()))
    if count > MAX_POINTS:
        raise fail(f"the sweep has {count} points; at most {MAX_POINTS} are allowed", "sweep")
    _check_temperatures(plan, fail)
    ceiling = plan.limits.dut_max_dbm
    top = max(levels)
    if top > ceiling:
        raise fail(
            f"level {top:g} dBm exceeds the DUT ceiling limits.dut_max_dbm = {ceiling:g} dBm", "sweep", "power_dbm"
        )
    _check_calibration(plan, path, freqs, top, fail)
    src = plan.instruments.source
    for f in freqs:
        try:
            lo, hi = source_for(path, f, min(levels)), source_for(path, f, top)
        except PlanProblem as exc:
            raise from_problem(exc, file, lines) from None
        if lo < src.min_dbm or hi > src.max_dbm:
            raise fail(
                f"at {f:g} Hz the source would need {lo:.2f} to {hi:.2f} dBm, outside its limits "
                f"[{src.min_dbm:g}, {src.max_dbm:g}] dBm",
                "sweep",
                "power_dbm",
            )
    _check_fit_range(plan, levels, fail)


def _check_calibration(
    plan: Plan, path: PathModel, freqs: list[float], top: float, fail: Callable[..., InputError]
) -> None:
    """A calibrated path is never extrapolated upward toward the DUT's ceiling: every swept level
    lies within the calibrated levels at its frequency (or below them, where the correction at the
    lowest is held). A calibration run itself never goes above the ceiling."""
    cal = plan.calibration
    if cal is not None and cal.levels_dbm.stop > plan.limits.dut_max_dbm:
        raise fail(
            f"calibration level {cal.levels_dbm.stop:g} dBm exceeds the DUT ceiling limits.dut_max_dbm = "
            f"{plan.limits.dut_max_dbm:g} dBm (the sensor sits where the DUT goes)",
            "calibration",
            "levels_dbm",
            "stop",
        )
    if not isinstance(path, Calibrated):
        return
    for f in freqs:
        if not path.calibration.covers(f):
            continue  # the loop over frequencies below says which, with the file's span
        highest = path.calibration.highest_dbm(f)
        if top > highest + CALIBRATION_TOP_SLACK_DB:
            raise fail(
                f"level {top:g} dBm at {f:g} Hz lies above the highest calibrated level there ({highest:.3f} dBm "
                f"in {path.calibration.name}); a calibration is never extrapolated upward: calibrate up to "
                "the sweep's top level",
                "sweep",
                "power_dbm",
            )


def _check_temperatures(plan: Plan, fail: Callable[..., InputError]) -> None:
    """A chamber, its temperatures and the soak rule come together; every setpoint (the soak's
    end_c too) lies within the chamber's min_c/max_c, so no chamber is ever asked beyond them."""
    chamber, temps, soak = plan.instruments.chamber, plan.temperatures(), plan.soak
    if temps and chamber is None:
        raise fail("sweep.temperature_c needs a chamber under instruments.chamber", "sweep", "temperature_c")
    if chamber is not None and not temps:
        raise fail("a chamber needs the temperatures to visit under sweep.temperature_c", "instruments", "chamber")
    if soak is not None and chamber is None:
        raise fail("soak applies to a plan with a chamber (instruments.chamber)", "soak")
    if chamber is None:
        return
    if soak is None:
        raise fail("a plan with a chamber needs a soak section (tolerance_c, stable_s, timeout_s, end_c)", "sweep")
    limits = f"the chamber's limits [{chamber.min_c:g}, {chamber.max_c:g}] degC (instruments.chamber.min_c/max_c)"
    for i, t in enumerate(temps):
        if not chamber.min_c <= t <= chamber.max_c:
            raise fail(f"temperature {t:g} degC is outside {limits}", "sweep", "temperature_c", i)
    if not chamber.min_c <= soak.end_c <= chamber.max_c:
        raise fail(f"end_c {soak.end_c:g} degC is outside {limits}", "soak", "end_c")
    if len(set(temps)) != len(temps):
        raise fail("a temperature is listed twice (each is one soak; list it once)", "sweep", "temperature_c")
    ref = plan.analysis.reference_c
    if ref is not None and ref not in temps:
        raise fail(
            f"reference_c {ref:g} degC is not one of the swept temperatures ({', '.join(f'{t:g}' for t in temps)})",
            "analysis",
            "reference_c",
        )


def least_soak_s(plan: Plan) -> float:
    """The least time the soaks can take: stable_s at every temperature (transitions come on top)."""
    return len(plan.temperatures()) * plan.soak.stable_s if plan.soak else 0.0


def _check_fit_range(plan: Plan, levels: list[float], fail: Callable[..., InputError]) -> None:
    """A fit range the sweep does not fill would run all night for a report that fits nothing."""
    low, high = plan.analysis.fit_dbm
    inside = sorted({lv for lv in levels if low - FIT_SLACK_DB <= lv <= high + FIT_SLACK_DB})
    span = f"[{low:g}, {high:g}] dBm"
    if not inside:
        raise fail(
            f"the fit range {span} lies wholly outside the sweep's levels ({min(levels):g} to "
            f"{max(levels):g} dBm): the report could fit nothing",
            "analysis",
            "fit_dbm",
        )
    if len(inside) < MIN_FIT_LEVELS:
        raise fail(
            f"the fit range {span} holds {len(inside)} of the sweep's levels "
            f"({', '.join(f'{lv:g}' for lv in inside)} dBm); a line fit with uncertainties needs "
            f"at least {MIN_FIT_LEVELS}",
            "analysis",
            "fit_dbm",
        )
