"""Known-frequency and frequency-free sine fits against the IEEE Std 1057 model, a published
worked example, and scipy / numpy least squares as reference implementations."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize

from benchseq.analysis import (
    AnalysisError,
    fit_harmonics,
    fit_sine,
    fit_sine_batch,
    fit_sine_free,
    fit_sines,
    refine_frequency,
)


def _design(t: np.ndarray, freqs: list[float]) -> np.ndarray:
    cols = []
    for f in freqs:
        cols += [np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t)]
    return np.column_stack([*cols, np.ones_like(t)])


def test_noise_free_three_parameter_fit_recovers_the_model_exactly() -> None:
    """IEEE Std 1057 three-parameter model y = A·cos(ωt + θ) + C: a noise-free record of
    0.7·cos(2π·123.456·t + 0.3) + 0.25 at 10 kSa/s, N = 1000 (12.3456 cycles, not whole)."""
    fs, n = 10e3, 1000
    t = np.arange(n) / fs
    y = 0.7 * np.cos(2 * np.pi * 123.456 * t + 0.3) + 0.25
    fit = fit_sine(y, fs, 123.456)
    assert abs(fit.amplitude - 0.7) < 1e-12
    assert abs(fit.phase - 0.3) < 1e-12
    assert abs(fit.offset - 0.25) < 1e-12
    assert fit.residual_rms < 1e-13
    assert abs(fit.phasor - 0.7 * np.exp(0.3j)) < 1e-12
    assert fit.n == n and fit.frequency == 123.456


def test_four_parameter_fit_worked_example() -> None:
    """Worked example of the open QWTB toolbox's four-parameter sine fit test: 2·sin(2π·100·t
    + 1) + 0.2, sample period 1e-4 s, 10,000 samples, started at 100.2 Hz → f = 100 Hz, A = 2,
    φ = 1 rad (sine convention, so θ = φ − π/2 for the cosine model), offset 0.2."""
    dt, n = 1e-4, 10_000
    t = np.arange(n) * dt
    y = 2 * np.sin(2 * np.pi * 100 * t + 1) + 0.2
    free = fit_sine_free(y, 1 / dt, 100.2)
    assert free.frequency == pytest.approx(100.0, rel=1e-10)
    assert free.fit.amplitude == pytest.approx(2.0, rel=1e-10)
    assert free.fit.phase + math.pi / 2 == pytest.approx(1.0, rel=1e-10)
    assert free.fit.offset == pytest.approx(0.2, rel=1e-10)


@pytest.mark.parametrize("seed", range(6))
def test_three_parameter_fit_equals_lstsq_on_random_records(seed: int) -> None:
    """Reference: numpy.linalg.lstsq on the explicit N×3 design matrix (IEEE 1057 normal
    equations) — coefficients, residual and covariance s²(DᵀD)⁻¹ agree to ~1e-10."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(50, 20_000))
    fs = 10 ** rng.uniform(2, 7)
    f = fs * rng.uniform(0.002, 0.45)
    t0 = rng.uniform(-1e-3, 1e-3) / fs * n
    t = t0 + np.arange(n) / fs
    y = rng.normal(0.3, 1.0, n) + 2.0 * np.cos(2 * np.pi * f * t - 1.0)
    fit = fit_sine(y, fs, f, t0=t0)
    d = _design(t, [f])
    coef, res, _, _ = np.linalg.lstsq(d, y, rcond=None)
    a, b, c = coef
    scale = 2.0
    assert abs(fit.amplitude - math.hypot(a, b)) < 1e-10 * scale
    assert abs(fit.offset - c) < 1e-10 * scale
    assert abs(np.angle(fit.phasor / complex(a, -b))) < 1e-10
    assert fit.residual_rms == pytest.approx(math.sqrt(res[0] / n), rel=1e-9)
    cov = res[0] / (n - 3) * np.linalg.inv(d.T @ d)
    g = np.array([a, b]) / math.hypot(a, b)
    assert fit.amplitude_sigma == pytest.approx(math.sqrt(g @ cov[:2, :2] @ g), rel=1e-8)
    assert fit.offset_sigma == pytest.approx(math.sqrt(cov[2, 2]), rel=1e-8)


