"""The run: from a validated plan and a bench session to durable points.

The sequencer talks to instruments only through the role classes of a BenchSession, to the
analysis only through benchseq.analysis, and to the disk only through a RunWriter. It never
prints: it emits events that the CLI renders.
"""

from __future__ import annotations

import bisect
import logging
import math
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from benchseq import analysis, batches
from benchseq.bench import Bench
from benchseq.errors import BenchseqError, MeasurementFailure
from benchseq.injector import InjectorModel
from benchseq.plan import Plan, Sweep
from benchseq.records import POINT_COLUMNS, input_referred
from benchseq.settling import Settling, previous_in
from benchseq.stopping import AbandonPoint, StopControl

PIN_TOLERANCE = 0.02  # relative: trim the generator when the pin ripple is further off than this
MAX_TRIMS = 3
MAX_RANGING = 5
MAX_POINT_RETRIES = 2
# pauses (s) between reconnection tries while the instruments cannot be reached; the last is
# repeated until the bench's outage patience (lab.outage_patience) runs out
OUTAGE_PAUSES_S = (0.25, 0.5, 1.0, 2.0, 5.0, 10.0)
RANGE_FILL = 0.7  # aim the sine's peak-to-peak at this fraction of full scale
INITIAL_REJECTION_GUESS_DB = 40.0
CORNER_SEED_KEY = 2**40  # simulator noise key of the AC-corner measurement (points: id·16+try)
COUPLING_SETTLE_S = 0.3  # after switching a channel between AC and DC coupling
DEFAULT_NOISE_GUESS = 200e-6  # V rms per sample, until a capture shows the real noise

log = logging.getLogger(__name__)  # debug detail of the capture decisions (benchseq -v)


@dataclass
class Event:
    """Something the CLI may show: kind is 'state', 'point_started', 'point_stored' or 'warning'."""

    kind: str
    message: str = ""
    point_id: int | None = None
    row: dict[str, Any] | None = None
    done: int = 0
    total: int = 0
    bench_time_left: float = 0.0
    # the same at the wall-clock pace the run has kept so far (wall s per bench s, learnt
    # over the session): the finish's clock time; None until known. On a real bench the
    # two clocks are one; the simulated bench's bench time runs ahead of the wall.
    wall_time_left: float | None = None


EventSink = Callable[[Event], None]


@dataclass
class Carry:
    """What one point tells the next (derived only from the stored row, so a resumed run
    makes exactly the same choices as an uninterrupted one)."""

    rejection_db: float = INITIAL_REJECTION_GUESS_DB
    output_floor: float = float("nan")
    pin_correction: float = 1.0  # measured/model pin ripple ratio seen last
    output_range: float = float("nan")
    noise: batches.NoiseGuess | None = None  # the noise the last point showed

    @classmethod
    def from_row(cls, row: dict[str, Any]) -> Carry:
        rejection = row["rejection_db"] if not row["is_bound"] else row["bound_db"]
        pin_model = abs(row["pin_model"])
        correction = abs(row["pin"]) / pin_model if pin_model > 0 else 1.0
        if not math.isfinite(correction) or correction <= 0:
            correction = 1.0
        return cls(
            rejection_db=float(rejection)
            if math.isfinite(rejection)
            else INITIAL_REJECTION_GUESS_DB,
            output_floor=float(row["output_floor"]),
            pin_correction=float(np.clip(correction, 0.5, 2.0)),
            output_range=float(row["output_range"]),
            noise=batches.NoiseGuess.from_point(
                float(row["output_floor"]),
                float(row["output_noise"]),
                float(row["pin_sigma"]),
                float(row["sample_interval"]),
                int(row["record_length"]),
                int(row["averages"]),
            ),
        )


def _at_pace(bench_left: float, bench_spent: float, wall_spent: float) -> float | None:
    """``bench_left`` in wall seconds at the pace kept so far (wall_spent / bench_spent);
    None before the bench time has moved."""
    if not (bench_spent > 0 and wall_spent >= 0 and math.isfinite(bench_left)):
        return None
    return bench_left * wall_spent / bench_spent


class CarryGuide:
    """Which stored point guides the next one: the one nearest in log frequency (the most
    recent of equals).

    A point's rejection, noise, output range and generator correction are much closer to
    those of a neighbour in frequency than to the last point's when the sweep jumps (the
    next operating point starting again at the lowest frequency): carried from a point
    three decades away, the expected output was 90x too large and the capture planned on it
    ended 8x above the target uncertainty. In a sweep that moves step by step the last point
    is the nearest, as before. Built only from stored rows, so a resumed run chooses as an
    uninterrupted one."""

    def __init__(self) -> None:
        self._logf: list[float] = []  # sorted log10 frequencies with a guide
        self._carry: dict[float, Carry] = {}  # the latest stored point at each

    def add(self, row: dict[str, Any]) -> None:
        """A stored row (a repeat at another ripple does not guide the next point)."""
        if int(row["repeat_of"]) >= 0:
            return
        frequency = float(row["frequency"])
        if not (math.isfinite(frequency) and frequency > 0):
            return
        key = math.log10(frequency)
        if key not in self._carry:
            bisect.insort(self._logf, key)
        self._carry[key] = Carry.from_row(row)

    def for_frequency(self, frequency: float) -> Carry:
        if not self._logf:
            return Carry()
        key = math.log10(frequency)
        k = bisect.bisect_left(self._logf, key)
        near = [self._logf[j] for j in (k - 1, k) if 0 <= j < len(self._logf)]
        return self._carry[min(near, key=lambda x: abs(x - key))]


@dataclass
class RunOutcome:
    status: str  # complete | stopped | aborted
    reason: str
    measured: int
    skipped: int
    bounds: int
    flagged: int
    bench_time: float
    safe_state: list[str] = field(default_factory=list)
    # what the safe state could NOT make safe (the CLI never exits 0 when this is not empty)
    not_safe: list[str] = field(default_factory=list)


