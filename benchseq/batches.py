"""A point's capture in batches of one timebase, pooled until it meets the target.

The sequencer plans a point's capture from what the last point showed (its noise density at
f split into a part that scales with the sample interval and a coloured part that does not,
and its rejection), then takes it in batches of triggered records of ONE timebase (sample
interval, record length, generator frequency): the first batch, about half the
prediction, ranges both channels, shows the pin ripple to trim and the noise this point
really has; top-ups add as many records as the pooled records show are still needed.
Records of one timebase on one trigger average sample-wise, so the pool is a weighted sum
(constant memory, however many records).

Why pooling does not bias the rejection: the size of a top-up depends on the amplitude the
pool read so far, so the weight of the early records correlates with their error. To first
order that cancels; what is left is about 2·s² of the amplitude (s its final relative
standard uncertainty), 0.002 dB at a 0.1 dB target (a Monte Carlo of the two-stage rule,
noted in the contributor guide). Replacing a capture by a longer one on the strength of its
own amplitude, instead, keeps the captures that read high: a first-order bias.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from benchseq import analysis

if TYPE_CHECKING:
    from benchseq.drivers.scope import Waveform

PROBE_SHARE = 0.5  # the first batch takes this share of the predicted triggered records
RECORD_GRAIN = 4  # a noise-bound prediction is split into at least this many records
TOP_UP_MARGIN = 1.05  # a top-up aims this far past the need the pool shows
DETECT_RELATIVE = 0.115  # undetected output: aim for σ_A/A of 1 dB at the expected level
MAX_TOP_UPS = 3
MAX_DETECT_TOP_UPS = 2  # top-ups spent looking for an output still under the floor; the
#                         last of them takes all of the plan's max_time that is left
NOISE_SHARE = 0.5  # the noise part aims at least this share of the target (see top_up)


@dataclass(frozen=True)
class NoiseGuess:
    """What the last point showed of the noise, to plan this one (V at the scope input).

    white_sigma: rms per sample of the part that is white at any sample rate (density
    2σ²Δt); coloured: V²/Hz at f that does not depend on the rate; pin_sigma: the pin
    channel's rms per sample, taken as white."""

    white_sigma: float
    coloured: float = 0.0
    pin_sigma: float | None = None

    @classmethod
    def from_point(
        cls,
        output_floor: float,
        output_noise: float,
        pin_sigma: float,
        sample_interval: float,
        record_length: int,
        triggered: int,
    ) -> NoiseGuess | None:
        """From a stored point: the floor σ_c at f over T recorded seconds is √(S/T), so
        S = σ_c²·T; the white part 2σ²Δt (σ the fit's residual rms) is taken out of it and
        the rest is coloured. None when the point does not tell (NaN, zero)."""
        values = (output_floor, output_noise, sample_interval)
        if not all(math.isfinite(v) and v > 0 for v in values) or record_length < 1:
            return None
        triggered = max(int(triggered), 1)
        recorded = record_length * sample_interval * triggered
        density = output_floor**2 * recorded
        coloured = max(density - 2.0 * output_noise**2 * sample_interval, 0.0)
        pin = (
            pin_sigma * math.sqrt(record_length * triggered / 2.0)
            if math.isfinite(pin_sigma) and pin_sigma > 0
            else None
        )
        return cls(output_noise, coloured, pin)


