"""Capture planning against worked examples from the project's own planning experiments
(pin 100 mV, noise 100 µV, target 0.1 dB, 10 cycles minimum) and the GUM/Cramér–Rao formula behind them:
N ≈ 150.9·σ²/(A²·u_dB²), σ_A² ≈ S/T, coherence f' = J/T with a shift ≤ 1/(2J) (IEEE Std 1241)
taken only within the plan's frequency tolerance.

The examples' noise, 100 µV, is taken as white over the 20 MHz bandwidth limit of the
scope profile (drivers/profiles/scpi-scope.toml); with that reading the 1 kHz figure,
S/σ_A² = (1e-8/2e7)/(0.1/8.6859·10 µV)², is 37.7 ms (computed).
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest

from benchseq.analysis import AnalysisError, ScopeTimebase, plan_capture

PROFILE = Path(__file__).resolve().parents[1] / "drivers" / "profiles" / "scpi-scope.toml"


@pytest.fixture(scope="module")
def scope() -> ScopeTimebase:
    caps = tomllib.loads(PROFILE.read_text())["capabilities"]
    return ScopeTimebase(
        caps["sample_intervals"], caps["record_lengths"], caps["max_averages"], caps["rearm_time"]
    )


def _plan(scope: ScopeTimebase, f: float, rejection_db: float, **kw: float):
    return plan_capture(
        scope,
        f,
        0.1,
        0.1 * 10 ** (-rejection_db / 20),
        0.1,
        min_cycles=10,
        max_time_s=10.0,
        noise_sigma=100e-6,
        noise_bandwidth=20e6,
        **kw,
    )


def test_low_frequency_is_cycle_bound(scope: ScopeTimebase) -> None:
    """10 Hz: 10 cycles take 1 s (the planning example; it gives no rejection at
    10 Hz, 60 dB taken here)."""
    plan = _plan(scope, 10.0, 60.0)
    assert plan.limited_by == "cycles" and plan.meets_target
    assert plan.capture_time == pytest.approx(1.0)
    assert plan.averages == plan.records == 1


def test_mid_frequency_with_80_db_is_noise_bound(scope: ScopeTimebase) -> None:
    """1 kHz, 80 dB: noise-bound, ≈ 38 ms of record (the planning example); the offered
    1-2-5 timebases and 1 M-sample memory give 2 × 20 ms."""
    plan = _plan(scope, 1e3, 80.0)
    assert plan.limited_by == "noise" and plan.meets_target
    assert 0.0377 <= plan.capture_time <= 1.25 * 0.0377
    assert plan.expected_uncertainty_db <= 0.1
    expected = 8.6859 * math.sqrt((100e-6**2 / 20e6) / (10e-6**2 * plan.capture_time))
    assert plan.expected_uncertainty_db == pytest.approx(expected, rel=1e-3)


def test_high_frequency_with_40_db_is_cycle_bound(scope: ScopeTimebase) -> None:
    """100 kHz, 40 dB: 10 cycles, 0.1 ms (the planning example)."""
    plan = _plan(scope, 1e5, 40.0)
    assert plan.limited_by == "cycles" and plan.meets_target
    assert plan.capture_time == pytest.approx(1e-4)


def test_white_per_sample_noise_follows_the_sample_count_formula() -> None:
    """Per-sample white noise (no bandwidth given): N ≥ 150.9·σ²/(A²u²) samples
    (from var(A) = 2σ²/N, Kay, Estimation Theory, ch. 3, and 20/ln 10 = 8.6859)."""
    scope = ScopeTimebase([1e-6], [1000 * k for k in range(1, 2001)], 1, 0.0)
    plan = plan_capture(scope, 1e3, 1.0, 1e-2, 0.1, min_cycles=1, noise_sigma=1e-3)
    need = 150.9 * (1e-3**2) * (1 / 1e-2**2 + 1 / 1.0**2) / 0.1**2
    assert need <= plan.record_length < need + 1000


def test_coherent_move_only_within_the_tolerance(scope: ScopeTimebase) -> None:
    """With a tolerance wide enough, f' = J/T, J whole, relative shift |f' − f|/f' ≤ 1/(2J)
    (IEEE Std 1241 coherent sampling); with the default 0.1 % the frequency moves only when
    J/T lies that close, else the planned frequency is kept (the three-parameter fit at a
    known frequency needs no whole cycles: IEEE Std 1057, 4.1.3.1)."""
    for f in (13.7, 1234.5, 98765.0, 333_333.0, 531_800.0, 46.4159):
        wide = _plan(scope, f, 60.0, frequency_tolerance=1.0)
        duration = wide.record_length * wide.sample_interval
        assert wide.coherent
        assert wide.frequency * duration == pytest.approx(wide.cycles, rel=1e-12)
        assert wide.cycles == round(wide.cycles) >= 10
        assert abs(f / wide.frequency - 1) <= 1 / (2 * wide.cycles) + 1e-15
        plan = _plan(scope, f, 60.0)
        assert abs(plan.frequency / f - 1) <= 1e-3 * (1 + 1e-12)
        assert plan.requested_frequency == f
        duration = plan.record_length * plan.sample_interval
        if plan.coherent:
            assert plan.frequency * duration == pytest.approx(round(plan.cycles), rel=1e-12)
        else:
            assert plan.frequency == f and plan.cycles == pytest.approx(f * duration)
        exact = _plan(scope, f, 60.0, frequency_tolerance=0.0)
        assert exact.frequency == f


@pytest.mark.parametrize("count", [500])
def test_many_close_planned_frequencies_stay_distinct_and_within_tolerance(
    scope: ScopeTimebase, count: int
) -> None:
    """Short captures (1 cycle at least, 1 ms at most per capture) of 500 log-spaced planned
    frequencies from 1 kHz to 1.5 kHz (0.08 % apart): whole cycles would need moves of up to
    ~1/(2J) of f (tens of %), which collapsed such a plan onto a few frequencies. Every
    chosen frequency stays within 0.1 % of its planned one and less than half-way to its
    neighbour, so all 500 stay distinct and in the planned order."""
    from benchseq.analysis import at_frequency
    from benchseq.sequencer import max_frequency_shift

    planned = np.geomspace(1e3, 1.5e3, count)
    shifts = max_frequency_shift(planned)
    chosen = []
    for f, shift in zip(planned, shifts, strict=True):
        plan = plan_capture(
            scope, f, 0.1, 1e-3, 1.0, min_cycles=1, max_time_s=1e-3, noise_sigma=1e-6
        )
        plan = at_frequency(plan, f, 1e-3, float(shift))
        chosen.append(plan.frequency)
    chosen_arr = np.array(chosen)
    assert np.all(np.abs(chosen_arr / planned - 1) <= 1e-3 * (1 + 1e-12))
    assert np.unique(chosen_arr).size == count
    assert np.all(np.diff(chosen_arr) > 0)


def test_max_frequency_shift_keeps_neighbours_apart() -> None:
    from benchseq.sequencer import max_frequency_shift

    f = np.array([100.0, 100.0, 101.0, 110.0])
    assert max_frequency_shift(f).tolist() == pytest.approx([0.45, 0.45, 0.45, 4.05])
    assert max_frequency_shift(np.array([5.0, 5.0])).tolist() == [math.inf, math.inf]


def test_unreachable_target_is_reported_not_hidden(scope: ScopeTimebase) -> None:
    """140 dB under 100 µV of noise cannot reach 0.1 dB in 1 s: meets_target False with the
    uncertainty it can reach, within the time cap."""
    plan = plan_capture(
        scope,
        1e3,
        0.1,
        0.1 * 1e-7,
        0.1,
        min_cycles=10,
        max_time_s=1.0,
        noise_sigma=100e-6,
        noise_bandwidth=20e6,
    )
    assert not plan.meets_target and plan.limited_by == "max_time"
    assert plan.bench_time <= 1.0 and plan.expected_uncertainty_db > 0.1
    calibration_bound = plan_capture(
        scope,
        1e3,
        0.1,
        1e-3,
        0.1,
        noise_sigma=100e-6,
        noise_bandwidth=20e6,
        calibration_uncertainty=0.02,
    )
    assert not calibration_bound.meets_target and calibration_bound.limited_by == "calibration"


def test_least_bench_time_among_all_offered_settings(scope: ScopeTimebase) -> None:
    """Brute force over the timebase grid: no meeting setting is quicker than the plan."""
    plan = _plan(scope, 2e3, 85.0)
    assert plan.meets_target
    for dt in scope.sample_intervals:
        for length in scope.record_lengths:
            one = ScopeTimebase([dt], [length], scope.max_averages, scope.rearm_time)
            try:
                other = _plan(one, 2e3, 85.0)
            except AnalysisError:
                continue
            if other.meets_target:
                assert other.bench_time >= plan.bench_time - 1e-12


def test_bad_planning_input() -> None:
    scope = ScopeTimebase([1e-3], [1000], 1, 0.0)
    with pytest.raises(AnalysisError, match="out of this scope's reach"):
        plan_capture(scope, 1e5, 0.1, 1e-3, 0.1, noise_sigma=1e-4)
    with pytest.raises(AnalysisError, match="exactly one"):
        plan_capture(scope, 10.0, 0.1, 1e-3, 0.1)


def test_coloured_density_adds_to_the_white_part(scope: ScopeTimebase) -> None:
    """σ_A² ≈ S/T with S = 2σ²Δt (white per sample) + S_c (a rate-independent part at f):
    the plan's expected uncertainty follows the formula with both (Kay, Estimation Theory, ch. 3; from memory)."""
    coloured = 4e-13  # V²/Hz
    plan = plan_capture(
        scope, 50.0, 0.05, 5e-6, 0.1, min_cycles=10, noise_sigma=1e-4, density_at_f=coloured
    )
    density = 2 * 1e-4**2 * plan.sample_interval + coloured
    expected = 8.6859 * math.sqrt(density / plan.capture_time * (1 / 5e-6**2 + 1 / 0.05**2))
    assert plan.expected_uncertainty_db == pytest.approx(expected, rel=1e-3)
    white_only = plan_capture(scope, 50.0, 0.05, 5e-6, 0.1, min_cycles=10, noise_sigma=1e-4)
    assert plan.capture_time > 2 * white_only.capture_time


