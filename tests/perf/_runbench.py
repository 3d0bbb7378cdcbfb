"""Instruments for tests/perf/run_speed.py: wall-time profiling of a run, bench-time
accounting by activity, the simulator's truth per point and the least capture it allows.

Nothing here changes the package: wall time is measured by wrapping functions with
time.perf_counter (exclusive time: a wrapped callee's time is taken out of its caller's),
bench time by wrapping the simulator's virtual clock. ``undo()`` restores everything.
"""

from __future__ import annotations

import functools
import math
import time
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from benchseq.analysis import DB_PER_NEPER, suggest_range

# -- wall time by part of the program ----------------------------------------------------------


class Profiler:
    """Exclusive wall time per category of wrapped functions (single-threaded callers)."""

    def __init__(self) -> None:
        self.totals: dict[str, float] = defaultdict(float)
        self.calls: dict[str, int] = defaultdict(int)
        self._children: list[float] = []
        self._undo: list[Callable[[], None]] = []

    def wrap(self, category: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        @functools.wraps(fn)
        def timed(*args: Any, **kwargs: Any) -> Any:
            start = time.perf_counter()
            self._children.append(0.0)
            try:
                return fn(*args, **kwargs)
            finally:
                elapsed = time.perf_counter() - start
                inner = self._children.pop()
                self.totals[category] += elapsed - inner
                self.calls[category] += 1
                if self._children:
                    self._children[-1] += elapsed

        return timed

    def patch(self, owner: Any, name: str, category: str) -> None:
        """Replace ``owner.name`` (a module function or a class's method) by a timed one."""
        original = owner.__dict__[name] if isinstance(owner, type) else getattr(owner, name)
        setattr(owner, name, self.wrap(category, original))
        self._undo.append(lambda: setattr(owner, name, original))

    def undo(self) -> None:
        while self._undo:
            self._undo.pop()()

    def reset(self) -> None:
        self.totals.clear()
        self.calls.clear()


# Categories of a run's wall time (see run_speed.py part a).
SIM_SYNTH = "simulator: record synthesis"
SIM_PHYSICS = "simulator: circuit solve + truth"
SIM_FORMAT = "simulator: waveform encoding"
FITS = "analysis: fits (measure_point)"
PLANNING = "analysis: capture planning"
JOURNAL = "store: journal write"
FSYNC = "store: fsync"
HDF5 = "store: HDF5 update"
STORE_OTHER = "store: row encoding, create, finish"
CHECK = "feasibility check"
DRIVER_READ = "drivers: waveform read + decode"


def install_run_profiler(profiler: Profiler) -> None:
    """Wrap the functions a run spends its wall time in (undo with profiler.undo())."""
    import benchseq.analysis as analysis
    import benchseq.check as check
    import benchseq.journal as journal
    import benchseq.sim.instruments as sim_instruments
    import benchseq.sim.world as world
    import benchseq.store as store
    from benchseq.drivers.scope import Scope as DriverScope

    profiler.patch(sim_instruments, "acquire_channel", SIM_SYNTH)
    profiler.patch(sim_instruments, "format_codes", SIM_FORMAT)
    profiler.patch(sim_instruments, "format_block", SIM_FORMAT)
    profiler.patch(world, "solve_point", SIM_PHYSICS)
    profiler.patch(world.SimulatedBench, "truth", SIM_PHYSICS)
    profiler.patch(analysis, "measure_point", FITS)
    profiler.patch(analysis, "plan_capture", PLANNING)
    profiler.patch(analysis, "suggest_range", PLANNING)
    profiler.patch(journal.JournalWriter, "append", JOURNAL)
    profiler.patch(journal, "fsync_fd", FSYNC)
    profiler.patch(journal, "fsync_directory", FSYNC)
    profiler.patch(store, "_fsync_file", FSYNC)
    profiler.patch(store.RunWriter, "_consolidate", HDF5)
    for name in ("append", "finish", "update_meta", "create"):
        if name == "create":
            original = store.RunWriter.__dict__["create"].__func__
            timed = profiler.wrap(STORE_OTHER, original)
            store.RunWriter.create = classmethod(timed)  # type: ignore[method-assign]
            profiler._undo.append(
                lambda o=original: setattr(store.RunWriter, "create", classmethod(o))
            )
        else:
            profiler.patch(store.RunWriter, name, STORE_OTHER)
    profiler.patch(check, "check_plan", CHECK)
    profiler.patch(DriverScope, "read_waveform", DRIVER_READ)


# -- bench time by activity -------------------------------------------------------------------

RANGING = "ranging capture"
PLANNED = "planned capture"
RERANGE = "re-range repeats"
TRIM_CAPTURE = "trim recaptures"
TRIM_SETTLE = "trim settling"
EXTENSION = "extension captures"
SETTLE = "settling"
OPERATING = "operating-point waits"
RAMP = "DC ramp + bias filter"
PIN_DC = "pin DC check"
FLOOR = "floor captures (plan)"
OTHER = "other"
ACTIVITIES = (
    SETTLE,
    OPERATING,
    PLANNED,
    RANGING,
    RERANGE,
    TRIM_CAPTURE,
    TRIM_SETTLE,
    EXTENSION,
    FLOOR,
    RAMP,
    PIN_DC,
    OTHER,
)


@dataclass
class PointClock:
    point_id: int
    seconds: dict[str, float] = field(default_factory=lambda: defaultdict(float))
    captures: int = 0  # _capture_ranged calls
    extension: bool = False
    top_sleeps: int = 0


class BenchClock:
    """Splits a Sequencer's virtual bench time by what it was spent on, per point.

    Wraps the session clock's sleep (every bench second passes through it on the
    simulator) and the Sequencer's methods that decide what a capture is for."""

    def __init__(self, sequencer: Any) -> None:
        self.points: list[PointClock] = []
        self.outside: dict[str, float] = defaultdict(float)  # power-up, before the first point
        self._tags: list[str] = []
        self._point: PointClock | None = None
        clock = sequencer.session.clock
        sleep = clock.sleep

        def tagged_sleep(seconds: float) -> None:
            tag = self._tags[-1] if self._tags else OTHER
            if seconds == 0:  # the in-process transport sleeps 0 s after each write
                sleep(seconds)
                return
            if self._point is not None and tag == "point":
                if getattr(sequencer, "activity", None) == "trim":
                    tag = TRIM_SETTLE
                elif getattr(sequencer, "activity", None) == "operating point":
                    tag = OPERATING
                elif hasattr(sequencer, "activity"):
                    tag = SETTLE
                else:
                    tag = SETTLE if self._point.top_sleeps == 0 else TRIM_SETTLE
                self._point.top_sleeps += 1
            target = self._point.seconds if self._point is not None else self.outside
            target[tag] += float(seconds)
            sleep(seconds)

        clock.sleep = tagged_sleep
        seq = sequencer

        def within(tag: str, fn: Callable[..., Any]) -> Callable[..., Any]:
            @functools.wraps(fn)
            def run(*args: Any, **kwargs: Any) -> Any:
                self._tags.append(tag)
                try:
                    return fn(*args, **kwargs)
                finally:
                    self._tags.pop()

            return run

        measure = seq._measure_point

        def measure_point(i: int, *args: Any, **kwargs: Any) -> Any:
            self._point = PointClock(int(seq.sweep.index[i]))
            self.points.append(self._point)
            self._tags.append("point")
            try:
                return measure(i, *args, **kwargs)
            finally:
                self._tags.pop()

        seq._measure_point = measure_point
        seq._ramp_supply = within(RAMP, seq._ramp_supply)
        seq._check_pin_dc = within(PIN_DC, seq._check_pin_dc)
        if hasattr(seq, "_floor_capture"):
            seq._floor_capture = within(FLOOR, seq._floor_capture)
        capture = seq._capture_ranged

        def capture_ranged(*args: Any, **kwargs: Any) -> Any:
            point = self._point
            assert point is not None
            activity = getattr(seq, "activity", None)
            if activity is not None:  # a sequencer that says what it is doing
                phase = {"capture": PLANNED, "trim": TRIM_CAPTURE, "top-up": EXTENSION}.get(
                    activity, OTHER
                )
            elif point.extension:
                phase = EXTENSION
            else:
                phase = (RANGING, PLANNED)[point.captures] if point.captures < 2 else TRIM_CAPTURE
            point.captures += 1
            self._tags.append(phase)
            tries = [0]
            acquire = seq._acquire

            def counted(*a: Any, **k: Any) -> Any:
                self._tags.append(phase if tries[0] == 0 else RERANGE)
                tries[0] += 1
                try:
                    return acquire(*a, **k)
                finally:
                    self._tags.pop()

            seq._acquire = counted
            try:
                return capture(*args, **kwargs)
            finally:
                seq._acquire = acquire
                self._tags.pop()

        seq._capture_ranged = capture_ranged
        if not hasattr(seq, "_longer_capture"):
            return
        longer = seq._longer_capture

        def longer_capture(*args: Any, **kwargs: Any) -> Any:
            plan = longer(*args, **kwargs)
            if plan is not None and self._point is not None:
                self._point.extension = True
            return plan

        seq._longer_capture = longer_capture

    def totals(self) -> dict[str, float]:
        out: dict[str, float] = defaultdict(float)
        for point in self.points:
            for tag, seconds in point.seconds.items():
                out[tag] += seconds
        return out


# -- the simulator's truth and the least capture it allows -----------------------------------


@dataclass(frozen=True)
class ChannelTruth:
    """One scope channel at one point: true amplitude and noise at the scope input."""

    amplitude: float  # V peak at the scope input (after probe and front-end response)
    node: Any  # benchseq.sim.synth.NodeSignal
    setup: Any  # benchseq.sim.synth.ChannelSetup at the range the sequencer's rule picks
    probe: float

    def density(self, dt: float, f: float) -> float:
        """One-sided noise density at f (V²/Hz at the scope input) for sample interval dt,
        as the simulator generates it (sim/synth.py acquire_channel / _shaped_noise): the
        front end's white noise per sample, the node's noise (folded white when the band
        aliases completely, else shaped with its aliased remainder) and the quantiser's
        q²/12 (the front-end noise dithers it on every range of the demo scope)."""
        node, ch, probe = self.node, self.setup, self.probe
        band = min(node.noise_bandwidth, ch.analog_bandwidth, ch.bandwidth_limit or math.inf)
        per_sample = ch.noise_rms**2 + (ch.full_scale / 256.0) ** 2 / 12.0
        coloured = 0.0
        if node.white_noise > 0 and node.flicker_corner <= 0 and band >= 1.0 / (2.0 * dt):
            folded = node.white_noise / probe * math.sqrt(0.5 * math.pi * band)
            per_sample += (folded * (1.0 + ch.gain_error)) ** 2
        elif node.white_noise > 0:
            fs = 1.0 / dt
            white = node.white_noise / probe
            psd = white**2 / (1.0 + (f / node.noise_bandwidth) ** 2)
            if node.flicker_corner > 0:
                psd *= 1.0 + node.flicker_corner / f
            psd *= float(ch.power_response(np.array([f]))[0])
            alias = white**2 * max(0.0, 0.5 * math.pi * band - fs / 2.0) / (fs / 2.0)
            coloured = psd + alias * (1.0 + ch.gain_error) ** 2
        return 2.0 * per_sample * dt + coloured


@dataclass(frozen=True)
class PointTruth:
    frequency: float
    pin: ChannelTruth
    output: ChannelTruth
    rejection_db: float


class TruthBench:
    """A fresh simulated bench set to each point's state through its own SCPI handlers; the
    pin ripple is put on target by scaling the generator (the circuit is linear below its
    limits; a second solve confirms)."""

    def __init__(self, bench: Any, fill: float) -> None:
        from benchseq.sim.world import SimulatedBench

        self.bench = bench
        self.fill = fill
        self.sim = SimulatedBench.from_scenario(bench.simulation, bench=bench, seed=0)
        self.sim.handler("supply").handle("OUTP1 ON")
        load = "50" if bench.generator.load_mode.replace(" ", "").startswith("50") else "INF"
        self.sim.handler("generator").handle(f"OUTP1:LOAD {load};:OUTP1 ON")
        setup = bench.scope
        bw = setup.bandwidth_limit
        for ch, coupling in (
            (setup.pin.channel, setup.pin.coupling),
            (setup.output.channel, setup.output.coupling),
        ):
            command = f"INP{ch}:COUP {coupling}"
            if bw:
                command += f";:INP{ch}:FILT:LPAS:FREQ {bw:g};:INP{ch}:FILT:LPAS:STAT ON"
            self.sim.handler("scope").handle(command)
        self.ranges = sorted(self.sim.scope.ranges)

    def point(self, dc: float, frequency: float, ripple_peak: float) -> PointTruth:
        sim = self.sim
        sim.handler("supply").handle(f"SOUR1:VOLT {dc:.9g}")
        gen = sim.handler("generator")
        gen.handle(f"SOUR1:FREQ {frequency:.12g};:SOUR1:VOLT 0.1")
        for _ in range(3):
            truth = sim.truth()
            pin = abs(truth.pin_ripple)
            if pin <= 0 or abs(pin / ripple_peak - 1) < 1e-4:
                break
            amplitude = sim.generator.settings.amplitude_pp * ripple_peak / pin
            gen.handle(f"SOUR1:VOLT {amplitude:.9g}")
        truth = sim.truth()
        setup = self.bench.scope
        channels = []
        for spec, node, phasor in (
            (setup.pin, "pin", truth.pin_ripple),
            (setup.output, "output", truth.output_ripple),
        ):
            probe = sim.probe_attenuation(spec.channel)
            signal = sim.node_signal(node)
            amplitude_in = abs(phasor) / probe
            # the sequencer's range rule (_range_for): the smallest range holding
            # 2(A + 4σ) at the fill factor; σ = 0 on the pin, the front end's on the output
            for chosen in self.ranges:
                sim.handler("scope").handle(f"SENS:VOLT{spec.channel}:RANG:PTP {chosen:.6g}")
                ch = sim.scope.channel_setup(spec.channel)
                noise = ch.noise_rms if node == "output" else 0.0
                if (
                    suggest_range(2.0 * (amplitude_in + 4.0 * noise), self.ranges, self.fill)
                    <= chosen
                ):
                    break
            seen = abs(phasor * ch.response(np.array([truth.frequency]))[0]) / probe
            channels.append(ChannelTruth(seen, signal, ch, probe))
        return PointTruth(truth.frequency, channels[0], channels[1], truth.rejection_db)


@dataclass(frozen=True)
class LeastCapture:
    bench_time: float  # s: records × (record duration + re-arm)
    sample_interval: float
    record_length: int
    records: int  # triggered records in all (averaged or read separately: the same time)
    uncertainty_db: float
    meets_target: bool


def least_capture(
    truth: PointTruth,
    scope: Any,
    target_db: float,
    min_cycles: int,
    max_time_s: float,
    min_samples_per_cycle: int = 8,
) -> LeastCapture:
    """The least bench time over every offered (interval, length, record count) whose
    Cramér–Rao uncertainty at known frequency meets ``target_db``:

        u_dB² = (20/ln 10)²·(S_pin/A_pin² + S_out/A_out²)/T_recorded   (capture.py)

    with the simulator's true amplitudes and noise densities. A record holds at least
    ``min_cycles`` whole cycles and the scope's shortest record; ``min_samples_per_cycle``
    is the planner's rule. When no capture within ``max_time_s`` meets the target, the most
    accurate one within it (as the planner does), marked unmet."""
    f = truth.frequency
    best: LeastCapture | None = None
    fallback: LeastCapture | None = None
    lengths = sorted(int(n) for n in scope.record_lengths)
    rearm = float(scope.rearm_time)
    for dt in sorted(float(x) for x in scope.sample_intervals):
        if dt * f * min_samples_per_cycle > 1.0:
            continue
        weight = DB_PER_NEPER**2 * (
            truth.pin.density(dt, f) / truth.pin.amplitude**2
            + truth.output.density(dt, f) / truth.output.amplitude**2
        )
        needed = weight / target_db**2  # s of recorded signal
        for length in lengths:
            duration = length * dt
            if duration < min_cycles / f * (1 - 1e-9):
                continue
            records = max(1, math.ceil(needed / duration * (1 - 1e-12)))
            bench = records * (duration + rearm)
            u = math.sqrt(weight / (records * duration))
            if bench <= max_time_s:
                if best is None or bench < best.bench_time:
                    best = LeastCapture(bench, dt, length, records, u, True)
            else:
                fit = int(max_time_s // (duration + rearm))
                if fit >= 1:
                    u_fit = math.sqrt(weight / (fit * duration))
                    if fallback is None or u_fit < fallback.uncertainty_db:
                        fallback = LeastCapture(
                            fit * (duration + rearm), dt, length, fit, u_fit, False
                        )
    if best is not None:
        return best
    if fallback is not None:
        return fallback
    raise ValueError(f"no offered timebase records {min_cycles} cycles of {f:g} Hz")


# -- small helpers ------------------------------------------------------------------------


def stratified(frequency: np.ndarray, count: int) -> np.ndarray:
    """``count`` run-order indices stratified over frequency: the planned frequencies get
    equal shares (±1), and each frequency's share is spread evenly over the other axes'
    combinations (DC, ripple, load) it occurs in. Returned in run order."""
    frequency = np.asarray(frequency, dtype=float)
    total = frequency.size
    if count >= total:
        return np.arange(total)
    values = np.unique(frequency)
    picks = np.floor((np.arange(count) + 0.5) * values.size / count).astype(np.int64)
    chosen = []
    for k, value in enumerate(values):
        share = int(np.count_nonzero(picks == k))
        where = np.nonzero(frequency == value)[0]
        if share == 0 or where.size == 0:
            continue
        step = where.size / share
        offset = k % max(1, int(step))  # neighbouring frequencies start at different combos
        chosen.extend(where[(offset + np.floor(np.arange(share) * step).astype(int)) % where.size])
    return np.unique(np.asarray(chosen, dtype=np.int64))


def subset_sweep(sweep: Any, keep: np.ndarray) -> Any:
    """The same Sweep restricted to the points ``keep`` (ids kept: reseeding stays per id)."""
    from benchseq.plan import Sweep

    return Sweep(
        index=sweep.index[keep],
        frequency=sweep.frequency[keep],
        ripple_peak=sweep.ripple_peak[keep],
        dc_level=sweep.dc_level[keep],
        load_current=sweep.load_current[keep],
        ripple_convention=tuple(sweep.ripple_convention[int(i)] for i in keep),
    )


def restrict(sequencer: Any, keep: np.ndarray) -> None:
    """Make ``sequencer`` measure only the plan points at positions ``keep`` (ids kept, so
    the simulator's per-point reseeding is unchanged), with their linearity repeats when the
    sequencer runs those (attributes repeat_of / ripple_factor / run_order)."""
    sweep = sequencer.sweep
    repeat_of = getattr(sequencer, "repeat_of", None)
    if repeat_of is None:
        sequencer.sweep = subset_sweep(sweep, keep)
        return
    ids = {int(sweep.index[k]) for k in keep}
    repeats = [k for k in range(len(sweep)) if repeat_of[k] >= 0 and int(repeat_of[k]) in ids]
    positions = np.array(sorted({int(k) for k in keep} | set(repeats)), dtype=np.int64)
    sequencer.sweep = subset_sweep(sweep, positions)
    sequencer.repeat_of = repeat_of[positions]
    if hasattr(sequencer, "ripple_factor"):
        sequencer.ripple_factor = sequencer.ripple_factor[positions]
    order: list[int] = []  # each point followed at once by its repeats, as the plan's order
    for k, base in enumerate(sequencer.repeat_of):
        if base < 0:
            order.append(k)
            point_id = int(sequencer.sweep.index[k])
            order.extend(j for j, b in enumerate(sequencer.repeat_of) if b == point_id)
    sequencer.run_order = order


def run_sweep(
    plan: Any,
    bench: Any,
    path: Path,
    keep: np.ndarray | None = None,
    seed: int = 0,
    attach: Callable[[Any], Any] | None = None,
) -> tuple[Any, Any]:
    """benchseq.runner.run_prepared on ``plan`` (or its points ``keep`` only); ``attach`` is
    called with the Sequencer before it runs. Returns (outcome, what attach returned)."""
    import benchseq.runner as runner

    original = runner.Sequencer
    made: dict[str, Any] = {}

    def build(*args: Any, **kwargs: Any) -> Any:
        sequencer = original(*args, **kwargs)
        if keep is not None:
            restrict(sequencer, keep)
        made["attached"] = attach(sequencer) if attach is not None else None
        return sequencer

    runner.Sequencer = build  # type: ignore[assignment,misc]
    try:
        outcome, _ = runner.run_prepared(plan, bench, Path(path), force=True, seed=seed)
    finally:
        runner.Sequencer = original  # type: ignore[misc]
    return outcome, made.get("attached")


def percentile(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values, dtype=float), q)) if values else math.nan