class Sequencer:
    """Runs one plan on one bench session, storing each point through ``writer``."""

    def __init__(
        self,
        plan: Plan,
        bench: Bench,
        session: Any,
        writer: Any,
        emit: EventSink | None = None,
        stop: StopControl | None = None,
        keep_waveforms: bool = False,
        seed: int = 0,
        planned_bench_time: float = 0.0,
        calibration: analysis.ChannelCalibration | None = None,
        match_tolerance: bool = True,
    ) -> None:
        self.plan = plan
        self.bench = bench
        self.session = session
        self.writer = writer
        self.emit = emit or (lambda event: None)
        self.wall_clock: Callable[[], float] = time.monotonic  # the finish's pace (Event)
        self.stop = stop or StopControl()
        self.keep_waveforms = keep_waveforms
        self.seed = seed
        self.planned_bench_time = planned_bench_time
        self.model = InjectorModel(bench.injector, bench.generator, bench.pin)
        self.corners = self.model.corners()
        self.sweep, self.repeat_of, self.ripple_factor = with_repeats(plan)
        self.run_order = run_order(self.repeat_of)
        self._rows: dict[int, dict[str, Any]] = {}  # rows of points that have repeats
        self._has_repeats = {int(b) for b in self.repeat_of if b >= 0}
        self._dc_now: float | None = None
        self._load_now: float | None = None
        self._generator_on = False
        self._freq_now: float | None = None
        self._pin_dc = float("nan")
        self.calibration = calibration  # channel match applied to every ratio (None: none)
        # where no calibration applies, the channels' and probes' tolerances enter each
        # point's budget (None: not, as for a calibration sweep, which measures that match)
        self._match_u: float | None = (
            bench.scope.tolerances().uncertainty if match_tolerance else None
        )
        self._pool: batches.Pool | None = None  # the last point's pooled records
        self._ac_corner = 0.0  # Hz, the scope's AC-coupling corner once measured (0: none)
        self._max_shift = max_frequency_shift(np.asarray(self.sweep.frequency, dtype=float))
        # what the bench is doing now ("power-up", "operating point", "settle", "capture",
        # "trim", "top-up", "floor"): for progress displays and the run benchmarks
        self.activity = "idle"
        # every wait after a generator change (benchseq.settling); the generator's EMF peak
        # and frequency now (0 when off, None when unknown, as after a recovery)
        self.settling = Settling(plan.settle, self.model, plan.capture.target_uncertainty_db)
        self._emf_now: float | None = 0.0
        self._emf_frequency = float("nan")
        self._eta = self.time_left()

    def time_left(self) -> BenchTimeLeft:
        """A new learner of the bench time left for this sequencer's sweep and run order."""
        return BenchTimeLeft(
            self.plan,
            self.sweep,
            self.settling.planned(
                self.sweep.frequency,
                self.sweep.ripple_peak,
                previous_in(self.run_order, len(self.sweep)),
            ),
            self._capture_prior(),
            self._operating_prior(),
            # no re-planning from measured noise (replan=self._replanner()): measured, it
            # made the time left worse (DEVELOPERS.md, "The bench time left")
        )

    def _stated(self) -> Any:
        """The simulated bench's scenario as the check reads it (None: a real bench)."""
        from benchseq.check import scenario_likeness

        return scenario_likeness(self.plan, self.bench)

    def _replanner(self) -> Callable[[int, Any, float], float] | None:
        """Point i's captures and round trips as the check would estimate them under a
        noise and rejection measured (None when the bench's scope profile gives no
        timebase): the bench time left re-plans a measured frequency's other points."""
        from benchseq.check import measured_point_s, scope_timebase

        try:
            timebase = scope_timebase(self.plan, self.bench)
        except (BenchseqError, KeyError, OSError, ValueError):
            return None
        f, ripple = self.sweep.frequency, self.sweep.ripple_peak

        def replan(i: int, noise: Any, rejection_db: float) -> float:
            return measured_point_s(
                self.plan, self.bench, float(f[i]), float(ripple[i]), noise, rejection_db,
                timebase,
            )  # fmt: skip

        return replan

    def _operating_prior(self) -> np.ndarray:
        """Per point, the bench time of the operating-point change before it in run order
        (DC ramp at the supply's rate, bias-filter wait, after_operating_point), 0 where
        the operating point stays."""
        out = np.zeros(len(self.sweep))
        dc_now, load_now = 0.0, float("nan")
        smallest = float(np.min(self.sweep.ripple_peak)) if len(self.sweep) else 0.0
        for i in self.run_order:
            dc = float(self.sweep.dc_level[i])
            load = float(self.sweep.load_current[i])
            step = dc - dc_now
            moved = abs(step) > 1e-9
            loaded = math.isfinite(load) and load != load_now
            if moved:
                out[i] += abs(step) / self.bench.supply.ramp_rate
                out[i] += float(np.sum(self.settling.dc_step(np.array([step]), smallest)))
            if moved or loaded:
                out[i] += self.plan.settle.operating_point_s
            dc_now, load_now = dc, load
        return out

    def _capture_prior(self) -> np.ndarray | None:
        """Each point's captures and round trips as the check estimates them (the middle of
        its range; on the simulated bench from its scenario); None (cycle-bound) when the
        bench's scope profile gives no timebase."""
        from benchseq.check import point_seconds

        try:
            low, high = point_seconds(
                self.plan,
                self.bench,
                self.sweep.frequency,
                self.sweep.ripple_peak,
                self._stated(),
                self.sweep.dc_level,
                self.sweep.load_current,
            )
        except (BenchseqError, KeyError, OSError, ValueError):  # a driver class, no profile
            return None
        return np.sqrt(low * high)

    # -- the whole run ---------------------------------------------------------------
    def run(self) -> RunOutcome:
        stored = set(self.writer.stored_ids)
        total = len(self.sweep)
        todo = [i for i in self.run_order if int(self.sweep.index[i]) not in stored]
        guide = self._guide_from_store(stored)
        counts = {"measured": 0, "bounds": 0, "flagged": 0}
        status, reason = "complete", "all points stored"
        bench_start = self.session.clock.now()
        wall_start = self.wall_clock()
        real_time = bool(getattr(self.session.clock, "real_time", True))
        self.writer.update_meta(status="running")
        planned_left = self.planned_bench_time * len(todo) / max(total, 1)
        self.emit(
            Event(
                "state",
                f"{len(todo)} of {total} points to measure",
                done=total - len(todo),
                total=total,
                bench_time_left=planned_left,
                wall_time_left=planned_left if real_time else None,
            )
        )
        self._eta.begin(todo)
        try:
            if todo:
                self._with_recoveries("power-up", lambda: self._power_up(todo[0]))
            for position, i in enumerate(todo):
                if self.stop.stop_requested:
                    status, reason = "stopped", self.stop.reason
                    break
                carry = guide.for_frequency(float(self.sweep.frequency[i]))
                row, truth = self._measure_with_retries(
                    i, carry, done=len(stored) + position, total=total
                )
                self.writer.append(
                    int(row["point_id"]), row, truth=truth, waveforms=self._waveforms_to_keep()
                )
                guide.add(row)
                if int(row["point_id"]) in self._has_repeats:
                    self._rows[int(row["point_id"])] = row
                self._eta.learn(i, float(row["bench_time"]), row)
                counts["measured"] += 1
                counts["bounds"] += int(bool(row["is_bound"]))
                counts["flagged"] += int(bool(row["flags"]))
                left = self._eta.left()
                self.emit(
                    Event(
                        "point_stored",
                        point_id=int(row["point_id"]),
                        row=row,
                        done=len(stored) + position + 1,
                        total=total,
                        bench_time_left=left,
                        wall_time_left=_at_pace(
                            left,
                            self.session.clock.now() - bench_start,
                            self.wall_clock() - wall_start,
                        ),
                    )
                )
                self._check_stop_rules(row)
        except AbandonPoint as exc:
            status, reason = "stopped", f"{exc}; point in progress abandoned"
        except _StopRun as exc:
            status, reason = "stopped", str(exc)
        except BenchseqError as exc:
            status, reason = "aborted", str(exc)
            self._last_traceback = traceback.format_exc()
        except Exception as exc:  # an unexpected fault: keep its traceback in the file
            status, reason = "aborted", f"unexpected error: {exc!r}"
            self._last_traceback = traceback.format_exc()
        finally:
            with self.stop.shielded():
                steps, not_safe = self._safe_state()
        bench_time = self.session.clock.now() - bench_start
        if not_safe:
            reason = f"{reason}; NOT MADE SAFE: {'; '.join(not_safe)}"
        try:
            self.writer.finish(
                status, traceback=getattr(self, "_last_traceback", None), reason=reason
            )
        except BenchseqError as exc:  # e.g. a full disk: the points already stored stay so
            status, reason = "aborted", f"{reason}; then the ending could not be stored: {exc}"
        self.emit(Event("finished", f"run {status}: {reason}"))
        return RunOutcome(
            status,
            reason,
            counts["measured"],
            total - len(todo),
            counts["bounds"],
            counts["flagged"],
            bench_time,
            steps,
            not_safe,
        )

    def _guide_from_store(self, stored: set[int]) -> CarryGuide:
        guide = CarryGuide()
        if stored:
            for row in self.writer.resumed_rows():
                guide.add(row)
        return guide

    # -- power-up and operating point -------------------------------------------------
    def _power_up(self, first: int) -> None:
        self.activity = "power-up"
        s = self.session
        self._stop_check("power-up")
        self.emit(Event("state", "setting limits: generator off, supply limits and protection"))
        s.generator.output(False)
        self._generator_on = False
        if s.load is not None:
            s.load.input(False)
        s.generator.set_load_mode(self.bench.generator.load_mode)
        s.supply.set_current_limit(self.bench.supply.current_limit)
        s.supply.set_overvoltage_protection(self.bench.supply.overvoltage_protection)
        if self._dc_now is None:  # a retried power-up ramps on from where the supply is
            s.supply.set_voltage(0.0)
            self._stop_check("power-up")
            s.supply.output(True)
            self._dc_now = 0.0
        s.scope.trigger_external()
        self._set_operating_point(first)
        self._stop_check("power-up")
        self._measure_ac_corner(first)

    def _measure_ac_corner(self, first: int) -> None:
        """Read the pin ripple AC- then DC-coupled at the lowest planned frequency and
        derive the scope's AC-coupling corner (benchseq.coupling), so the pin ripple is
        trimmed to what the pin really carries. Skipped when the pin channel is DC-coupled,
        the plan stays well above any such corner, or the offset cannot take the pin DC."""
        from benchseq import coupling

        pin = self.bench.scope.pin
        low = float(np.min(self.sweep.frequency))
        if pin.coupling != "AC" or low > coupling.MEASURE_BELOW_HZ:
            return
        s = self.session
        caps = s.scope.capabilities
        max_offset = getattr(caps, "max_offset", None)
        if max_offset is not None and abs(self._pin_dc) / pin.probe > max_offset:
            self.emit(
                Event(
                    "warning",
                    f"the pin DC ({self._pin_dc:.2f} V) is beyond the scope's offset range: "
                    "the AC-coupling loss of pin readings below ~100 Hz is not corrected",
                )
            )
            return
        simulator = getattr(s, "simulator", None)
        if simulator is not None:  # the same noise whether the run starts or resumes
            simulator.reseed(CORNER_SEED_KEY)
        target = float(self.sweep.ripple_peak[first])
        setting = float(self.model.generator_setting_pp(low, target))
        s.generator.set_amplitude_pp(self._clamp_generator(setting))
        frequency = s.generator.set_frequency(low)
        self._stop_check("power-up")
        s.generator.output(True)
        self._generator_on = True
        self._pause(
            self._settle_after_change(frequency, self._clamp_generator(setting), target, 0.05),
            "power-up",
        )
        plan = self._plan_capture(frequency, target, target * 1e-3, None, target_db=0.05)
        pin_range = self._range_for(pin, target)
        readings = []
        for mode, offset in (("AC", 0.0), ("DC", self._pin_dc)):
            s.scope.configure_channel(
                pin.channel, pin_range, offset, mode, self.bench.scope.bandwidth_limit
            )
            s.clock.sleep(COUPLING_SETTLE_S)
            interval, length = s.scope.set_timebase(plan.sample_interval, plan.record_length)
            s.scope.set_averages(plan.averages)
            s.scope.acquire(plan.averages * (length * interval + caps.rearm_time))
            volts = s.scope.read_waveform(pin.channel).volts()
            readings.append(analysis.fit_sine(volts, 1.0 / interval, frequency).amplitude)
        s.scope.configure_channel(
            pin.channel, pin_range, 0.0, pin.coupling, self.bench.scope.bandwidth_limit
        )
        self._ac_corner = coupling.corner_from_ratio(frequency, readings[0] / readings[1])
        if self._ac_corner > 0:  # the pin reading rings through the coupling too
            self.settling = self.settling.reading_through(self._ac_corner)
        self.writer.update_meta(scope_ac_corner_hz=self._ac_corner)
        self.emit(
            Event(
                "state",
                f"scope AC-coupling corner measured at {frequency:g} Hz: "
                f"{self._ac_corner:.3g} Hz (pin readings are corrected for it)",
            )
        )

    def _set_operating_point(self, i: int) -> None:
        dc = float(self.sweep.dc_level[i])
        load = float(self.sweep.load_current[i])
        s = self.session
        changed = False
        if self._dc_now is None or abs(dc - self._dc_now) > 1e-9:
            self._ramp_supply(dc)
            changed = True
        if math.isfinite(load) and s.load is not None and load != self._load_now:
            s.load.set_current(load)
            self._stop_check("the operating point")
            s.load.input(True)
            self._load_now = load
            changed = True
        if changed:  # the plan's settle.after_operating_point: the device's own DC settling
            self.activity = "operating point"
            self._pause(self.plan.settle.operating_point_s, "the operating point")
        if self._pin_dc != self._pin_dc or abs(dc - (self._dc_checked_at or -1)) > 1e-9:
            self._pin_dc = self._check_pin_dc(dc)

    _dc_checked_at: float | None = None

    def _ramp_supply(self, target: float) -> None:
        self.activity = "operating point"
        s = self.session
        start = self._dc_now or 0.0
        rate = self.bench.supply.ramp_rate
        steps = max(1, math.ceil(abs(target - start) / (rate * 0.1)))
        self.emit(Event("state", f"ramping DC from {start:.3f} V to {target:.3f} V"))
        for k in range(1, steps + 1):
            # a stop request ends the ramp between two steps, where the supply is
            self._stop_check(f"the DC ramp (at {self._dc_now or 0.0:.3f} V)")
            s.supply.set_voltage(start + (target - start) * k / steps)
            self._dc_now = start + (target - start) * k / steps
            s.clock.sleep(abs(target - start) / rate / steps)
        self._dc_now = target
        # the pin's DC follows through the bias filter and the injector's other modes
        # (benchseq.settling), judged against the smallest planned ripple
        smallest = float(np.min(self.sweep.ripple_peak))
        self._pause(float(self.settling.dc_step(target - start, smallest)), "the DC ramp")

    def _stop_check(self, where: str) -> None:
        """A stop request while the bench is being powered up or moved to an operating
        point ends it here: what is not yet on stays off and the run goes to the safe state."""
        if self.stop.stop_requested:
            raise _StopRun(f"{self.stop.reason} during {where}; what was not yet on stayed off")

    def _pause(self, seconds: float, where: str) -> None:
        """Wait ``seconds`` on the session's clock; a stop request ends the wait (on a real
        clock at once, on a virtual one when the wait is over) and the run goes safe."""
        self._stop_check(where)
        self._wait_unless_stopped(seconds)
        self._stop_check(where)

    def _wait_unless_stopped(self, seconds: float) -> None:
        clock = self.session.clock
        sleep_unless = getattr(clock, "sleep_unless", None)
        if callable(sleep_unless):
            sleep_unless(seconds, self.stop.requested)
        else:
            clock.sleep(seconds)

    def _check_pin_dc(self, dc: float) -> float:
        """Measure the pin's DC level with the pin channel briefly DC-coupled."""
        self.activity = "operating point"
        scope = self.session.scope
        pin = self.bench.scope.pin
        ranges = np.asarray(scope.capabilities.ranges) * pin.probe
        fitting = ranges[ranges >= 2.4 * max(dc, 0.1)]
        full_scale = float(fitting[0] if fitting.size else ranges[-1])
        scope.configure_channel(
            pin.channel, full_scale, 0.0, "DC", self.bench.scope.bandwidth_limit
        )
        interval, length = scope.set_timebase(1e-4, 1000)
        scope.set_averages(1)
        scope.acquire(length * interval)
        level = float(np.mean(scope.read_waveform(pin.channel).volts()))
        scope.configure_channel(
            pin.channel, full_scale, 0.0, pin.coupling, self.bench.scope.bandwidth_limit
        )
        self._dc_checked_at = dc
        limits = self.plan.device
        if not (limits.min_operating_v - 0.05 <= level <= limits.absolute_max_v):
            self._watch(
                "pin_dc",
                f"pin DC {level:.3f} V is outside the device limits "
                f"{limits.min_operating_v:g}–{limits.absolute_max_v:g} V",
            )
        return level

    # -- one point ----------------------------------------------------------------------
    def _measure_with_retries(
        self, i: int, carry: Carry, done: int, total: int
    ) -> tuple[dict[str, Any], dict[str, Any] | None]:
        from benchseq.drivers.errors import InstrumentError

        attempt, recover = 0, False
        while True:
            try:
                if recover:  # inside the try: a fault while recovering is one more attempt
                    recover = False
                    self._recover(f"point {int(self.sweep.index[i])}")
                    self._freq_now = None
                simulator = getattr(self.session, "simulator", None)
                if simulator is not None:
                    simulator.reseed(int(self.sweep.index[i]) * 16 + attempt)
                row = self._measure_point(i, carry, done, total)
                if attempt:
                    row["flags"] = " ".join(filter(None, [row["flags"], "instrument_retry"]))
                truth = None
                if simulator is not None:
                    truth = {"point_id": row["point_id"], **simulator.truth().record()}
                return row, truth
            except InstrumentError as exc:
                attempt += 1
                if attempt > MAX_POINT_RETRIES:
                    raise MeasurementFailure(
                        f"point {int(self.sweep.index[i])}: instrument fault persists after "
                        f"{MAX_POINT_RETRIES} recoveries: {exc}"
                    ) from exc
                self.emit(Event("warning", f"instrument fault, recovering: {exc}"))
                recover = True

    def _with_recoveries(self, what: str, action: Callable[[], None]) -> None:
        """Run ``action``; after an instrument fault recover the session and run it again
        (at most MAX_POINT_RETRIES times), as a point is."""
        from benchseq.drivers.errors import InstrumentError

        attempt = 0
        while True:
            try:
                if attempt:
                    self._recover(what)
                action()
                return
            except InstrumentError as exc:
                attempt += 1
                if attempt > MAX_POINT_RETRIES:
                    raise MeasurementFailure(
                        f"{what}: instrument fault persists after {MAX_POINT_RETRIES} "
                        f"recoveries: {exc}"
                    ) from exc
                self.emit(Event("warning", f"instrument fault during {what}, recovering: {exc}"))

    def _recover(self, what: str) -> None:
        """Renew every connection and restore each instrument's known state, verified by
        read-back. While an instrument cannot be reached (connection refused or lost, no
        reply) this keeps trying, with growing pauses on the session's clock, for up to the
        bench's outage patience; then OutageTooLong ends the run (through the safe state).
        A stop request ends the wait."""
        from benchseq.drivers.errors import ConnectionLost, InstrumentTimeout

        clock = self.session.clock
        patience = self.bench.outage_patience
        started = clock.now()
        tries = 0
        self._emf_now = None  # what the generator puts out is unknown until it is set again
        while True:
            try:
                self.session.recover()
                if tries:
                    self.emit(
                        Event(
                            "warning",
                            f"instruments reachable again after {clock.now() - started:.1f} s; "
                            f"their state restored and verified; {what} again",
                        )
                    )
                return
            except (ConnectionLost, InstrumentTimeout) as exc:
                waited = clock.now() - started
                pause = OUTAGE_PAUSES_S[min(tries, len(OUTAGE_PAUSES_S) - 1)]
                if waited + pause > patience:
                    raise OutageTooLong(
                        f"{what}: the instruments could not be reached again within the "
                        f"outage patience ({patience:g} s, lab.outage_patience): {exc}"
                    ) from exc
                if tries == 0:
                    self.emit(
                        Event(
                            "warning",
                            f"{what}: cannot reach the instruments ({exc}); trying again for "
                            f"up to {patience:g} s",
                        )
                    )
                self._wait_unless_stopped(pause)
                if self.stop.stop_requested:
                    raise _StopRun(
                        f"{self.stop.reason} while the instruments could not be reached"
                    ) from exc
                tries += 1

    def _measure_point(self, i: int, carry: Carry, done: int, total: int) -> dict[str, Any]:
        s = self.session
        clock = s.clock
        point_id = int(self.sweep.index[i])
        frequency = float(self.sweep.frequency[i])
        target = float(self.sweep.ripple_peak[i])
        started_at, bench_start = _unix(), clock.now()
        self.emit(Event("point_started", point_id=point_id, done=done, total=total))
        self._set_operating_point(i)

        # generator: the model's setting, corrected by what the last point showed
        setting_pp = (
            float(self.model.generator_setting_pp(frequency, target)) / carry.pin_correction
        )
        actual_pp = s.generator.set_amplitude_pp(self._clamp_generator(setting_pp))
        actual_frequency = s.generator.set_frequency(frequency)
        if not self._generator_on:
            s.generator.output(True)
            self._generator_on = True

        # the capture, predicted from what the last point showed and taken in batches of one
        # timebase (benchseq.batches): the first ranges both channels and shows the pin
        # ripple and this point's noise; top-ups add records until the pool meets the target
        self.activity = "capture"
        rules = self.plan.capture
        timebase = self._capture_limits()
        expected_out = target * 10 ** (-carry.rejection_db / 20.0)
        plan = batches.predicted_plan(
            timebase,
            actual_frequency,
            target,
            max(expected_out, 1e-12),
            carry.noise or batches.NoiseGuess(DEFAULT_NOISE_GUESS),
            rules.target_uncertainty_db,
            rules.min_cycles,
            rules.max_time_s,
            lean=carry.noise is not None,  # fewest samples at equal bench time, noise known
        )
        # measured at the planned frequency; moved to a coherent J/T only within the plan's
        # tolerance and less than half-way to the nearest other planned frequency
        plan = analysis.at_frequency(
            plan, frequency, rules.frequency_tolerance, float(self._max_shift[i])
        )
        actual_frequency = s.generator.set_frequency(plan.frequency)
        self.activity = "settle"  # after the last change of the generator, before capturing
        clock.sleep(self._settle_after_change(actual_frequency, actual_pp, target))
        self.activity = "capture"
        probe = batches.batch(
            plan, batches.probe_records(plan), timebase.max_averages, timebase.rearm_time
        )
        log.debug(
            "point %d: capture at %.6g Hz (%.4g cycles per record), %d samples at %.3g s, "
            "%d averages x %d records first; expected u %.3g dB (target %.3g dB)",
            point_id, plan.frequency, plan.cycles, plan.record_length, plan.sample_interval,
            probe.averages, probe.records, plan.expected_uncertainty_db,
            rules.target_uncertainty_db,
        )  # fmt: skip
        pin_range = self._range_for(self.bench.scope.pin, target)
        noise = carry.noise.white_sigma if carry.noise is not None else 0.0
        out_range = (
            carry.output_range
            if math.isfinite(carry.output_range)
            else self._range_for(self.bench.scope.output, expected_out, noise)
        )
        flags: list[str] = []
        captures = trims = 0
        while True:
            pin_range, out_range, result, used, waves = self._capture_ranged(
                probe, actual_frequency, pin_range, out_range, flags
            )
            captures += used
            measured_pin = result.pin.amplitude / abs(self._coupling_at(actual_frequency))
            if (
                abs(measured_pin / target - 1.0) <= PIN_TOLERANCE
                or trims >= MAX_TRIMS
                or measured_pin <= 0
            ):
                break
            trims += 1
            log.debug(
                "point %d: pin ripple %.4g V peak against %.4g V: generator trimmed (%d)",
                point_id, measured_pin, target, trims,
            )  # fmt: skip
            self.activity = "trim"
            before_pp = actual_pp
            actual_pp = s.generator.set_amplitude_pp(
                self._clamp_generator(actual_pp * target / measured_pin)
            )
            clock.sleep(
                float(
                    self.settling.trim(
                        actual_frequency, self._emf(before_pp), self._emf(actual_pp), target
                    )
                )
            )
            self._emf_now = self._emf(actual_pp)
        pool = self._pool = batches.Pool()
        pool.add(*waves, probe.averages, probe.bench_time)
        capped = False
        detecting = 0
        granule = 1  # waveforms per batch of the last top-up: its records come in these
        carried_ratio = 10 ** (-carry.rejection_db / 20.0)
        for _ in range(batches.MAX_TOP_UPS):
            if result.rejection.is_bound and "unresolved_output" in result.flags:
                break  # noise under one code step: more records of this range show no more
            more = batches.top_up(
                result,
                pool.triggered,
                pool.bench_time,
                plan.record_duration,
                timebase.rearm_time,
                rules.target_uncertainty_db,
                rules.max_time_s,
                carried_ratio,
                result.match_uncertainty,
                last_look=detecting >= batches.MAX_DETECT_TOP_UPS - 1,
            )
            capped = more.capped
            if more.records < 1 or (more.detecting and detecting >= batches.MAX_DETECT_TOP_UPS):
                break
            detecting += int(more.detecting)
            self.activity = "top-up"
            extra = batches.batch(plan, more.records, timebase.max_averages, timebase.rearm_time)
            if more.capped or more.detecting:  # whole scope averages may round the count up:
                extra = batches.within(extra, more.records, timebase)  # keep to max_time
            granule = extra.records
            log.debug(
                "point %d: top-up of %d records (%d averages)%s",
                point_id, extra.records, extra.averages, ", capped by max_time" if capped else "",
            )  # fmt: skip
            pin_range, out_range, _, used, waves = self._capture_ranged(
                extra, actual_frequency, pin_range, out_range, flags
            )
            captures += used
            pool.add(*waves, extra.averages, extra.bench_time)
            result = self._pooled_result(pool, actual_frequency, pin_range, out_range)
        if pool.batches == 1:  # the stored numbers always come from the pooled codes
            result = self._pooled_result(pool, actual_frequency, pin_range, out_range)
        plan = batches.batch(plan, pool.triggered, timebase.max_averages, timebase.rearm_time)
        # readings through the scope's AC coupling, referred back to the nodes (the ratio,
        # and so the rejection, is unchanged: both channels share the coupling)
        through = self._coupling_at(actual_frequency)
        pin_amplitude = result.pin.amplitude / abs(through)
        out_through = through if self.bench.scope.output.coupling == "AC" else 1.0 + 0.0j
        if abs(pin_amplitude / target - 1.0) > 0.05:
            flags.append("pin_off_target")

        pin_model = complex(self.model.pin_per_displayed(actual_frequency)) * actual_pp / 2.0
        model_ratio_db = (
            20 * math.log10(pin_amplitude / abs(pin_model))
            if abs(pin_model) > 0 and pin_amplitude > 0
            else float("nan")
        )
        if (
            math.isfinite(model_ratio_db)
            and abs(model_ratio_db) > self.plan.watch.model_mismatch_db
        ):
            flags.append("model_mismatch")
        if math.isfinite(result.thd) and result.thd > self.plan.watch.distortion:
            flags.append("distorted")
        supply_current = float(s.supply.measure_current())
        if s.supply.is_current_limited():
            flags.append("current_limit")
        limits = self.plan.device
        if not (limits.min_operating_v - 0.05 <= self._pin_dc <= limits.absolute_max_v):
            flags.append("pin_dc_out_of_limits")
        if result.rejection.is_bound:
            flags.append("bound")
            room = batches.room_for(
                pool.bench_time, plan.record_duration, timebase.rearm_time, rules.max_time_s
            )
            if room < granule:  # max_time used (to within whole scope averages per read)
                flags.append("bound_time_limited")
        if abs(actual_frequency - frequency) > rules.frequency_tolerance * frequency * (1 + 1e-9):
            flags.append("frequency_off_plan")
        if capped or (
            not result.rejection.is_bound
            and result.rejection.uncertainty_db > rules.target_uncertainty_db
        ):  # the time cap stopped the top-ups, or what the pool reached misses the target
            flags.append("target_unmet")
        flags.extend(result.flags)

        floor_pin, floor_output = self._floor_capture(i, plan, pin_range, out_range, through)
        rej = result.rejection
        base = int(self.repeat_of[i])
        if base >= 0 and self._nonlinear(base, rej):
            flags.append("nonlinear")
        row: dict[str, Any] = {
            "point_id": point_id,
            "repeat_of": base,
            "ripple_factor": float(self.ripple_factor[i]),
            "frequency_planned": frequency,
            "frequency": actual_frequency,
            "frequency_fitted": result.frequency,
            "ripple_target": target,
            "ripple_convention": self.sweep.ripple_convention[i],
            "dc_level": float(self.sweep.dc_level[i]),
            "load_current": float(self.sweep.load_current[i]),
            "generator_pp": actual_pp,
            "pin": result.pin.phasor / through,
            "pin_sigma": result.pin.amplitude_sigma / abs(through),
            "output": result.output.phasor / out_through,
            "output_sigma": result.output_sigma / abs(out_through),
            "output_floor": result.output_floor / abs(out_through),
            "output_noise": result.output.residual_rms,
            "floor_pin": floor_pin,
            "floor_output": floor_output,
            "ratio": rej.ratio,
            "rejection_db": rej.rejection_db if not rej.is_bound else float("nan"),
            "uncertainty_db": rej.uncertainty_db if not rej.is_bound else float("nan"),
            "bound_db": rej.bound_db if rej.is_bound else float("nan"),
            **input_referred(
                rej.rejection_db if not rej.is_bound else float("nan"),
                rej.bound_db if rej.is_bound else float("nan"),
                self.plan.device.gain_db,
            ),
            "is_bound": bool(rej.is_bound),
            "match_uncertainty": result.match_uncertainty,
            "pin_model": pin_model,
            "pin_model_ratio_db": model_ratio_db,
            "thd": result.thd,
            "pin_dc": self._pin_dc,
            "supply_current": supply_current,
            "pin_range": pin_range,
            "output_range": out_range,
            "sample_interval": plan.sample_interval,
            "record_length": plan.record_length,
            "averages": pool.triggered,
            "captures": captures,
            "trims": trims,
            "bench_time": clock.now() - bench_start,
            "started_at": started_at,
            "stored_at": _unix(),
            "flags": " ".join(dict.fromkeys(flags)),
        }
        return row

    def _nonlinear(self, base: int, rej: Any) -> bool:
        """The repeat's rejection differs from its base point's by more than the plan's
        tolerance (both detected; a bound on either side decides nothing)."""
        row = self._rows.get(base)
        if row is None:
            row = self._stored_row(base)
        if row is None or row["is_bound"] or rej.is_bound:
            return False
        tolerance = self.plan.linearity.tolerance_db if self.plan.linearity else math.inf
        return abs(float(rej.rejection_db) - float(row["rejection_db"])) > tolerance

    def _stored_row(self, point_id: int) -> dict[str, Any] | None:
        """A point stored by an earlier session of this run (resume), from the result file."""
        from benchseq.store import read_results

        path = getattr(self.writer, "path", None)
        if path is None:
            return None
        frame = read_results(path)
        rows = frame[frame["point_id"] == point_id].to_dict(orient="records")
        return rows[0] if rows else None

    def _floor_capture(
        self,
        i: int,
        plan: analysis.CapturePlan,
        pin_range: float,
        out_range: float,
        through: complex,
    ) -> tuple[float, float]:
        """With the plan's [floor] option: the same capture with the generator off, fitted
        at the test frequency (V peak at the nodes); NaN where no floor capture is asked."""
        rules = self.plan.floor
        frequency = float(self.sweep.frequency[i])
        if rules is None or int(self.repeat_of[i]) >= 0:
            return math.nan, math.nan
        if not rules.every_point and not np.any(
            np.isclose(rules.frequencies, frequency, rtol=1e-3)
        ):
            return math.nan, math.nan
        s = self.session
        self.activity = "floor"
        s.generator.output(False)
        self._generator_on = False
        emf = self._emf_now if self._emf_now is not None else self._emf_ceiling()
        s.clock.sleep(
            float(self.settling.switch_off(frequency, emf, float(self.sweep.ripple_peak[i])))
        )
        self._emf_now = 0.0
        pins, outs, interval = self._acquire(plan, pin_range, out_range)
        rate = 1.0 / interval
        pin = analysis.fit_sine(
            np.vstack([w.volts() for w in pins]).mean(axis=0), rate, plan.frequency
        )
        out = analysis.fit_sine(
            np.vstack([w.volts() for w in outs]).mean(axis=0), rate, plan.frequency
        )
        return pin.amplitude / abs(through), out.amplitude / abs(through)

    def _capture_limits(self) -> analysis.ScopeTimebase:
        """The scope's timebase limits with averaging capped by the plan's max_averages."""
        caps = self.session.scope.capabilities
        return analysis.ScopeTimebase(
            caps.sample_intervals,
            caps.record_lengths,
            max(1, min(int(caps.max_averages), int(self.plan.capture.max_averages))),
            caps.rearm_time,
        )

    def _coupling_at(self, frequency: float) -> complex:
        """The AC coupling's response at ``frequency`` for the pin channel (1 when DC-coupled
        or no corner was measured)."""
        from benchseq.coupling import high_pass

        if self.bench.scope.pin.coupling != "AC":
            return 1.0 + 0.0j
        return high_pass(frequency, self._ac_corner)

    # -- generator, ranging and capture -------------------------------------------------
    def _emf(self, displayed_pp: float) -> float:
        """The generator's EMF peak (V) for a displayed peak-to-peak setting."""
        return 0.5 * displayed_pp * self.bench.generator.emf_per_displayed

    def _emf_ceiling(self) -> float:
        """The largest EMF peak the generator can give: the change from an unknown state."""
        return self._emf(self.bench.generator.max_amplitude_pp)

    def _settle_after_change(
        self, frequency: float, displayed_pp: float, pin_peak: float, target_db: float | None = None
    ) -> float:
        """The wait after the generator moved to (frequency, displayed_pp) from what it put out
        before (benchseq.settling), for a pin ripple of ``pin_peak``; remembers the new state."""
        emf = self._emf(displayed_pp)
        if self._emf_now is None:  # unknown (after a recovery): from the largest EMF there
            old_f, old_emf = frequency, self._emf_ceiling()
        else:
            old_f = self._emf_frequency if self._emf_now > 0 else frequency
            old_emf = self._emf_now
        wait = self.settling.change(old_f, old_emf, frequency, emf, pin_peak, target_db)
        self._emf_now, self._emf_frequency = emf, frequency
        return float(wait)

    def _clamp_generator(self, amplitude_pp: float) -> float:
        g = self.bench.generator
        return float(min(max(amplitude_pp, g.min_amplitude_pp), g.max_amplitude_pp))

    def _tip_ranges(self, channel: Any) -> list[float]:
        return [float(r) * channel.probe for r in self.session.scope.capabilities.ranges]

    def _range_for(self, channel: Any, amplitude: float, noise: float = 0.0) -> float:
        """Smallest range holding the sine (and 4σ of noise) at RANGE_FILL of full scale."""
        needed = 2.0 * (amplitude + 4.0 * noise)
        return analysis.suggest_range(needed, self._tip_ranges(channel), RANGE_FILL)

    def _plan_capture(
        self,
        frequency: float,
        pin: float,
        output: float,
        noise: float | None,
        target_db: float | None = None,
    ) -> analysis.CapturePlan:
        rules = self.plan.capture
        sigma = noise if noise is not None and noise > 0 else DEFAULT_NOISE_GUESS
        return analysis.plan_capture(
            self._capture_limits(),
            frequency,
            max(pin, 1e-12),
            max(output, sigma * 0.1, 1e-12),
            target_db if target_db is not None else rules.target_uncertainty_db,
            min_cycles=rules.min_cycles,
            max_time_s=rules.max_time_s,
            noise_sigma=sigma,
        )

    def _acquire(
        self, plan: analysis.CapturePlan, pin_range: float, out_range: float
    ) -> tuple[list[Any], list[Any], float]:
        """One capture of both channels per ``plan``; returns the pin and output waveforms as
        read (one per record) and their sample interval."""
        scope = self.session.scope
        pin_ch, out_ch = self.bench.scope.pin, self.bench.scope.output
        bandwidth = self.bench.scope.bandwidth_limit
        scope.configure_channel(pin_ch.channel, pin_range, 0.0, pin_ch.coupling, bandwidth)
        scope.configure_channel(out_ch.channel, out_range, 0.0, out_ch.coupling, bandwidth)
        interval, length = scope.set_timebase(plan.sample_interval, plan.record_length)
        scope.set_averages(plan.averages)
        pins, outs = [], []
        for _ in range(plan.records):
            scope.acquire(plan.averages * (length * interval + scope.capabilities.rearm_time))
            pins.append(scope.read_waveform(pin_ch.channel))
            outs.append(scope.read_waveform(out_ch.channel))
        return pins, outs, interval

    def _capture_ranged(
        self,
        plan: analysis.CapturePlan,
        frequency: float,
        pin_range: float,
        out_range: float,
        flags: list[str],
    ) -> tuple[float, float, analysis.PointMeasurement, int, tuple[list[Any], list[Any], float]]:
        """Capture, re-ranging a channel that clipped or wasted codes (bounded tries).
        Returns the ranges, the capture's measurement, the acquisitions made and the
        capture's waveforms (as read, pin and output) and their sample interval."""
        used = 0
        pin_ch, out_ch = self.bench.scope.pin, self.bench.scope.output
        pin_ranges, out_ranges = self._tip_ranges(pin_ch), self._tip_ranges(out_ch)
        while True:
            pins, outs, interval = self._acquire(plan, pin_range, out_range)
            used += 1
            waves = (pins, outs, interval)
            result = analysis.measure_point(
                np.vstack([w.volts() for w in pins]),
                np.vstack([w.volts() for w in outs]),
                interval,
                frequency,
                pin_codes=_codes(pins[-1], pin_range, pin_ranges),
                out_codes=_codes(outs[-1], out_range, out_ranges),
                calibration=self.calibration,
                channel_match=self._match_u,
            )
            new_pin = self._next_range(
                result.pin_codes, pin_range, pin_ranges, result.pin.amplitude, 0.0
            )
            new_out = self._next_range(
                result.output_codes,
                out_range,
                out_ranges,
                result.output.amplitude,
                result.output.residual_rms,
            )
            if (new_pin == pin_range and new_out == out_range) or used >= MAX_RANGING:
                if used >= MAX_RANGING and "clipped_pin" in result.flags + tuple(flags):
                    flags.append("clipped")
                return pin_range, out_range, result, used, waves
            pin_range, out_range = new_pin, new_out

    def _pooled_result(
        self, pool: batches.Pool, frequency: float, pin_range: float, out_range: float
    ) -> analysis.PointMeasurement:
        """The measurement of every record pooled so far, from the pooled codes (as a
        re-analysis of the kept waveforms sees them)."""
        channels = []
        for k, (spec, full_scale) in enumerate(
            ((self.bench.scope.pin, pin_range), (self.bench.scope.output, out_range))
        ):
            samples, scale, offset, _ = pool.kept(k)
            low, high = batches.code_range(full_scale, scale, samples.dtype)
            codes = analysis.ChannelCodes(
                codes=samples,
                code_min=low,
                code_max=high,
                volts_per_code=scale,
                full_scale=full_scale,
                ranges=self._tip_ranges(spec),
            )
            channels.append((samples.astype(np.float64) * scale + offset, codes))
        return analysis.measure_point(
            channels[0][0],
            channels[1][0],
            pool.interval,
            frequency,
            pin_codes=channels[0][1],
            out_codes=channels[1][1],
            calibration=self.calibration,
            channel_match=self._match_u,
        )

    @staticmethod
    def _next_range(
        check: Any, present: float, ranges: list[float], amplitude: float, noise: float
    ) -> float:
        if check is None:
            return present
        verdict = check.verdict
        if verdict is analysis.RangeVerdict.CLIPPED:
            bigger = [r for r in ranges if r > present]
            suggested = check.suggested_range or (bigger[0] if bigger else present)
            return max(suggested, bigger[0] if bigger else present)
        if verdict in (analysis.RangeVerdict.UNRESOLVED, analysis.RangeVerdict.TOO_SMALL):
            wanted = analysis.suggest_range(2.0 * (amplitude + 4.0 * noise), ranges, RANGE_FILL)
            return min(wanted, present)
        return present

    def _waveforms_to_keep(self) -> dict[str, Any] | None:
        """The point's pooled records as integer codes with their scaling (every triggered
        record the rejection came from), when asked to keep them. One storage type for every
        point: int32 sums of codes, scale = volts per code / records."""
        pool = self._pool
        if not self.keep_waveforms or pool is None or pool.batches == 0:
            return None
        from benchseq.store import StoredWaveform

        kept = {}
        for k, name in enumerate(("pin", "output")):
            samples, scale, offset, _ = pool.kept(k)
            kept[name] = StoredWaveform(
                samples=samples, scale=scale, offset=offset, sample_interval=pool.interval
            )
        return kept

    # -- watching ------------------------------------------------------------------------
    def _watch(self, rule: str, message: str) -> None:
        action = self.plan.watch.action(rule)
        self.emit(Event("warning", message))
        if action == "stop":
            raise _StopRun(message)

    def _check_stop_rules(self, row: dict[str, Any]) -> None:
        flags = set(str(row["flags"]).split())
        for flag, rule in (
            ("current_limit", "current_limit"),
            ("distorted", "distortion"),
            ("model_mismatch", "model_mismatch"),
            ("pin_dc_out_of_limits", "pin_dc"),
        ):
            if flag in flags and self.plan.watch.action(rule) == "stop":
                raise _StopRun(
                    f"point {row['point_id']}: {flag.replace('_', ' ')} (plan says stop)"
                )

    # -- safe state ----------------------------------------------------------------------
    def _safe_state(self) -> tuple[list[str], list[str]]:
        """(what was done, what could NOT be made safe); loud warnings for the latter."""
        self.emit(
            Event(
                "state",
                "going to the safe state: generator off, load off, supply off then to its "
                "safe level",
            )
        )
        try:
            report = self.session.safe_state()
            steps = list(report)
            not_safe = list(getattr(report, "not_safe", []))
            tried = (
                f"{getattr(report, 'rounds', 1)} tries over {getattr(report, 'took_s', 0):.0f} s"
            )
        except Exception as exc:  # never let the safe state itself raise past the run
            steps = [f"safe state incomplete: {exc}"]
            not_safe, tried = list(steps), "no retry"
        for line in not_safe:
            self.emit(Event("warning", f"NOT MADE SAFE ({tried}): {line}"))
        return steps, not_safe