def test_four_parameter_fit_equals_scipy_least_squares_with_noise() -> None:
    """Reference: scipy.optimize.curve_fit (Levenberg–Marquardt) on the same four-parameter
    model; frequency and its standard uncertainty agree."""
    rng = np.random.default_rng(11)
    fs, n = 20e3, 8000
    t = np.arange(n) / fs
    y = 1.5 * np.cos(2 * np.pi * 317.3 * t + 0.4) - 0.1 + rng.normal(0, 0.2, n)
    free = fit_sine_free(y, fs, 317.3 + 0.4 * fs / n)
    p, cov = optimize.curve_fit(
        lambda t, a, f, th, c: a * np.cos(2 * np.pi * f * t + th) + c,
        t,
        y,
        p0=[1.5, 317.4, 0.4, -0.1],
    )
    assert free.frequency == pytest.approx(p[1], rel=1e-10)
    assert free.fit.amplitude == pytest.approx(p[0], rel=1e-9)
    assert free.frequency_sigma == pytest.approx(math.sqrt(cov[1, 1]), rel=1e-3)


def test_joint_fit_of_harmonics_equals_lstsq() -> None:
    """Reference: numpy.linalg.lstsq on the explicit design matrix of f, 2f, 3f plus offset."""
    rng = np.random.default_rng(5)
    fs, n, f = 50e3, 5003, 211.7
    t = np.arange(n) / fs
    y = np.cos(2 * np.pi * f * t) + 0.05 * np.cos(4 * np.pi * f * t + 1) + rng.normal(0, 0.01, n)
    joint = fit_sines(y, fs, [f, 2 * f, 3 * f])
    coef, *_ = np.linalg.lstsq(_design(t, [f, 2 * f, 3 * f]), y, rcond=None)
    for i, comp in enumerate(joint.components):
        assert comp.amplitude == pytest.approx(math.hypot(coef[2 * i], coef[2 * i + 1]), abs=1e-11)
    assert joint.offset == pytest.approx(coef[-1], abs=1e-12)


def test_thd_of_a_known_distortion() -> None:
    """THD = √(ΣA_h²)/A_1 (IEEE Std 1241 definition): 3 % second and 1 % third harmonic give
    √(0.03² + 0.01²) = 3.1623 % (computed)."""
    fs, n, f = 100e3, 20_011, 1003.0
    t = np.arange(n) / fs
    y = (
        0.2 * np.cos(2 * np.pi * f * t)
        + 0.006 * np.cos(4 * np.pi * f * t + 0.5)
        + 0.002 * np.sin(6 * np.pi * f * t)
    )
    h = fit_harmonics(y, fs, f)
    assert h.orders == (2, 3, 4, 5)
    assert h.thd == pytest.approx(math.hypot(0.03, 0.01), rel=1e-9)
    assert h.fundamental.amplitude == pytest.approx(0.2, rel=1e-12)


def test_large_dc_offset_does_not_cancel_the_residual() -> None:
    """A 3.3 V DC level under 10 µV of noise: Σy² − xᵀDᵀy would lose most digits; the fit's
    residual must still match a direct computation (numpy lstsq residual)."""
    rng = np.random.default_rng(2)
    fs, n, f = 1e5, 30_000, 997.0
    t = np.arange(n) / fs
    y = 3.3 + 1e-3 * np.cos(2 * np.pi * f * t) + rng.normal(0, 1e-5, n)
    fit = fit_sine(y, fs, f)
    coef, *_ = np.linalg.lstsq(_design(t, [f]), y, rcond=None)
    direct = np.sqrt(np.mean((y - _design(t, [f]) @ coef) ** 2))
    assert fit.residual_rms == pytest.approx(direct, rel=1e-6)


def test_batch_fit_matches_single_fits() -> None:
    rng = np.random.default_rng(3)
    records = rng.normal(size=(5, 1234)) + np.cos(2 * np.pi * 0.0137 * np.arange(1234))
    batch = fit_sine_batch(records, 1.0, 0.0137)
    for i in range(5):
        single = fit_sine(records[i], 1.0, 0.0137)
        assert batch[i].amplitude == pytest.approx(single.amplitude, rel=1e-13)
        assert batch[i].amplitude_sigma == pytest.approx(single.amplitude_sigma, rel=1e-12)