def predicted_plan(
    scope: analysis.ScopeTimebase,
    frequency: float,
    pin: float,
    output: float,
    noise: NoiseGuess,
    target_db: float,
    min_cycles: int,
    max_time_s: float,
    lean: bool = False,
) -> analysis.CapturePlan:
    """The least capture meeting ``target_db`` under ``noise``, with records short enough
    (a RECORD_GRAIN-th of the need, or the shortest holding min_cycles) that top-ups of
    whole records land close to what the point turns out to need. ``lean``: at that bench
    time the fewest samples (analysis.plan_capture) - for a noise a point has shown, not a
    first guess: top-ups of a slow timebase buy less uncertainty per second when the noise
    turns out larger."""
    kwargs: dict[str, Any] = dict(
        min_cycles=min_cycles,
        max_time_s=max_time_s,
        noise_sigma=noise.white_sigma,
        density_at_f=noise.coloured,
        pin_noise_sigma=noise.pin_sigma,
        lean=lean,
    )
    whole = analysis.plan_capture(scope, frequency, pin, output, target_db, **kwargs)
    if whole.limited_by == "cycles":
        return whole
    return analysis.plan_capture(
        scope,
        frequency,
        pin,
        output,
        target_db,
        max_record_time=whole.capture_time / RECORD_GRAIN,
        **kwargs,
    )


def predicted_bench_times(
    scope: analysis.ScopeTimebase,
    frequency: Any,
    pin: Any,
    output: Any,
    white_sigma: Any,
    coloured: Any,
    pin_sigma: Any,
    target_db: Any,
    min_cycles: int,
    max_time_s: float,
    lean: bool = False,
) -> np.ndarray:
    """``predicted_plan(...).bench_time`` for many points at once (arrays; ``pin_sigma``
    NaN where the guess has none; ``target_db`` one value or one per point), from the same
    two-step choice."""
    from benchseq.analysis.capture_many import plan_capture_many

    f, p, o, w, c, s, t = (
        np.asarray(x, dtype=float)
        for x in (frequency, pin, output, white_sigma, coloured, pin_sigma, target_db)
    )
    whole = plan_capture_many(scope, f, p, o, t, min_cycles, max_time_s, w, c, s, lean=lean)
    bench = whole.bench_time.copy()
    again = ~whole.cycles_bound
    if np.any(again):
        f, p, o, w, c, s, t = (
            np.broadcast_to(x, bench.shape)[again] for x in (f, p, o, w, c, s, t)
        )
        bench[again] = plan_capture_many(
            scope,
            f,
            p,
            o,
            t,
            min_cycles,
            max_time_s,
            w,
            c,
            s,
            max_record_time=whole.capture_time[again] / RECORD_GRAIN,
            lean=lean,
        ).bench_time
    return bench


def batch(
    plan: analysis.CapturePlan, triggered: int, max_averages: int, rearm: float
) -> analysis.CapturePlan:
    """``plan``'s timebase with ``triggered`` records (averaged in the scope up to
    ``max_averages``, the rest read as separate waveforms)."""
    triggered = max(int(triggered), 1)
    records = math.ceil(triggered / max(max_averages, 1))
    averages = math.ceil(triggered / records)
    duration = plan.record_duration
    return dataclasses.replace(
        plan,
        records=records,
        averages=averages,
        capture_time=records * averages * duration,
        bench_time=records * averages * (duration + rearm),
    )