class BenchTimeLeft:
    """The bench time the points still to measure will take, learnt as the run goes.

    Each point's prior is the check's estimate (benchseq.check.point_seconds: the middle
    of its capture range, from the simulated bench's scenario or the stated assumptions),
    the settle wait before it and, where the operating point changes before it, the DC
    ramp, bias-filter wait and after_operating_point wait. The operating-point part is
    known in advance and stays as planned. Once a frequency is measured, its other points
    (another ripple, DC level or load) are re-planned (``replan``) with the noise and
    rejection its last point showed, as `check --like` does (and, within
    ``replan_decades`` of it, other frequencies' points under what the nearest measured
    one showed, blended with their prior). The rest is learnt as the
    ratio measured/estimated: a point at a frequency already measured is expected to take
    its (re-planned) estimate times the ratio the last point there showed, any other its
    prior times the ratios of the measured frequencies nearest to it (on a log scale),
    since noise and rejection, which set a capture's length, change smoothly with
    frequency."""

    NEAR_DECADES = 0.3  # ratios of frequencies within this many decades weigh most
    REPLAN_DECADES = 0.6  # points this near a measured frequency are re-planned
    MEAN_RATIOS = True

    def __init__(
        self,
        plan: Plan,
        sweep: Sweep,
        settle_s: Any,
        captures_s: Any | None = None,
        operating_s: Any = 0.0,
        replan: Callable[[int, Any, float], float] | None = None,
        replan_decades: float = REPLAN_DECADES,
    ) -> None:
        """``settle_s``: the wait before each point (s, per point or one for all), as
        benchseq.settling.Settling.planned gives it; ``captures_s``: each point's captures
        and round trips as the check estimates them (default: cycle-bound captures);
        ``operating_s``: the operating-point change before each point (s); ``replan(i,
        noise, rejection_db)``: point i's captures and round trips under a measured noise
        (benchseq.batches.NoiseGuess) and rejection (default: none, priors only);
        ``replan_decades``: points this near a measured frequency are re-planned under what
        the nearest showed (0: only a measured frequency's own points)."""
        from benchseq.check import capture_seconds

        if captures_s is None:
            captures_s, _ = capture_seconds(np.asarray(sweep.frequency), plan)
        captures = np.asarray(captures_s, dtype=float)
        self.settle = np.broadcast_to(np.asarray(settle_s, dtype=float), captures.shape)
        self.estimate = captures + self.settle
        self.operating = np.broadcast_to(
            np.asarray(operating_s, dtype=float), self.estimate.shape
        ).copy()
        keys, self._key = np.unique(
            np.round(np.asarray(sweep.frequency, dtype=float), 6), return_inverse=True
        )
        self._log_f = np.log10(np.maximum(keys, 1e-30))
        self._ratio = np.full(keys.size, np.nan)  # measured/prior there (log)
        self._ratio_here = np.full(keys.size, np.nan)  # measured/re-planned there (log)
        self._count = np.zeros(keys.size, dtype=np.int64)  # points measured there
        self._todo = np.zeros(self.estimate.size, dtype=bool)
        self._replan = replan
        self._replan_decades = float(replan_decades)
        self._shown: dict[int, tuple[Any, float]] = {}  # frequency key: noise, rejection
        self._replanned: dict[tuple[int, float, int], tuple[int, float]] = {}
        self._ripple = np.asarray(sweep.ripple_peak, dtype=float)
        self._version = np.zeros(keys.size, dtype=np.int64)
        self._powered_up_for: int | None = None

    def begin(self, todo: list[int]) -> None:
        """The points this session will measure (by position in the sweep)."""
        self._todo[:] = False
        self._todo[np.asarray(todo, dtype=np.int64)] = True
        # the power-up sets the first point's operating point: not in that point's time
        self._powered_up_for = int(todo[0]) if todo else None

    def learn(self, i: int, bench_time: float, row: dict[str, Any] | None = None) -> None:
        """Point i took ``bench_time`` (s, its operating-point change included); ``row``:
        its stored row, whose noise and rejection re-plan its frequency's other points."""
        before = 0.0 if i == self._powered_up_for else float(self.operating[i])
        own = max(float(bench_time) - before, 0.0)
        key = self._key[i]
        if row is not None and self._replan is not None:
            shown = _shown_by(row)
            if shown is not None:
                self._shown[key] = shown
                self._version[key] += 1
        base = self._base(i)
        if base > 0 and own > 0 and self.estimate[i] > 0:
            # the mean over the points measured at this frequency: one point's top-ups
            # scatter with the noise it met, and its ratio would carry that to the rest
            n = self._count[key] = self._count[key] + 1
            prior = math.log(own / float(self.estimate[i]))  # for other frequencies
            here = math.log(own / base)  # for this one's other points
            if n == 1 or not self.MEAN_RATIOS:
                self._ratio[key], self._ratio_here[key] = prior, here
            else:
                self._ratio[key] += (prior - self._ratio[key]) / n
                self._ratio_here[key] += (here - self._ratio_here[key]) / n
        self._todo[i] = False

    def _base(self, i: int) -> float:
        """Point i's estimate before the ratios: re-planned where its frequency was
        measured; near a measured frequency (within replan_decades) the re-plan under what
        the nearest showed, blended with the prior on a log scale as the ratios are
        (weight of the distance against the prior's); else the prior."""
        key = int(self._key[i])
        prior = float(self.estimate[i])
        if self._replan is None or not self._shown:
            return prior
        if key in self._shown:
            return self._replanned_at(i, key)
        near, distance = self._nearest_shown(key)
        if distance > self._replan_decades or prior <= 0:
            return prior
        weight = 1.0 / (1.0 + (distance / self.NEAR_DECADES) ** 2) ** 2
        replanned = self._replanned_at(i, near)
        if replanned <= 0:
            return prior
        mixed = (weight * math.log(replanned) + 0.25 * math.log(prior)) / (weight + 0.25)
        return math.exp(mixed)

    def _nearest_shown(self, key: int) -> tuple[int, float]:
        shown = np.fromiter(self._shown, dtype=np.int64, count=len(self._shown))
        distance = np.abs(self._log_f[shown] - self._log_f[key])
        k = int(np.argmin(distance))
        return int(shown[k]), float(distance[k])

    def _replanned_at(self, i: int, key: int) -> float:
        """Point i's captures under what frequency ``key`` last showed, plus its settle."""
        assert self._replan is not None
        memo = (int(self._key[i]), round(float(self._ripple[i]), 12), key)
        version = int(self._version[key])
        cached = self._replanned.get(memo)
        if cached is None or cached[0] != version:
            noise, rejection = self._shown[key]
            cached = (version, float(self._replan(i, noise, rejection)) + float(self.settle[i]))
            self._replanned[memo] = cached
        return cached[1]

    def left(self, remaining: set[int] | None = None) -> float:
        """Bench time (s) of ``remaining`` (positions; default: the points not yet learnt
        of those begun). Vectorised over the distinct frequencies."""
        if remaining is None:
            index = np.flatnonzero(self._todo)
        else:
            index = np.fromiter(remaining, dtype=np.int64, count=len(remaining))
        known = np.isfinite(self._ratio)
        log_ratio = np.zeros(self._log_f.size)  # against the prior
        log_here = np.zeros(self._log_f.size)  # against the re-planned estimate
        if known.any():
            distance = np.abs(self._log_f[:, None] - self._log_f[None, known])
            weight = 1.0 / (1.0 + (distance / self.NEAR_DECADES) ** 2) ** 2
            # the prior (ratio 1) weighs as a measured frequency NEAR_DECADES away: far
            # from every measured frequency the estimate falls back to the check's
            log_ratio = (weight @ self._ratio[known]) / (weight.sum(axis=1) + 0.25)
            log_here = (weight @ self._ratio_here[known]) / (weight.sum(axis=1) + 0.25)
            log_ratio[known] = log_here[known] = self._ratio_here[known]  # the last point's
        keys = self._key[index]
        base = self.estimate[index].copy()
        ratio = log_ratio[keys]
        if self._shown and self._replan is not None:
            shown = np.fromiter(self._shown, dtype=np.int64, count=len(self._shown))
            gap = np.min(np.abs(self._log_f[:, None] - self._log_f[None, shown]), axis=1)
            for n in np.flatnonzero(gap[keys] <= self._replan_decades):
                base[n] = self._base(int(index[n]))
                ratio[n] = log_here[keys[n]]
        own = base * np.exp(ratio)
        return float(np.sum(own + self.operating[index]))


