"""Capture planning: timebase, record length and averaging for a target uncertainty.

Per channel the fitted amplitude's relative variance is S(f)/(T·A²), S the one-sided noise
density at f after aliasing and T the total recorded time (Kay, Estimation Theory, ch. 3: σ_A² ≈ S/T,
equivalently N ≥ 2(σ/A)²/u_rel² white samples). The rejection's uncertainty adds both
channels and the calibration in quadrature (GUM, JCGM 100 §5.1.2):

    u_dB² = (20/ln 10)²·[(S_pin/A_pin² + S_out/A_out²)/T + u_cal²]

Every offered (sample interval, record length) is tried; triggered averages M multiply T
(each record costs its duration plus the re-arm time); a record must hold min_cycles and
each cycle ≥ min_samples_per_cycle samples. The plan with the least bench time that meets
the target wins; if none does within max_time_s, the most accurate one that fits does.
Among plans of that same least bench time (a cycle-bound point: min_cycles, not noise, sets
its length, so slower sampling of the same record costs no bench time), ``lean`` takes the
fewest samples read whose expected uncertainty stays within LEAN_MARGIN of the target and
that keeps LEAN_SAMPLES_PER_CYCLE samples per cycle (harmonics 2-5 stay below Nyquist for
the distortion fit): less to transfer from the scope and to fit, at equal bench time.
The point is measured at the planned frequency: the three-parameter sine fit at a known
frequency (IEEE Std 1057, 4.1.3.1) does not need whole cycles in the record. Only where the
nearest whole number of cycles J/T (IEEE Std 1241 coherent sampling, J = round(f·T)) lies
within the plan's frequency tolerance of f (and within ``max_shift_hz``, which keeps distinct
planned frequencies distinct) is the generator moved there, since a coherent record keeps
other spurs out of the neighbour noise floor. A record of whole 100 ms multiples still rejects
50/60 Hz pickup either way.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

from benchseq.analysis.errors import AnalysisError
from benchseq.analysis.rejection import DB_PER_NEPER

DEFAULT_MIN_SAMPLES_PER_CYCLE = 8
DEFAULT_FREQUENCY_TOLERANCE = 1e-3  # relative: a coherent move of at most 0.1 %
LEAN_MARGIN = 0.5  # a lean plan's expected u stays within this share of the target: the
#                    noise may then be 4x the guess in power before a top-up is needed
LEAN_SAMPLES_PER_CYCLE = 12  # harmonic 5 under 0.95 x Nyquist (distortion.NYQUIST_MARGIN)


class ScopeLimits(Protocol):
    """What the planner needs to know of a scope (ScopeCapabilities has these); read-only, so
    frozen dataclasses satisfy it."""

    @property
    def sample_intervals(self) -> Sequence[float]: ...
    @property
    def record_lengths(self) -> Sequence[int]: ...
    @property
    def max_averages(self) -> int: ...
    @property
    def rearm_time(self) -> float: ...


@dataclass(frozen=True)
class ScopeTimebase:
    """A plain ScopeLimits, for tests and for callers without a driver."""

    sample_intervals: Sequence[float]
    record_lengths: Sequence[int]
    max_averages: int = 1
    rearm_time: float = 0.0


@dataclass(frozen=True)
class CapturePlan:
    """One point's capture. frequency is the generator frequency to set: the planned one, or
    the coherent J/T when that lies within the tolerance (``coherent``)."""

    sample_interval: float  # s
    record_length: int  # samples per record
    averages: int  # triggered records the scope averages into one waveform
    records: int  # waveforms to read (averaged sample-wise by the caller)
    frequency: float  # Hz to set: requested_frequency, or J/T within the tolerance
    requested_frequency: float  # Hz
    cycles: float  # periods in one record: J (whole) when coherent, else f·T
    expected_uncertainty_db: float  # standard uncertainty this plan should reach
    capture_time: float  # s of signal recorded: records·averages·record_length·interval
    bench_time: float  # s including re-arm times
    limited_by: str  # "cycles", "noise", "max_time" (target unmet) or "calibration" (unmet)
    meets_target: bool
    coherent: bool = False  # the record holds a whole number of periods of ``frequency``

    @property
    def record_duration(self) -> float:
        """T = N·Δt of one record (s)."""
        return self.record_length * self.sample_interval


def coherent_frequency(
    frequency: float,
    duration: float,
    tolerance: float = DEFAULT_FREQUENCY_TOLERANCE,
    max_shift_hz: float = math.inf,
) -> tuple[float, float, bool]:
    """(frequency to set, periods per record, coherent?) for a record of ``duration`` s.

    The nearest whole number of periods J = round(f·T) (at least 1) gives J/T; it is taken
    when |J/T − f| ≤ tolerance·f and ≤ max_shift_hz, else f itself (the fit does not need
    whole cycles). A zero tolerance never moves the frequency."""
    if not (frequency > 0 and duration > 0):
        raise AnalysisError("a coherent frequency needs a positive frequency and duration")
    if tolerance < 0 or max_shift_hz < 0:
        raise AnalysisError("the frequency tolerance cannot be negative")
    cycles = max(1, round(frequency * duration))
    moved = cycles / duration
    shift = abs(moved - frequency)
    if shift <= tolerance * frequency and shift <= max_shift_hz:
        return moved, float(cycles), True
    return frequency, frequency * duration, False


def at_frequency(
    plan: CapturePlan,
    frequency: float,
    tolerance: float = DEFAULT_FREQUENCY_TOLERANCE,
    max_shift_hz: float = math.inf,
) -> CapturePlan:
    """``plan`` with its generator frequency chosen for the planned ``frequency`` under
    ``tolerance`` and ``max_shift_hz`` (coherent_frequency)."""
    chosen, cycles, coherent = coherent_frequency(
        frequency, plan.record_duration, tolerance, max_shift_hz
    )
    return dataclasses.replace(
        plan,
        frequency=chosen,
        requested_frequency=frequency,
        cycles=cycles,
        coherent=coherent,
    )


def _effective_density(
    interval: float, sigma: float | None, density: float | None, bandwidth: float | None
) -> float:
    """One-sided noise density at f after aliasing (V²/Hz) for this sample interval."""
    nyquist = 0.5 / interval
    if bandwidth is None:
        if density is not None:
            return density**2
        assert sigma is not None
        return sigma**2 / nyquist
    white = density**2 if density is not None else (sigma or 0.0) ** 2 / bandwidth
    return white * max(1.0, bandwidth / nyquist)


def plan_capture(
    scope: ScopeLimits,
    frequency: float,
    pin_amplitude: float,
    output_amplitude: float,
    target_uncertainty_db: float,
    min_cycles: int = 10,
    max_time_s: float = 10.0,
    noise_sigma: float | None = None,
    noise_density: float | None = None,
    noise_bandwidth: float | None = None,
    pin_noise_sigma: float | None = None,
    pin_noise_density: float | None = None,
    calibration_uncertainty: float = 0.0,
    min_samples_per_cycle: int = DEFAULT_MIN_SAMPLES_PER_CYCLE,
    density_at_f: float = 0.0,
    pin_density_at_f: float = 0.0,
    max_record_time: float | None = None,
    frequency_tolerance: float = DEFAULT_FREQUENCY_TOLERANCE,
    lean: bool = False,
) -> CapturePlan:
    """Least-bench-time capture of one point (amplitudes peak V at the scope input).

    Noise (output channel; the pin channel uses the same unless given): noise_sigma (V rms
    per sample) or noise_density (V/√Hz, one-sided), white up to noise_bandwidth (Hz) and
    aliased by sampling below 2× that; without a bandwidth, noise_sigma is taken as white at
    whatever rate is chosen (a scope's own quantiser-like noise). density_at_f and
    pin_density_at_f (V²/Hz) add a part that does not depend on the sample rate (coloured
    noise at f: flicker, a node's own noise) to the output's and the pin's density.

    max_record_time (s) keeps records at most this long unless none that short holds
    min_cycles (then the shortest that does): a capture meant to be topped up with more
    records of the same timebase wants records much shorter than its whole need.

    frequency_tolerance (relative) bounds the move to a coherent J/T (coherent_frequency);
    outside it the plan keeps the requested frequency.

    lean: among the plans of the least bench time, the fewest samples read (see above).
    """
    if not (frequency > 0 and pin_amplitude > 0 and output_amplitude > 0):
        raise AnalysisError(
            "capture planning needs a positive frequency and positive expected amplitudes"
        )
    if (noise_sigma is None) == (noise_density is None):
        raise AnalysisError(
            "give the expected noise as exactly one of noise_sigma or noise_density"
        )
    if target_uncertainty_db <= 0 or min_cycles < 1 or max_time_s <= 0:
        raise AnalysisError("target uncertainty, minimum cycles and maximum time must be positive")
    if pin_noise_sigma is None and pin_noise_density is None:
        pin_noise_sigma, pin_noise_density = noise_sigma, noise_density
    cal_db2 = (DB_PER_NEPER * calibration_uncertainty) ** 2
    budget = target_uncertainty_db**2 - cal_db2
    lengths = sorted(int(n) for n in scope.record_lengths)
    intervals = sorted(float(dt) for dt in scope.sample_intervals)
    max_averages = max(int(scope.max_averages), 1)
    min_record_time = min_cycles / frequency
    if density_at_f < 0 or pin_density_at_f < 0:
        raise AnalysisError("a noise density cannot be negative")
    longest = math.inf
    if max_record_time is not None:
        holding = [
            n * dt
            for dt in intervals
            for n in lengths
            if n * dt >= min_record_time * (1 - 1e-9)
            and dt * frequency * min_samples_per_cycle <= 1.0
        ]
        longest = max(max_record_time, min(holding, default=math.inf))
    best: tuple[tuple[float, ...], CapturePlan] | None = None
    meeting: list[tuple[float, int, float, float, int, int, int, float]] = []
    for dt in intervals:
        if dt * frequency * min_samples_per_cycle > 1.0:
            continue
        weight = (
            _effective_density(dt, pin_noise_sigma, pin_noise_density, noise_bandwidth)
            + pin_density_at_f
        ) / pin_amplitude**2
        weight += (
            _effective_density(dt, noise_sigma, noise_density, noise_bandwidth) + density_at_f
        ) / output_amplitude**2
        needed = DB_PER_NEPER**2 * weight / budget if budget > 0 else math.inf
        for length in lengths:
            duration = length * dt
            if duration < min_record_time * (1 - 1e-9) or duration > longest * (1 + 1e-9):
                continue
            total = (
                max(1, math.ceil(needed / duration * (1 - 1e-12)))
                if math.isfinite(needed)
                else max_averages
            )
            records = math.ceil(total / max_averages)
            averages = math.ceil(total / records)
            bench = records * averages * (duration + scope.rearm_time)
            if bench > max_time_s and total > 1:
                # the time cap binds: as many averages as fit
                fit_in = max(1, int(max_time_s // (duration + scope.rearm_time)))
                records = math.ceil(fit_in / max_averages)
                averages = max(1, fit_in // records)
                bench = records * averages * (duration + scope.rearm_time)
            recorded = records * averages * duration
            u = math.sqrt(DB_PER_NEPER**2 * weight / recorded + cal_db2)
            meets = u <= target_uncertainty_db * (1 + 1e-9) and bench <= max_time_s
            within = bench <= max_time_s
            if meets and lean:
                meeting.append(
                    (bench, records * length, u, dt, length, records, averages, recorded)
                )
            key = (
                0.0 if meets else 1.0,
                0.0 if within else 1.0,
                bench if meets else (u if within else duration),
                u,
                float(length),
            )
            if best is None or key < best[0]:
                if meets:
                    limited = "cycles" if needed <= min_record_time else "noise"
                else:
                    limited = "calibration" if budget <= 0 else "max_time"
                chosen, cycles, coherent = coherent_frequency(
                    frequency, duration, frequency_tolerance
                )
                best = (
                    key,
                    CapturePlan(
                        sample_interval=dt,
                        record_length=length,
                        averages=averages,
                        records=records,
                        frequency=chosen,
                        requested_frequency=frequency,
                        cycles=cycles,
                        expected_uncertainty_db=u,
                        capture_time=recorded,
                        bench_time=bench,
                        limited_by=limited,
                        meets_target=meets,
                        coherent=coherent,
                    ),
                )
    if best is not None and lean and best[1].meets_target:
        chosen_plan = best[1]
        fewest = [
            m
            for m in meeting
            if m[0] <= chosen_plan.bench_time * (1 + 1e-9)
            and m[2]
            <= max(chosen_plan.expected_uncertainty_db, LEAN_MARGIN * target_uncertainty_db)
            and m[3] * frequency * LEAN_SAMPLES_PER_CYCLE <= 1.0 + 1e-9
        ]
        if fewest:
            bench, _, u, dt, length, records, averages, recorded = min(
                fewest, key=lambda m: (m[1], m[2])
            )
            if records * length < chosen_plan.records * chosen_plan.record_length:
                chosen, cycles, coherent = coherent_frequency(
                    frequency, length * dt, frequency_tolerance
                )
                return dataclasses.replace(
                    chosen_plan,
                    sample_interval=dt,
                    record_length=length,
                    averages=averages,
                    records=records,
                    frequency=chosen,
                    cycles=cycles,
                    coherent=coherent,
                    expected_uncertainty_db=u,
                    capture_time=recorded,
                    bench_time=bench,
                )
    if best is None:
        raise AnalysisError(
            f"no offered timebase records {min_cycles} cycles of {frequency:.6g} Hz with "
            f"{min_samples_per_cycle} samples per cycle: the frequency is out of this scope's reach"
        )
    return best[1]