def within(
    plan: analysis.CapturePlan, most: int, scope: analysis.ScopeTimebase
) -> analysis.CapturePlan:
    """``plan`` (from ``batch``) with at most ``most`` triggered records: batch() reads
    ⌈n/max_averages⌉ waveforms of equal averages, which can round n up past what the
    plan's time has room for."""
    if plan.records * plan.averages <= most:
        return plan
    averages = max(1, most // plan.records)
    duration = plan.record_duration
    return dataclasses.replace(
        plan,
        averages=averages,
        capture_time=plan.records * averages * duration,
        bench_time=plan.records * averages * (duration + scope.rearm_time),
    )


def probe_records(plan: analysis.CapturePlan) -> int:
    """Triggered records of the first batch: about PROBE_SHARE of the prediction."""
    return max(1, int(plan.records * plan.averages * PROBE_SHARE))


def _scaling(wave: Waveform) -> tuple[float, float]:
    """(volts per code at the probe tip, volts at code 0 at the tip) of a driver Waveform."""
    vpc = float(wave.volts_per_code)
    probe = float(wave.probe)
    offset = float(wave.volts_at_zero - wave.code_offset * wave.volts_per_code)
    return vpc * probe, offset * probe


def _whole(ratio: float) -> int | None:
    k = round(ratio)
    return k if k >= 1 and abs(ratio - k) <= 1e-9 * k else None


class Pool:
    """Records of one timebase pooled sample-wise, as integer sums of converter codes.

    Each channel's sum is kept in the finest code step seen (an 8-bit record's codes are
    whole multiples of an averaged 16-bit transfer's step on the same range), so the pooled
    record is exact: volts = samples·scale + offset with scale = step / records. A batch
    whose scaling is no whole multiple (another range or offset) is added in volts and
    the pool is requantised at step / records: close (far below the noise), not exact."""

    def __init__(self) -> None:
        self._sums: list[np.ndarray] = []
        self._step: list[float] = []
        self._offset: list[float] = []
        self._low: list[int] = []  # the sums' code range: Σ per record of its code_min ...
        self._high: list[int] = []  # ... and code_max, in the step
        self.exact = True
        self.triggered = 0  # triggered records in the pool
        self.bench_time = 0.0  # s the pooled batches took
        self.batches = 0
        self.interval = math.nan

    def add(self, pins: list, outs: list, interval: float, averages: int, bench: float) -> None:
        """Waveforms (benchseq.drivers.scope.Waveform) of one batch, each the scope's
        average of ``averages`` triggered records."""
        a = int(averages)
        for k, waves in enumerate((pins, outs)):
            for wave in waves:
                self._add_one(k, wave, a)
        self.triggered += a * len(pins)
        self.bench_time += bench
        self.batches += 1
        self.interval = float(interval)

    def _add_one(self, k: int, wave: Waveform, weight: int) -> None:
        step, offset = _scaling(wave)
        codes = np.asarray(wave.codes, dtype=np.int64)
        low = int(wave.code_min) * weight
        high = int(wave.code_max) * weight
        if k == len(self._sums):
            self._sums.append(codes * weight)
            self._step.append(step)
            self._offset.append(offset)
            self._low.append(low)
            self._high.append(high)
            return
        if codes.shape != self._sums[k].shape:
            raise ValueError("a pooled batch must have the pool's record length")
        if offset == self._offset[k]:
            coarser = _whole(step / self._step[k])
            finer = _whole(self._step[k] / step)
            if finer is not None and finer > 1:  # this batch is finer: rescale the pool
                self._sums[k] *= finer
                self._low[k] *= finer
                self._high[k] *= finer
                self._step[k] = step
                coarser = 1
            if coarser is not None:
                self._sums[k] += codes * (weight * coarser)
                self._low[k] += low * coarser
                self._high[k] += high * coarser
                return
        # no whole multiple: add in volts, requantised at the pool's step and offset
        volts = (codes * step + (offset - self._offset[k])) * weight
        self._sums[k] = self._sums[k] + np.rint(volts / self._step[k]).astype(np.int64)
        self._low[k] += round(low * step / self._step[k])
        self._high[k] += round(high * step / self._step[k])
        self.exact = False

    def kept(self, channel: int) -> tuple[np.ndarray, float, float, tuple[int, int]]:
        """Channel 0 (pin) or 1 (output) pooled: (integer samples, scale, offset, code
        range of the samples); volts = samples·scale + offset."""
        if self.batches == 0:
            raise ValueError("the pool is empty")
        sums = self._sums[channel]
        dtype = np.int32 if np.abs(sums).max(initial=0) < 2**31 - 1 else np.int64
        return (
            sums.astype(dtype),
            self._step[channel] / self.triggered,
            self._offset[channel],
            (self._low[channel], self._high[channel]),
        )

    def mean(self) -> tuple[np.ndarray, np.ndarray]:
        """The pooled pin and output records, V at the probe tips."""
        out = []
        for k in (0, 1):
            samples, scale, offset, _ = self.kept(k)
            out.append(samples.astype(np.float64) * scale + offset)
        return out[0], out[1]


def code_range(full_scale: float, scale: float, dtype: np.dtype) -> tuple[int, int]:
    """The code range of stored samples from range / scale: an 8-bit (256 codes) or 16-bit
    (65,536) transfer, or a pool of k such records (k·256, k·65,536); else the sample type."""
    if math.isfinite(full_scale) and scale > 0:
        codes = full_scale / abs(scale)
        for span, low, high in ((65536.0, -32768, 32767), (256.0, -128, 127)):
            k = round(codes / span)
            if k >= 1 and abs(codes / (k * span) - 1.0) < 0.02:
                return low * k, high * k
    info = np.iinfo(np.dtype(dtype))
    return int(info.min), int(info.max)


@dataclass(frozen=True)
class TopUp:
    """How many more triggered records the pool wants, and whether the time cap cut it."""

    records: int
    capped: bool
    detecting: bool


def room_for(
    pool_bench_time: float, record_duration: float, rearm: float, max_time_s: float
) -> int:
    """Whole triggered records that still fit in the point's max_time."""
    return int(max(max_time_s - pool_bench_time, 0.0) / (record_duration + rearm) + 1e-9)


def top_up(
    result: analysis.PointMeasurement,
    pool_triggered: int,
    pool_bench_time: float,
    record_duration: float,
    rearm: float,
    target_db: float,
    max_time_s: float,
    expected_ratio: float,
    calibration_uncertainty: float = 0.0,
    last_look: bool = False,
) -> TopUp:
    """More records for a pooled capture that misses the target, from what it shows.

    Value: the noise part of the uncertainty, u_n² = (20/ln 10)²·[(σ_c/A_out)² +
    (σ_pin/A_pin)²], falls as 1/T (σ_A² ≈ S/T; Kay, Estimation Theory, ch. 3), so the pool needs T·u_n²/u_budget², the
    budget being what the channel match (``calibration_uncertainty``: the calibration's u or
    the uncalibrated tolerance term) leaves of the target, u_t² − u_match², but never less
    than (NOISE_SHARE·u_t)²: where the match alone uses up the target, more records cannot
    meet it, and the noise is taken down to a share of it (the point is flagged).
    Bound (the output under the value threshold): not settled for early. A first look
    aims to see an output at max(expected_ratio·A_pin, K·σ_c) (K the value threshold) with
    σ_A/A of 1 dB; the ``last_look`` takes every record the plan's max_time still allows.
    Records are whole; the pool's bench time stays within max_time_s."""
    rej = result.rejection
    pin_amp = max(result.pin.amplitude, 1e-15)
    floor = max(result.output_floor, 1e-15)
    detecting = bool(rej.is_bound)
    room = room_for(pool_bench_time, record_duration, rearm, max_time_s)
    if not detecting:
        out_amp = max(result.output.amplitude, 1e-15)
        noise_db2 = (
            analysis.db_uncertainty(floor / out_amp, result.pin.amplitude_sigma / pin_amp) ** 2
        )
        budget = max(
            target_db**2 - analysis.db_uncertainty(calibration_uncertainty) ** 2,
            (NOISE_SHARE * target_db) ** 2,
        )
        if noise_db2 <= budget:
            return TopUp(0, False, False)
        factor = noise_db2 / budget
    elif last_look:
        return TopUp(room, room < 1, True)
    else:
        threshold = float(getattr(result, "value_threshold", analysis.DEFAULT_DETECTION_K))
        goal = max(expected_ratio * pin_amp, threshold * floor)
        factor = (floor / (DETECT_RELATIVE * goal)) ** 2
    wanted = max(1, math.ceil(pool_triggered * (factor * TOP_UP_MARGIN - 1.0)))
    if wanted > room:
        return TopUp(room, True, detecting)
    return TopUp(wanted, False, detecting)
