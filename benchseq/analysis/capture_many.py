"""``plan_capture`` for many points at once: the same choice, evaluated over numpy arrays.

`check` estimates the bench time of every planned point from the capture planner; at a
million points one call per point costs minutes. ``plan_capture_many`` tries every offered
(sample interval, record length) for a block of points as one array (points x timebases),
with the same arithmetic, in the same order of operations, as ``capture.plan_capture``, and
picks the same timebase: the lexicographic least key, the first offered on a tie. It covers
the planner as the check and the sequencer's prior call it (noise given as an rms per
sample, white at any rate, plus a coloured density at f; no calibration term) and returns
what they use of the plan: bench time, recorded time and whether min_cycles set the length.
``tests/test_capture_many.py`` compares it with ``plan_capture`` on random points.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from benchseq.analysis.capture import (
    DEFAULT_MIN_SAMPLES_PER_CYCLE,
    LEAN_MARGIN,
    LEAN_SAMPLES_PER_CYCLE,
    ScopeLimits,
)
from benchseq.analysis.errors import AnalysisError
from benchseq.analysis.rejection import DB_PER_NEPER

BLOCK_CELLS = 1 << 16  # points x timebases evaluated at once (512 kB per array)


@dataclass(frozen=True)
class ManyPlans:
    """Per point: the plan's bench time and recorded time (s), and whether it is
    cycle-bound (``limited_by == "cycles"`` of plan_capture)."""

    bench_time: np.ndarray
    capture_time: np.ndarray
    cycles_bound: np.ndarray


def plan_capture_many(
    scope: ScopeLimits,
    frequency: Any,
    pin_amplitude: Any,
    output_amplitude: Any,
    target_uncertainty_db: Any,
    min_cycles: int,
    max_time_s: float,
    noise_sigma: Any,
    density_at_f: Any = 0.0,
    pin_noise_sigma: Any = np.nan,
    max_record_time: Any = np.nan,
    lean: bool = False,
) -> ManyPlans:
    """plan_capture(scope, f, pin, out, target, min_cycles, max_time_s, noise_sigma=σ,
    density_at_f=S, pin_noise_sigma=σ_pin (NaN: None, the pin takes σ), max_record_time
    (NaN: None), lean) for each point of the broadcast arrays (the target too)."""
    f, pin, out, sigma, coloured, pin_sigma, longest_asked, target = (
        np.ravel(a)
        for a in np.broadcast_arrays(
            *(
                np.asarray(x, dtype=float)
                for x in (
                    frequency,
                    pin_amplitude,
                    output_amplitude,
                    noise_sigma,
                    density_at_f,
                    pin_noise_sigma,
                    max_record_time,
                    target_uncertainty_db,
                )
            )
        )
    )
    if not (np.all(f > 0) and np.all(pin > 0) and np.all(out > 0)):
        raise AnalysisError(
            "capture planning needs a positive frequency and positive expected amplitudes"
        )
    if not np.all(target > 0) or min_cycles < 1 or max_time_s <= 0:
        raise AnalysisError("target uncertainty, minimum cycles and maximum time must be positive")
    if np.any(coloured < 0):
        raise AnalysisError("a noise density cannot be negative")
    n = f.size
    bench = np.empty(n)
    recorded = np.empty(n)
    cycles_bound = np.empty(n, dtype=bool)
    lengths = np.array(sorted(int(k) for k in scope.record_lengths), dtype=float)
    intervals = np.array(sorted(float(dt) for dt in scope.sample_intervals), dtype=float)
    per_block = max(1, BLOCK_CELLS // max(lengths.size * intervals.size, 1))
    # blocks of neighbouring frequencies: their rows reach the same few timebases
    order = np.argsort(f, kind="stable")
    for start in range(0, n, per_block):
        part = order[start : start + per_block]
        b, r, c = _block(
            scope,
            intervals,
            lengths,
            f[part],
            pin[part],
            out[part],
            sigma[part],
            coloured[part],
            np.where(np.isnan(pin_sigma[part]), sigma[part], pin_sigma[part]),
            longest_asked[part],
            target[part],
            int(min_cycles),
            float(max_time_s),
            lean,
        )
        bench[part], recorded[part], cycles_bound[part] = b, r, c
    return ManyPlans(bench, recorded, cycles_bound)


def _first_least(keys: list[np.ndarray], allowed: np.ndarray) -> np.ndarray:
    """Per row, the column of the lexicographically least key tuple among the allowed
    columns, the first such column on a tie (Python's tuple order with a strict <)."""
    chosen = allowed.copy()
    for k, key in enumerate(keys):
        least = np.min(np.where(chosen, key, np.inf), axis=1, keepdims=True)
        chosen &= key == least
        if k + 1 < len(keys) and not np.any(np.count_nonzero(chosen, axis=1) > 1):
            break  # no ties left to break
    return np.argmax(chosen, axis=1)


def _block(
    scope: ScopeLimits,
    intervals: np.ndarray,
    lengths: np.ndarray,
    f: np.ndarray,
    pin: np.ndarray,
    out: np.ndarray,
    sigma: np.ndarray,
    coloured: np.ndarray,
    pin_sigma: np.ndarray,
    longest_asked: np.ndarray,
    target_row: np.ndarray,
    min_cycles: int,
    max_time: float,
    lean: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rearm = float(scope.rearm_time)
    max_averages = max(int(scope.max_averages), 1)
    target = target_row[:, None]
    budget = target**2
    db2 = DB_PER_NEPER**2
    # timebases in plan_capture's order: interval (outer), then record length
    dt = np.repeat(intervals, lengths.size)[None, :]
    length = np.tile(lengths, intervals.size)[None, :]
    col = f[:, None]
    reach = ~(dt * col * DEFAULT_MIN_SAMPLES_PER_CYCLE > 1.0)
    min_record_time = (min_cycles / f)[:, None]
    duration = length * dt
    long_enough = ~(duration < min_record_time * (1 - 1e-9))
    holding = np.min(np.where(reach & long_enough, duration, np.inf), axis=1)
    longest = np.where(np.isnan(longest_asked), np.inf, np.maximum(longest_asked, holding))[:, None]
    allowed = reach & long_enough & ~(duration > longest * (1 + 1e-9))
    if not np.all(np.any(allowed, axis=1)):
        k = int(np.argmin(np.any(allowed, axis=1)))
        raise AnalysisError(
            f"no offered timebase records {min_cycles} cycles of {f[k]:.6g} Hz with "
            f"{DEFAULT_MIN_SAMPLES_PER_CYCLE} samples per cycle: the frequency is out of "
            "this scope's reach"
        )
    # only the timebases some point of the block can use (the same order kept)
    used = np.any(allowed, axis=0)
    dt, length, duration = dt[:, used], length[:, used], duration[:, used]
    allowed = allowed[:, used]
    nyquist = 0.5 / dt
    weight = (pin_sigma[:, None] ** 2 / nyquist + 0.0) / pin[:, None] ** 2
    weight = weight + (sigma[:, None] ** 2 / nyquist + coloured[:, None]) / out[:, None] ** 2
    needed = db2 * weight / budget
    finite = np.isfinite(needed)
    with np.errstate(invalid="ignore", over="ignore"):
        total = np.maximum(1.0, np.ceil(needed / duration * (1 - 1e-12)))
        if not np.all(finite):
            total = np.where(finite, total, max_averages)
        records = np.ceil(total / max_averages)
        averages = np.ceil(total / records)
        each = duration + rearm
        bench = records * averages * each
        capped = (bench > max_time) & (total > 1)
        if np.any(capped):  # the time cap binds: as many averages as fit
            fit_in = np.maximum(1.0, np.floor_divide(max_time, each))
            records = np.where(capped, np.ceil(fit_in / max_averages), records)
            averages = np.where(capped, np.maximum(1.0, np.floor_divide(fit_in, records)), averages)
            bench = np.where(capped, records * averages * each, bench)
        recorded = records * averages * duration
        u = np.sqrt(db2 * weight / recorded + 0.0)
    within = bench <= max_time
    meets = (u <= target * (1 + 1e-9)) & within
    keys = [
        # (not meets, not within) as one key: 0 < 1 < 2 < 3 orders the pairs as tuples do
        np.where(meets, 0.0, 2.0) + np.where(within, 0.0, 1.0),
        np.where(meets, bench, np.where(within, u, duration)),
        u,
        np.broadcast_to(length, u.shape),
    ]
    best = _first_least(keys, allowed)
    rows = np.arange(f.size)
    best_bench = bench[rows, best]
    best_recorded = recorded[rows, best]
    best_meets = meets[rows, best]
    cycles_bound = best_meets & (needed[rows, best] <= min_record_time[:, 0])
    if lean:
        best_u = u[rows, best]
        best_samples = (records * length)[rows, best]
        samples = records * length
        fewest = (
            allowed
            & meets
            & best_meets[:, None]
            & (bench <= (best_bench * (1 + 1e-9))[:, None])
            & (u <= np.maximum(best_u, LEAN_MARGIN * target_row)[:, None])
            & (dt * col * LEAN_SAMPLES_PER_CYCLE <= 1.0 + 1e-9)
        )
        has = np.any(fewest, axis=1)
        lean_pick = _first_least([samples, u], fewest)
        swap = has & (samples[rows, lean_pick] < best_samples)
        best_bench = np.where(swap, bench[rows, lean_pick], best_bench)
        best_recorded = np.where(swap, recorded[rows, lean_pick], best_recorded)
    return best_bench, best_recorded, cycles_bound