def test_records_kept_short_when_asked(scope: ScopeTimebase) -> None:
    """max_record_time caps each record (but never below one holding min_cycles): the same
    need is met by more, shorter records."""
    free = _plan(scope, 1e3, 95.0)
    capped = _plan(scope, 1e3, 95.0, max_record_time=free.capture_time / 4)
    assert capped.meets_target and capped.record_duration <= free.capture_time / 4 + 1e-12
    assert capped.records * capped.averages >= 4
    floor = _plan(scope, 1e3, 95.0, max_record_time=1e-6)
    assert floor.record_duration == pytest.approx(10 / 1e3, rel=1e-9)
    with pytest.raises(AnalysisError, match="negative"):
        _plan(scope, 1e3, 60.0, density_at_f=-1.0)


def test_lean_plan_reads_fewest_samples_at_equal_bench_time() -> None:
    """A cycle-bound point (10 cycles of 1 kHz = 10 ms whatever the rate): the lean plan reads
    the fewest samples that keep ≥ 12 per cycle, at the same bench time, and its expected u
    is the Cramér–Rao bound of a known-frequency sine fit, var(Â) = 2σ²/N (Kay, Fundamentals
    of Statistical Signal Processing: Estimation Theory, 1993, Example 3.14), for both
    channels in quadrature (JCGM 100 §5.1.2), in dB (20/ln 10 per neper)."""
    scope = ScopeTimebase([1e-7, 1e-6, 1e-5, 1e-4], [100, 1000, 10_000, 100_000], 1, 0.0)
    args = (scope, 1e3, 1.0, 0.01, 0.1)
    rules = dict(min_cycles=10, max_time_s=1.0, noise_sigma=1e-4)
    full = plan_capture(*args, **rules)
    lean = plan_capture(*args, **rules, lean=True)
    assert full.meets_target and lean.meets_target
    assert lean.bench_time == pytest.approx(full.bench_time, rel=1e-9)
    assert lean.records * lean.record_length < full.records * full.record_length
    assert (lean.sample_interval, lean.record_length) == (1e-5, 1000)  # 100 per cycle
    n = lean.records * lean.averages * lean.record_length
    crb = 20 / math.log(10) * math.sqrt(2 * 1e-4**2 / n * (1 / 1.0**2 + 1 / 0.01**2))
    assert lean.expected_uncertainty_db == pytest.approx(crb, rel=1e-9)
    assert lean.expected_uncertainty_db <= 0.5 * 0.1