def _shown_by(row: dict[str, Any]) -> tuple[Any, float] | None:
    """The noise (batches.NoiseGuess) and rejection (dB; the bound where not detected) a
    stored row showed; None when it does not tell."""
    try:
        noise = batches.NoiseGuess.from_point(
            float(row["output_floor"]),
            float(row["output_noise"]),
            float(row["pin_sigma"]),
            float(row["sample_interval"]),
            int(row["record_length"]),
            int(row["averages"]),
        )
        rejection = float(row["bound_db"] if row["is_bound"] else row["rejection_db"])
    except (KeyError, TypeError, ValueError):
        return None
    if noise is None or not math.isfinite(rejection):
        return None
    return noise, rejection


class _StopRun(Exception):
    """A watch rule or a stop request asked the run to stop safely."""


class OutageTooLong(MeasurementFailure):
    """The instruments could not be reached again within the bench's outage patience."""


COLUMN_NAMES = tuple(c.name for c in POINT_COLUMNS)


def _codes(waveform: Any, full_scale: float, ranges: list[float]) -> analysis.ChannelCodes:
    return analysis.ChannelCodes(
        codes=np.asarray(waveform.codes),
        code_min=int(waveform.code_min),
        code_max=int(waveform.code_max),
        volts_per_code=float(waveform.volts_per_code * waveform.probe),
        full_scale=full_scale,
        ranges=ranges,
    )