def check_noise_model(
    truth_bench: TruthBench,
    dc: float,
    frequency: float,
    ripple_peak: float,
    dt: float,
    length: int,
    trials: int,
) -> list[tuple[str, float, float]]:
    """The bound's noise model against the simulator itself: the spread of fitted amplitudes
    over ``trials`` synthesised records (one channel at a time, known frequency) beside the
    predicted σ_A = √(S(f)/T). Returns (channel, predicted, empirical) in V at the scope input."""
    from benchseq.analysis import fit_sine

    truth = truth_bench.point(dc, frequency, ripple_peak)
    sim = truth_bench.sim
    sim.handler("scope").handle(
        f"SENS:SWE:OINT {dt:.6g};:SENS:SWE:POIN {length:d};:TRIG:SOUR EXT;:SENS:AVER:STAT OFF"
    )
    setup = truth_bench.bench.scope
    out = []
    for name, spec, channel in (
        ("pin", setup.pin, truth.pin),
        ("output", setup.output, truth.output),
    ):
        amplitudes = []
        for _ in range(trials):
            sim.handler("scope").handle("INIT:IMM")
            record = sim.scope.records[spec.channel]
            volts = record.codes.astype(np.float64) * (record.full_scale / 256.0)
            amplitudes.append(fit_sine(volts, 1.0 / dt, truth.frequency).amplitude)
        predicted = math.sqrt(channel.density(dt, truth.frequency) / (length * dt))
        out.append((name, predicted, float(np.std(amplitudes, ddof=1))))
    return out
