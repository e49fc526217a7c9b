"""The sweep engine: visits points in order, never above the DUT ceiling, and stores each one.

It knows roles (a source, a meter, a chamber), never a transport; it knows the store, never SQL.
With a chamber, the first point at each temperature waits for a proven soak (measure/soak.py), and
every way out switches RF off first, then sends the chamber to soak.end_c.
"""

from __future__ import annotations

import math
import statistics
import time
from collections.abc import Callable

from nightbench.drivers.errors import InstrumentError, NightbenchError, SafetyError
from nightbench.measure.order import visit_order
from nightbench.measure.record import open_recorded
from nightbench.measure.replay import REPLAY_POINTS, replay
from nightbench.measure.roles import Bench
from nightbench.measure.settle import Direction, SettleDetector
from nightbench.measure.signals import StopFlag
from nightbench.measure.soak import SoakProgress, SoakTimeout, soak
from nightbench.measure.sweep import Point, expand
from nightbench.measure.units import route_to, unit_path
from nightbench.plan.load import LoadedPlan
from nightbench.plan.path import dut_for
from nightbench.store.db import PointResult, Store
from nightbench.store.states import RunState

OVERLOAD_READINGS = 3  # consecutive overrange readings that end a point as overloaded
CEILING_SLACK_DB = 1e-6
POINT_ATTEMPTS = 4  # a point is tried this often across instrument faults before the run fails
OPEN_BACKOFF_S = (0.3, 1.0, 0.0)  # waits after each failed attempt to open the instruments


class Interrupted(Exception):
    """The stop flag was seen; the run ends as `interrupted` and can be resumed."""


Progress = Callable[[Point, PointResult, int, int], None]