def _unix() -> float:
    return time.time()


def max_frequency_shift(frequencies: np.ndarray) -> np.ndarray:
    """Per point, the largest move (Hz) that keeps its planned frequency distinct from every
    other: 0.45 of the gap to the nearest different planned frequency (inf for one only)."""
    unique = np.unique(frequencies)
    if unique.size < 2:
        return np.full(frequencies.shape, np.inf)
    gaps = np.diff(unique)
    nearest = np.minimum(np.append(gaps, np.inf), np.insert(gaps, 0, np.inf))
    return 0.45 * nearest[np.searchsorted(unique, frequencies)]


def with_repeats(plan: Plan) -> tuple[Sweep, np.ndarray, np.ndarray]:
    """The plan's points followed by its linearity repeats (ids n, n+1, ...): each chosen
    sweep point again at each factor x its ripple. Returns (points, repeat_of, factor):
    repeat_of is the sweep point a repeat repeats (-1 for sweep points)."""
    sweep = plan.expand()
    n = len(sweep)
    lin = plan.linearity
    none = (sweep, np.full(n, -1, dtype=np.int64), np.ones(n))
    if lin is None or len(lin.frequencies) == 0:
        return none
    chosen = np.isclose(sweep.frequency[:, None], np.asarray(lin.frequencies)[None, :], rtol=1e-3)
    at = np.nonzero(chosen.any(axis=1))[0]
    factors = np.asarray(lin.factors, dtype=float)
    base = np.repeat(at, factors.size)
    factor = np.tile(factors, at.size)
    m = base.size
    points = Sweep(
        index=np.concatenate([sweep.index, n + np.arange(m)]),
        frequency=np.concatenate([sweep.frequency, sweep.frequency[base]]),
        ripple_peak=np.concatenate([sweep.ripple_peak, sweep.ripple_peak[base] * factor]),
        dc_level=np.concatenate([sweep.dc_level, sweep.dc_level[base]]),
        load_current=np.concatenate([sweep.load_current, sweep.load_current[base]]),
        ripple_convention=sweep.ripple_convention
        + tuple(sweep.ripple_convention[int(b)] for b in base),
    )
    return (
        points,
        np.concatenate([none[1], sweep.index[base]]).astype(np.int64),
        np.concatenate([none[2], factor]),
    )


def run_order(repeat_of: np.ndarray) -> list[int]:
    """Sweep points in plan order, each followed at once by its repeats (same frequency and
    operating point: nothing drifts between a point and its repeats)."""
    follows: dict[int, list[int]] = {}
    for k, b in enumerate(repeat_of):
        if b >= 0:
            follows.setdefault(int(b), []).append(k)
    order: list[int] = []
    for k, b in enumerate(repeat_of):
        if b < 0:
            order.append(k)
            order.extend(follows.get(k, []))
    return order
