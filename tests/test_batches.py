"""Pooled captures (benchseq.batches): exact pooling of converter codes, top-up sizing and
the absence of a pooling bias.

Sources: the uncertainty of a fitted amplitude σ_A² ≈ S/T (Kay, Fundamentals of Statistical
Signal Processing: Estimation Theory, ch. 3, for white noise; GUM JCGM 100 §5.1.2 for adding the channels in quadrature); a weighted mean
of records computed directly with numpy as the reference for the pool; the truth of
synthetic sines for the bias check (an unbiased estimator's mean error is 0 within its
standard error, and GUM standard uncertainties give normalised errors of unit spread).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from benchseq import analysis, batches
from benchseq.drivers.scope import Waveform

DB = 20 / math.log(10)  # 8.6859 dB per neper


def Wave(codes: np.ndarray, volts_per_code: float, probe: float = 10.0) -> Waveform:
    """A driver Waveform as the scope sends it (no offset; 1 µs interval)."""
    return Waveform(codes, volts_per_code, 0.0, 0.0, 1e-6, probe)


def _waves(rng: np.random.Generator, n: int, bits: int, full: float) -> list[Wave]:
    dtype = np.int8 if bits == 8 else np.int16
    info = np.iinfo(dtype)
    return [
        Wave(rng.integers(info.min, info.max, 500).astype(dtype), full / 2.0**bits)
        for _ in range(n)
    ]


def test_pool_is_the_weighted_mean_of_its_records_exactly() -> None:
    """8-bit single records and 16-bit averaged transfers on one range pool exactly: the
    pooled record equals numpy's average weighted by each waveform's triggered records."""
    rng = np.random.default_rng(4)
    pool = batches.Pool()
    batches_in = [
        (_waves(rng, 1, 8, 0.08), 1),
        (_waves(rng, 2, 16, 0.08), 7),
        (_waves(rng, 1, 16, 0.08), 3),
    ]
    weights, volts = [], []
    for waves, averages in batches_in:
        pool.add(waves, waves, 1e-6, averages, 0.1)
        for w in waves:
            weights.append(averages)
            volts.append(w.volts())
    expected = np.average(np.vstack(volts), axis=0, weights=weights)
    pin, out = pool.mean()
    np.testing.assert_allclose(pin, expected, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(out, expected, rtol=1e-12, atol=1e-15)
    samples, scale, _, (low, high) = pool.kept(0)
    assert pool.exact and pool.triggered == sum(weights) == 18
    assert samples.dtype == np.int32
    assert scale == pytest.approx(0.08 / 65536 * 10 / 18, rel=1e-12)
    assert low == -32768 * 18 and high <= 32767 * 18
    # the stored code range is found again from range / scale (as a re-analysis does)
    assert batches.code_range(0.8, scale, samples.dtype) == (-32768 * 18, 32767 * 18)


def test_pool_across_ranges_is_close_not_exact() -> None:
    rng = np.random.default_rng(5)
    pool = batches.Pool()
    a, b = _waves(rng, 1, 8, 0.08), _waves(rng, 1, 8, 0.2)
    pool.add(a, a, 1e-6, 1, 0.1)
    pool.add(b, b, 1e-6, 1, 0.1)
    expected = (a[0].volts() + b[0].volts()) / 2
    pin, _ = pool.mean()
    assert not pool.exact
    step = 0.08 / 256 * 10 / 2
    assert np.max(np.abs(pin - expected)) <= step / 2 + 1e-15


def test_pool_refuses_another_record_length() -> None:
    rng = np.random.default_rng(6)
    pool = batches.Pool()
    a = _waves(rng, 1, 8, 0.08)
    pool.add(a, a, 1e-6, 1, 0.1)
    short = [Wave(a[0].codes[:100], a[0].volts_per_code)]
    with pytest.raises(ValueError, match="record length"):
        pool.add(short, short, 1e-6, 1, 0.1)


def _result(pin: float, pin_sigma: float, out: float, floor: float, bound: bool = False):
    return SimpleNamespace(
        pin=SimpleNamespace(amplitude=pin, amplitude_sigma=pin_sigma),
        output=SimpleNamespace(amplitude=out),
        output_floor=floor,
        rejection=SimpleNamespace(is_bound=bound),
    )


def _after(u: float, records: int, more: int) -> float:
    """The noise part of the uncertainty after ``more`` records on ``records``: a fitted
    amplitude's variance falls as 1/T for white noise (Kay, Estimation Theory, ch. 3), and
    T grows with the count of equal records."""
    return u * math.sqrt(records / (records + more))


@pytest.mark.parametrize(
    ("pin", "pin_sigma", "out", "floor", "records", "target"),
    [
        (0.05, 5e-6, 5e-6, 1e-7, 4, 0.1),
        (0.05, 5e-6, 5e-6, 1e-7, 1, 0.05),
        (0.2, 1e-4, 1e-4, 4e-6, 16, 0.2),
        (0.01, 1e-6, 2e-6, 1e-7, 3, 0.3),
        (1.0, 1e-5, 3e-5, 2e-6, 7, 0.5),
    ],
)
def test_top_up_meets_the_target_without_asking_for_much_more(
    pin: float, pin_sigma: float, out: float, floor: float, records: int, target: float
) -> None:
    """u_n = (20/ln 10)·√((σ_c/A_out)² + (σ_pin/A_pin)²) (dB from nepers; the two
    relative uncertainties in quadrature, GUM JCGM 100 §5.1.2). With the records asked for,
    the 1/T law brings u_n to the target; the pool asked for is at most 10 % (plus one
    record) larger than the one that meets the target exactly (a stated margin, no more)."""
    u = DB * math.hypot(floor / out, pin_sigma / pin)
    assert u > target  # the case needs a top-up
    got = batches.top_up(_result(pin, pin_sigma, out, floor), records, records * 1.001,
                         1.0, 0.002, target, 1e6, 1e-4)  # fmt: skip
    assert not got.capped and not got.detecting
    assert _after(u, records, got.records) <= target
    exact = records * (u / target) ** 2  # the pool that meets the target exactly
    assert records + got.records <= 1.1 * exact + 1


def test_top_up_nothing_when_met_and_what_fits_under_the_cap() -> None:
    # met already (u_n = 0.087 dB < 0.1 dB): nothing more
    met = batches.top_up(_result(0.05, 5e-6, 5e-5, 1e-8), 4, 4.0, 1.0, 0.002, 0.1, 10.0, 1e-3)
    assert met.records == 0
    # the time cap: 8.5 s of 10 s used, records of 1 s + 2 ms re-arm: one more fits, flagged
    res = _result(0.05, 5e-6, 5e-6, 1e-7)
    capped = batches.top_up(res, 4, 8.5, 1.0, 0.002, 0.1, 10.0, 1e-4)
    assert capped.records == 1 and capped.capped


def test_top_up_leaves_the_calibrations_share_of_the_target() -> None:
    """A calibration uncertainty u_cal (relative) adds in quadrature (GUM §5.1.2): after the
    top-up √(u_n² + (20/ln 10·u_cal)²) meets the target; without the share it would not."""
    u = DB * math.hypot(1e-7 / 5e-6, 5e-6 / 0.05)
    res = _result(0.05, 5e-6, 5e-6, 1e-7)
    plain = batches.top_up(res, 4, 4.01, 1.0, 0.002, 0.1, 100.0, 1e-4)
    cal = batches.top_up(res, 4, 4.01, 1.0, 0.002, 0.1, 100.0, 1e-4, calibration_uncertainty=0.005)
    assert math.hypot(_after(u, 4, cal.records), DB * 0.005) <= 0.1
    assert math.hypot(_after(u, 4, plain.records), DB * 0.005) > 0.1
    assert cal.records > plain.records


def test_top_up_to_detect_aims_at_one_db_at_the_expected_level() -> None:
    """A bound: the floor σ_c must fall to 1 dB (ln 10/20 = 0.115 in relative terms) of the
    output it expects, the larger of expected_ratio·A_pin and four times the floor (the
    value threshold, k = 4); the 1/T law gives the records."""
    res = _result(0.05, 5e-6, 0.0, 1e-7, bound=True)
    got = batches.top_up(res, 2, 2.0, 1.0, 0.0, 0.1, 100.0, expected_ratio=1e-5)
    goal = max(1e-5 * 0.05, 4 * 1e-7)
    assert got.detecting
    one_db = math.log(10) / 20
    assert _after(1e-7, 2, got.records) <= one_db * goal
    assert 2 + got.records <= 1.1 * 2 * (1e-7 / (one_db * goal)) ** 2 + 1


def test_noise_guess_splits_white_and_coloured() -> None:
    """S = σ_c²·T at f (σ_A² = S/T); the white part is 2σ²Δt, the rest coloured."""
    dt, n, k, sigma = 1e-6, 100_000, 4, 1e-4
    white = 2 * sigma**2 * dt
    coloured = 3e-12
    floor = math.sqrt((white + coloured) / (n * dt * k))
    guess = batches.NoiseGuess.from_point(floor, sigma, 2e-6, dt, n, k)
    assert guess is not None
    assert guess.coloured == pytest.approx(coloured, rel=1e-9)
    assert guess.white_sigma == sigma
    assert guess.pin_sigma == pytest.approx(2e-6 * math.sqrt(n * k / 2))
    assert batches.NoiseGuess.from_point(math.nan, sigma, 2e-6, dt, n, k) is None


def test_pooled_top_ups_do_not_bias_the_rejection() -> None:
    """Synthetic sines with white noise: the batch rule (probe, then top-ups sized from the
    pooled records) measured with measure_point. The mean error in dB is 0 within 3
    standard errors and far below the 0.1 dB target; normalised errors have unit spread
    (0.8–1.25). A rule that replaced captures judged by their own amplitude failed this
    (mean −0.18 dB in the run's history)."""
    rng = np.random.default_rng(11)
    fs, n, f = 1e6, 2000, 12_500.0  # 25 whole cycles per record
    t = np.arange(n) / fs
    true_db = 66.0
    pin_amp, out_amp = 0.05, 0.05 * 10 ** (-true_db / 20)
    noise = 2.2e-5  # per sample: about 6 records meet 0.1 dB
    errors, normalised, used = [], [], []
    for _ in range(150):
        phase = rng.uniform(0, 2 * np.pi)
        pool = batches.Pool()
        records, result = 3, None
        for _step in range(1 + batches.MAX_TOP_UPS):
            waves = []
            for _r in range(records):
                p = pin_amp * np.cos(2 * np.pi * f * t + phase) + rng.normal(0, noise, n)
                o = out_amp * np.cos(2 * np.pi * f * t + phase + 1.0) + rng.normal(0, noise, n)
                waves.append((p, o))
            step = 1e-6
            pins = [Wave(np.rint(p / step).astype(np.int32), step, probe=1.0) for p, _ in waves]
            outs = [Wave(np.rint(o / step).astype(np.int32), step, probe=1.0) for _, o in waves]
            pool.add(pins, outs, 1 / fs, 1, records * 0.002)
            pin, out = pool.mean()
            result = analysis.measure_point(pin, out, 1 / fs, f, refine=False)
            more = batches.top_up(
                result, pool.triggered, pool.bench_time, 0.002, 0.0, 0.1, 1.0, 10 ** (-true_db / 20)
            )
            if more.records < 1:
                break
            records = more.records
        assert result is not None and not result.rejection.is_bound
        errors.append(result.rejection.rejection_db - true_db)
        normalised.append(errors[-1] / result.rejection.uncertainty_db)
        used.append(pool.triggered)
    errors_a = np.array(errors)
    standard_error = errors_a.std(ddof=1) / math.sqrt(errors_a.size)
    assert abs(errors_a.mean()) <= 3 * standard_error + 1e-3
    assert abs(errors_a.mean()) < 0.03
    assert 0.8 <= np.std(normalised) <= 1.25
    assert 5 <= np.mean(used) <= 9  # about the need, not a multiple of it