class Engine:
    def __init__(
        self,
        loaded: LoadedPlan,
        store: Store,
        run_id: int,
        stop: StopFlag,
        progress: Progress | None = None,
        soak_progress: SoakProgress | None = None,
    ) -> None:
        self.loaded = loaded  # with the path's loss model and the sweep's axis order
        self.plan = loaded.plan
        self.store = store
        self.run_id = run_id
        self.stop = stop
        self.progress = progress
        self.bench: Bench | None = None
        s = self.plan.settle
        # one detector per run: it learns time constants and noise from point to point
        self.detector = SettleDetector(
            s.tolerance_v,
            samples=self.plan.measure.samples,
            min_wait_s=s.min_wait_s,
            max_tau_s=s.prior_tau_s,
            tail_share=s.tail_share,
            timeout_s=s.timeout_s,
        )
        self.last_dbm: float | None = None  # DUT level of the last point; None while RF is off
        self.soak_progress = soak_progress
        # the setpoint this process has proven the chamber holds; None at every start, so a resume
        # (or `serve` adopting a crashed run) soaks again before its first point
        self.soaked_c: float | None = None
        self.unit_id: str | None = None  # the unit whose route this process closed and read back

    # -- safety ---------------------------------------------------------------------------
    def _check_ceiling(self, level_dbm: float, frequency_hz: float, unit_id: str | None = None) -> None:
        dut = dut_for(unit_path(self.loaded, unit_id), frequency_hz, level_dbm)  # calibrated: what it delivers
        if dut > self.plan.limits.dut_max_dbm + CEILING_SLACK_DB:
            raise SafetyError(
                f"refusing to set {level_dbm:.2f} dBm at {frequency_hz:g} Hz: {dut:.2f} dBm at the DUT "
                f"exceeds limits.dut_max_dbm = {self.plan.limits.dut_max_dbm:g} dBm"
            )

    def move_to(self, point: Point) -> None:
        """Set the source for a point without the DUT ever seeing more than the ceiling.

        On a frequency change the level is first lowered to what is safe at both the old and
        the new frequency, so a smaller path loss at the new frequency cannot raise the DUT level.
        """
        assert self.bench is not None
        source = self.bench.source
        self._check_ceiling(point.source_dbm, point.frequency_hz, point.unit_id)
        if source.frequency_hz != point.frequency_hz:
            if source.level_dbm is not None and source.output_on:
                interim = min(source.level_dbm, point.source_dbm)
                self._check_ceiling(interim, point.frequency_hz, point.unit_id)
                if interim < source.level_dbm:
                    source.set(level_dbm=interim)
            source.set(frequency_hz=point.frequency_hz)
        if source.level_dbm != point.source_dbm:
            source.set(level_dbm=point.source_dbm)
        if not source.output_on:
            source.set(output=True)

    # -- one point ------------------------------------------------------------------------
    def step_direction(self, point: Point) -> Direction | None:
        """The way the output is expected to move: with the level (from RF off: up); None if same."""
        last = self.last_dbm
        if last is None or point.power_dbm > last:
            return "rise"
        return "fall" if point.power_dbm < last else None

    def measure(self, point: Point) -> PointResult:
        assert self.bench is not None
        meter = self.bench.meter
        settle = self.plan.settle
        detector = self.detector
        detector.begin(self.step_direction(point), at=time.monotonic(), from_off=self.last_dbm is None)
        self.last_dbm = point.power_dbm
        readings: list[tuple[float, float | None, str]] = []
        n_samples = self.plan.measure.samples
        # One reading is always in flight: the next is asked for as soon as one arrives, and the
        # detector judges it while the meter integrates (its CPU costs no bench time). When the
        # point settles, the reading in flight is the first sample: the detector's bound is on the
        # readings that come next. With one sample, every request asks the error queue too.
        checked = n_samples == 1
        t0 = time.monotonic()
        settled, overloads = False, 0
        meter.request(checked=checked)
        while True:
            value = meter.collect(checked=checked)
            t = time.monotonic() - t0
            if self.stop.is_set():
                raise Interrupted(self.stop.reason)
            meter.request(checked=checked)
            if math.isinf(value):
                readings.append((t, None, "settle"))
                overloads += 1
                if overloads >= OVERLOAD_READINGS:  # take the one in flight: nothing may be left on the link
                    late = meter.collect(checked=checked)
                    readings.append((time.monotonic() - t0, None if math.isinf(late) else late, "settle"))
                    return PointResult(None, None, 0, t, len(readings), False, True, readings)
            else:
                overloads = 0
                readings.append((t, value, "settle"))
                if detector.feed(t, value):
                    settled = True
                    break
            if t >= settle.timeout_s:
                break
        settle_s, settle_count = readings[-1][0], len(readings)
        samples = []
        for i in range(n_samples):
            last = i == n_samples - 1
            value = meter.collect(checked=checked) if i == 0 else meter.read(checked=last)
            if self.stop.is_set():
                raise Interrupted(self.stop.reason)
            t = time.monotonic() - t0
            readings.append((t, None if math.isinf(value) else value, "measure"))
            if math.isinf(value):
                return PointResult(None, None, 0, settle_s, settle_count, settled, True, readings)
            samples.append(value)
            detector.record(t, value)
        detector.end()
        mean = statistics.fmean(samples)
        stdev = statistics.stdev(samples) if len(samples) > 1 else None
        return PointResult(mean, stdev, len(samples), settle_s, settle_count, settled, False, readings)

    # -- the run --------------------------------------------------------------------------
    def run(self) -> tuple[str, str | None]:
        """Run the missing points; return (final state, error message)."""
        store, run_id = self.store, self.run_id
        points = expand(self.loaded)
        done = store.done_indices(run_id)
        todo = [p for p in points if p.index not in done]
        if done:  # resumed: start from what the last points taught (measure/replay.py), not afresh
            replay(self.detector, store.recent_readings(run_id, REPLAY_POINTS))
        store.mark_running(run_id)
        state, error = RunState.COMPLETED, None
        self.doing = "opening the instruments"
        try:
            if self.stop.is_set():
                raise Interrupted(self.stop.reason)
            self.bench = self._open_bench()
            store.set_identities(run_id, self.bench.source.identity, self.bench.meter.identity)
            if self.bench.chamber is not None:
                store.event(run_id, "instruments", f"chamber: {self.bench.chamber.identity}")
            fast_edge = self.plan.settle.level_order == "fast-edge"
            visit = visit_order(todo, self.loaded.order, self.detector.level_taus, fast_edge=fast_edge)
            for point in visit:
                result = self._point_at_temperature(point)
                store.add_point(run_id, point, result)
                done.add(point.index)
                if self.progress:
                    self.progress(point, result, len(done), len(points))
        except Interrupted as exc:
            state, error = RunState.INTERRUPTED, f"stopped by {exc}"
        except NightbenchError as exc:
            state, error = RunState.FAILED, f"{exc}, while {self.doing}"
        except BaseException as exc:  # a bug: never recorded as completed; RF still goes off
            state, error = RunState.FAILED, f"internal error ({type(exc).__name__}: {exc}), while {self.doing}"
            raise
        finally:
            rf_error = self._make_safe()
            if rf_error and state == RunState.COMPLETED:
                state, error = RunState.FAILED, rf_error
            elif rf_error:
                error = f"{error}; {rf_error}"
            store.finish_run(run_id, state, error)
            store.event(run_id, state, error or f"{len(done)} of {len(points)} points")
        return state, error

    def _point_at_temperature(self, point: Point) -> PointResult:
        """A point, after a soak if the chamber is not proven at its temperature; a point whose
        chamber reading has left the soak band is measured again after a new soak."""
        while True:
            if point.temperature_c is not None and point.temperature_c != self.soaked_c:
                self._soak(point.temperature_c)
            if point.unit_id is not None and point.unit_id != self.unit_id:  # RF off first (measure/units.py)
                self.doing, self.last_dbm = f"switching to unit {point.unit_id}", None
                self.unit_id = route_to(self.bench, self.loaded, point.unit_id)
            self.doing = (
                f"measuring point {point.index} ({point.frequency_hz / 1e6:g} MHz, "
                f"{point.power_dbm:g} dBm at the DUT"
                + (f", {point.temperature_c:g} degC)" if point.temperature_c is not None else ")")
            )
            result = self._point_with_recovery(point)
            rule = self.plan.soak
            if point.temperature_c is None or result.chamber_c is None or rule is None:
                return result
            if abs(result.chamber_c - point.temperature_c) <= rule.tolerance_c:
                return result
            self.store.event(
                self.run_id,
                "soak",
                f"point {point.index}: the chamber reads {result.chamber_c:.2f} degC, outside "
                f"{point.temperature_c:g} ± {rule.tolerance_c:g} degC; soaking again and measuring it again",
            )
            self.soaked_c = None

    def _soak(self, setpoint_c: float) -> None:
        """RF off, then the chamber to the setpoint and the soak rule proven; stored in `soaks`
        whatever the outcome. A chamber fault is recovered like a point's (a new link), the soak
        then starting over within the same timeout."""
        assert self.bench is not None and self.bench.chamber is not None and self.plan.soak is not None
        rule, store, run_id = self.plan.soak, self.store, self.run_id
        self.doing = f"soaking at {setpoint_c:g} degC"
        soak_id = store.start_soak(run_id, setpoint_c)
        store.event(run_id, "soak", f"soaking at {setpoint_c:g} degC (± {rule.tolerance_c:g} for {rule.stable_s:g} s)")
        readings: list[tuple[float, float]] = []
        started, outcome = time.monotonic(), "failed"
        try:
            for attempt in range(1, POINT_ATTEMPTS + 1):
                try:
                    # nothing is measured while the temperature moves: RF off (a DUT driven for an
                    # hour also heats itself)
                    self.bench.source.rf_off()
                    self.last_dbm = None
                    stable = soak(
                        self.bench.chamber,
                        rule,
                        setpoint_c,
                        self.stop,
                        readings,
                        started=started,
                        progress=self.soak_progress,
                    )
                    break
                except SoakTimeout:
                    outcome = "timeout"
                    raise
                except InstrumentError as exc:
                    if attempt == POINT_ATTEMPTS or self.stop.is_set():
                        raise
                    store.event(run_id, "fault", f"soak at {setpoint_c:g} degC, attempt {attempt}: {exc}")
                    self._recover(exc)
            if not stable:
                outcome = "interrupted"
                raise Interrupted(self.stop.reason)
            outcome = "stable"
        finally:
            store.finish_soak(soak_id, seconds=time.monotonic() - started, outcome=outcome, readings=readings)
        store.event(run_id, "soak", f"stable at {setpoint_c:g} degC after {time.monotonic() - started:.1f} s")
        self.soaked_c = setpoint_c
        self.detector.new_conditions()  # a tail proven small at another temperature is not assumed here

    def _point_with_recovery(self, point: Point) -> PointResult:
        """Set and measure one point; on an instrument fault, recover and redo the whole point,
        so a point that is stored is one that happened from start to end (invariant 4)."""
        assert self.bench is not None
        for attempt in range(1, POINT_ATTEMPTS + 1):
            if self.stop.is_set():
                raise Interrupted(self.stop.reason)
            try:
                self.move_to(point)
                result = self.measure(point)
                if self.bench.chamber is not None:
                    result.chamber_c = self.bench.chamber.temperature()
                return result
            except SafetyError:
                raise
            except InstrumentError as exc:
                if attempt == POINT_ATTEMPTS:
                    raise
                self.store.event(self.run_id, "fault", f"point {point.index}, attempt {attempt}: {exc}")
                try:
                    self._recover(exc)
                except NightbenchError:
                    if self.stop.is_set():  # a signal cut the reconnect short: resumable, not failed
                        raise Interrupted(self.stop.reason) from None
                    raise
        raise AssertionError("unreachable")

    def _open_bench(self) -> Bench:
        """Open both instruments (the source first, made safe at once); a fault while opening is
        retried with backoff like one mid-sweep, since an instrument may just be rebooting."""
        for attempt, wait in enumerate(OPEN_BACKOFF_S, start=1):
            if self.stop.is_set():
                raise Interrupted(self.stop.reason)
            try:
                return open_recorded(self.plan, self.store, self.run_id)  # with the run record (measure/record.py)
            except SafetyError:
                raise
            except InstrumentError as exc:
                if attempt == len(OPEN_BACKOFF_S):
                    raise
                self.store.event(self.run_id, "fault", f"opening, attempt {attempt}: {exc}")
                self.stop.wait(wait)
        raise AssertionError("unreachable")

    def _recover(self, exc: InstrumentError) -> None:
        """A NEW link to the instrument that failed (a lost link, a stale or garbled reply, a
        refused setting all leave its state in doubt); the source is made safe first."""
        assert self.bench is not None
        role = self.bench.role_of(exc)
        names = [role] if role else ["source", "meter"]
        for name in sorted(names, key=lambda n: n != "source"):
            self.store.event(self.run_id, "reconnect", f"reconnecting the {name}")
            self.bench.reconnect(name, self.stop.is_set)
            if name == "source":
                self.last_dbm = None  # RF was switched off: the next step is a rise from nothing

    def _make_safe(self) -> str | None:
        """On every way out: RF off first, then the chamber to soak.end_c; the instruments closed.
        A failure is reported, never swallowed."""
        if self.bench is None:
            return None
        try:
            problems = [p for p in (self._rf_off(), self._chamber_to_end()) if p]
            return "; ".join(problems) or None
        finally:
            self.bench.close()

    def _chamber_to_end(self) -> str | None:
        """The chamber to end_c (conditioning on, so it goes there); a link in doubt is reopened once."""
        assert self.bench is not None
        chamber, rule = self.bench.chamber, self.plan.soak
        if chamber is None or rule is None:
            return None
        try:
            try:
                chamber.flush()
                chamber.set_temperature(rule.end_c)
                chamber.start()
            except InstrumentError as first:
                self.store.event(self.run_id, "fault", f"sending the chamber to {rule.end_c:g} degC: {first}")
                self.bench.reconnect("chamber", lambda: False)
                chamber.set_temperature(rule.end_c)
                chamber.start()
        except NightbenchError as exc:
            return f"could not send the chamber to end_c {rule.end_c:g} degC: {exc}"
        self.store.event(self.run_id, "chamber", f"chamber sent to end_c {rule.end_c:g} degC")
        return None

    def _rf_off(self) -> str | None:
        """RF off; if the link is in doubt, a new one is opened to do it (the source's configure()
        switches RF off first)."""
        assert self.bench is not None
        source = self.bench.source
        try:
            source.flush()
            source.rf_off()
            return None
        except InstrumentError as first:
            self.store.event(self.run_id, "fault", f"switching RF off: {first}")
            try:
                self.bench.reconnect("source", lambda: False)
                return None
            except NightbenchError as exc:
                return f"could not switch RF off: {exc}"
        except NightbenchError as exc:
            return f"could not switch RF off: {exc}"