@settings(max_examples=40, deadline=None)
@given(
    offset=st.floats(-10, 10),
    scale=st.floats(1e-6, 1e3),
    shift=st.floats(-1e-2, 1e-2),
    seed=st.integers(0, 2**16),
)
def test_fit_is_invariant_to_offset_scaling_and_time_origin(
    offset: float, scale: float, shift: float, seed: int
) -> None:
    """Properties of the linear least-squares model: adding a constant moves only the offset;
    scaling scales amplitude and sigmas and keeps the phase; moving the time origin by Δt
    turns the phase by 2πfΔt."""
    rng = np.random.default_rng(seed)
    fs, n, f = 5e3, 777, 61.3
    y = np.cos(2 * np.pi * f * np.arange(n) / fs + 0.7) + rng.normal(0, 0.3, n)
    base = fit_sine(y, fs, f)
    moved = fit_sine(y + offset, fs, f)
    assert moved.amplitude == pytest.approx(base.amplitude, rel=1e-9)
    assert moved.offset == pytest.approx(base.offset + offset, abs=1e-9 * (1 + abs(offset)))
    scaled = fit_sine(scale * y, fs, f)
    assert scaled.amplitude == pytest.approx(scale * base.amplitude, rel=1e-9)
    assert scaled.amplitude_sigma == pytest.approx(scale * base.amplitude_sigma, rel=1e-7)
    assert abs(np.angle(scaled.phasor / base.phasor)) < 1e-9
    later = fit_sine(y, fs, f, t0=shift)
    assert later.amplitude == pytest.approx(base.amplitude, rel=1e-9)
    expected = base.phase - 2 * np.pi * f * shift
    assert abs(np.angle(np.exp(1j * (later.phase - expected)))) < 1e-7


def test_refinement_refuses_a_channel_at_its_floor() -> None:
    """At the floor a free frequency locks onto noise: refinement must refuse, with a reason."""
    rng = np.random.default_rng(8)
    fs, n, f = 1e4, 4000, 120.5
    y = 1e-3 * np.cos(2 * np.pi * f * np.arange(n) / fs) + rng.normal(0, 1e-2, n)
    result = refine_frequency(y, fs, f + 0.3 * fs / n)
    assert not result.refined and result.reason == "low_snr"
    assert result.frequency == f + 0.3 * fs / n


def test_refinement_converges_within_half_a_bin_and_fails_beyond_a_bin() -> None:
    """Convergence region of the four-parameter fit (the project's own planning experiment: all at 0.5 bin,
    none at 1 bin)."""
    fs, n, f = 1e4, 5000, 333.3
    y = np.cos(2 * np.pi * f * np.arange(n) / fs + 2.0)
    bin_width = fs / n
    for start in (-0.49, 0.3, 0.49):
        got = refine_frequency(y, fs, f + start * bin_width)
        assert got.refined and got.frequency == pytest.approx(f, rel=1e-11)
    far = refine_frequency(y, fs, f + 1.6 * bin_width)
    assert not far.refined


def test_bad_records_give_clear_errors() -> None:
    with pytest.raises(AnalysisError, match="NaN"):
        fit_sine(np.array([0.0, 1, np.nan, 3, 4, 5, 6, 7, 8]), 10.0, 1.0)
    with pytest.raises(AnalysisError, match="Nyquist"):
        fit_sine(np.zeros(100), 10.0, 5.0)
    with pytest.raises(AnalysisError, match="too short"):
        fit_sine(np.zeros(4), 10.0, 1.0)
    with pytest.raises(AnalysisError, match="longer record"):
        fit_sine(np.random.default_rng(0).normal(size=100), 1e6, 1e-3)


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(8, 5000),
    cycles_per_sample=st.floats(0.01, 0.45),
    t0=st.floats(-1e3, 1e3),
    seed=st.integers(0, 2**16),
)
def test_block_engine_equals_lstsq_for_any_length(
    n: int, cycles_per_sample: float, t0: float, seed: int
) -> None:
    """Any record length (block size √N with a ragged tail) and time origin: the O(N) fit
    equals numpy.linalg.lstsq on the explicit design matrix."""
    rng = np.random.default_rng(seed)
    fs = 1.0
    f = max(cycles_per_sample, 3.0 / n)  # at least a few cycles, so the problem is well posed
    t = t0 + np.arange(n) / fs
    y = rng.normal(0.0, 1.0, n) + np.cos(2 * np.pi * f * t + 0.5)
    fit = fit_sine(y, fs, f, t0=t0)
    d = _design(t, [f])
    coef, *_ = np.linalg.lstsq(d, y, rcond=None)
    assert abs(fit.phasor - complex(coef[0], -coef[1])) < 1e-8
    assert abs(fit.offset - coef[2]) < 1e-8
