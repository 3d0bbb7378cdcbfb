"""Known-frequency sine fits (three-parameter least squares, IEEE Std 1057 / IEEE Std 1241).

Model per frequency f: y(t) = a·cos(2πft) + b·sin(2πft) + c, t = t0 + n/fs, i.e.
A·cos(2πft + θ) + c with A = √(a² + b²) and θ = atan2(−b, a). Least squares is the
minimum-variance unbiased estimator here (linear-Gaussian model, Kay ch. 3–4), so the
reported covariance s²·(DᵀD)⁻¹ with s² = RSS/(N − P) is also the attainable one. No whole
number of cycles is assumed. Cost is O(N) with one pass over the data (see _blocks).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from benchseq.analysis import _blocks
from benchseq.analysis.errors import AnalysisError

# Below this ratio RSS/Σy², Σy² − xᵀDᵀy has lost too many digits: recompute directly.
_CANCELLATION_GUARD = 1e-6
_MAX_CONDITION = 1e12


@dataclass(frozen=True)
class SineFit:
    """One sine component of a record, with standard uncertainties (SI units, radians).

    amplitude: peak volts; phase: θ of A·cos(2πf t + θ) + offset, t from the trigger (t0
    is the time of the first sample); amplitude_sigma, phase_sigma, offset_sigma: standard
    uncertainties from s²(DᵀD)⁻¹ by the delta method; quadrature_sigma: σ_c, the standard
    deviation of each quadrature (a, b) — the Rayleigh scale of a noise-only amplitude;
    noise_sigma: s, the residual standard deviation per sample (dof-corrected);
    residual_rms: √(RSS/N).
    """

    amplitude: float
    phase: float
    offset: float
    residual_rms: float
    amplitude_sigma: float
    phase_sigma: float
    offset_sigma: float
    quadrature_sigma: float
    noise_sigma: float
    n: int
    frequency: float
    sample_rate: float
    t0: float = 0.0

    @property
    def phasor(self) -> complex:
        """Peak-amplitude phasor A·e^{jθ} (V)."""
        return complex(self.amplitude * np.cos(self.phase), self.amplitude * np.sin(self.phase))

    @property
    def duration(self) -> float:
        """Record duration T = N/fs (s)."""
        return self.n / self.sample_rate

    @property
    def snr(self) -> float:
        """Amplitude over the quadrature noise σ_c (a ratio, not dB)."""
        return self.amplitude / self.quadrature_sigma if self.quadrature_sigma > 0 else math.inf

    @property
    def snr_db(self) -> float:
        """20·log10(A/σ_c); +inf for a noise-free fit."""
        ratio = self.snr
        return 20.0 * math.log10(ratio) if ratio > 0 else -math.inf


@dataclass(frozen=True, eq=False)
class SineFitBatch:
    """Fits of M records at one frequency: the fields of SineFit as arrays of length M."""

    amplitude: np.ndarray
    phase: np.ndarray
    offset: np.ndarray
    residual_rms: np.ndarray
    amplitude_sigma: np.ndarray
    phase_sigma: np.ndarray
    offset_sigma: np.ndarray
    quadrature_sigma: np.ndarray
    noise_sigma: np.ndarray
    n: int
    frequency: float
    sample_rate: float
    t0: float = 0.0

    def __len__(self) -> int:
        return int(self.amplitude.size)

    def __getitem__(self, i: int) -> SineFit:
        return SineFit(
            amplitude=float(self.amplitude[i]),
            phase=float(self.phase[i]),
            offset=float(self.offset[i]),
            residual_rms=float(self.residual_rms[i]),
            amplitude_sigma=float(self.amplitude_sigma[i]),
            phase_sigma=float(self.phase_sigma[i]),
            offset_sigma=float(self.offset_sigma[i]),
            quadrature_sigma=float(self.quadrature_sigma[i]),
            noise_sigma=float(self.noise_sigma[i]),
            n=self.n,
            frequency=self.frequency,
            sample_rate=self.sample_rate,
            t0=self.t0,
        )

    @property
    def phasor(self) -> np.ndarray:
        """Peak-amplitude phasors A·e^{jθ} (V), one per record."""
        return self.amplitude * np.exp(1j * self.phase)


@dataclass(frozen=True)
class MultiSineFit:
    """A joint fit of several frequencies and one offset to one record."""

    components: tuple[SineFit, ...]
    offset: float
    residual_rms: float
    noise_sigma: float
    n: int


def as_records(samples: object, name: str = "samples") -> np.ndarray:
    """A (M, N) float64 array from one record (N,) or several (M, N); checks it is usable."""
    arr = np.asarray(samples, dtype=float)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2:
        raise AnalysisError(
            f"{name}: expected one record or a 2-D stack of records, got shape {arr.shape}"
        )
    if arr.shape[1] < 8:
        raise AnalysisError(
            f"{name}: {arr.shape[1]} samples is too short a record to fit a sine (need ≥ 8)"
        )
    return np.ascontiguousarray(arr)


def _row_energy(records: np.ndarray) -> np.ndarray:
    """Σ y² per record (BLAS dot per row: several times faster than einsum here)."""
    if records.shape[0] <= 64:
        return np.array([float(row @ row) for row in records])
    return np.einsum("mn,mn->m", records, records)


def _check_rate_frequency(sample_rate: float, frequencies: np.ndarray) -> None:
    if not (math.isfinite(sample_rate) and sample_rate > 0):
        raise AnalysisError(f"sample rate must be a positive number of Hz, got {sample_rate!r}")
    if not np.all(np.isfinite(frequencies)) or np.any(frequencies <= 0):
        raise AnalysisError(f"fit frequencies must be positive Hz, got {frequencies.tolist()}")
    if np.any(frequencies >= sample_rate / 2):
        raise AnalysisError(
            f"fit frequency {frequencies.max():.6g} Hz is at or above the Nyquist frequency "
            f"{sample_rate / 2:.6g} Hz of a {sample_rate:.6g} Sa/s record"
        )


@dataclass(frozen=True, eq=False)
class _Solution:
    """Raw least-squares solution for M records and F frequencies."""

    cos_coef: np.ndarray  # (M, F)
    sin_coef: np.ndarray  # (M, F)
    offset: np.ndarray  # (M,)
    rss: np.ndarray  # (M,)
    inverse_gram: np.ndarray  # (2F+1, 2F+1)
    n: int


@dataclass(frozen=True, eq=False)
class Projection:
    """One pass over M records: their projections onto F frequencies, Σy and Σy². A fit at
    any subset of those frequencies (plus the offset) follows from it without reading the
    records again, so a point's joint harmonic fit, its single-tone fit and its noise floor
    share one pass per channel."""

    records: np.ndarray  # (M, N) float64, kept for the direct residual when Σy² cancels
    sample_rate: float
    frequencies: np.ndarray  # (F,) Hz
    t0: float
    x: np.ndarray  # (F,) cycles per sample
    phi: np.ndarray  # (F,) phase at the first sample, rad
    proj: np.ndarray  # (M, F) complex, Σ y e^{−jθ}
    sums: np.ndarray  # (M,) Σ y
    energy: np.ndarray  # (M,) Σ y²

    @property
    def n(self) -> int:
        return int(self.records.shape[1])


def project_records(
    records: np.ndarray, sample_rate: float, frequencies: object, t0: float = 0.0
) -> Projection:
    """The one pass over ``records`` (from as_records) that every fit at ``frequencies`` needs."""
    freqs = np.atleast_1d(np.asarray(frequencies, dtype=float))
    _check_rate_frequency(sample_rate, freqs)
    x = freqs / sample_rate
    phi = _blocks.TWO_PI * np.mod(freqs * t0, 1.0)
    proj, sums, _ = _blocks.project(records, x, phi)
    energy = _row_energy(records)
    if not np.all(np.isfinite(energy)):
        raise AnalysisError(
            "the record contains NaN or infinite samples (or values too large to square)"
        )
    return Projection(records, float(sample_rate), freqs, float(t0), x, phi, proj, sums, energy)


def solve_projected(projection: Projection, columns: object = None) -> _Solution:
    """Least squares for [cos, sin] at the projection's frequencies ``columns`` (indices;
    None = all) plus an offset, every record at once."""
    p = projection
    cols = np.arange(p.x.size) if columns is None else np.atleast_1d(np.asarray(columns))
    x, phi = p.x[cols], p.phi[cols]
    m, n = p.records.shape
    nf = x.size
    if n <= 2 * nf + 1:
        raise AnalysisError(f"{n} samples cannot determine {2 * nf + 1} parameters")
    gram = _blocks.sine_gram(n, x, phi)
    if np.linalg.cond(gram) > _MAX_CONDITION:
        raise AnalysisError(
            f"a {n}-sample record at {p.sample_rate:.6g} Sa/s cannot separate "
            f"{p.frequencies[cols].tolist()} Hz from the offset (too few cycles, or too near "
            "Nyquist): capture a longer record"
        )
    inverse = np.linalg.inv(gram)
    proj = p.proj[:, cols]
    rhs = np.empty((m, 2 * nf + 1))
    rhs[:, 0 : 2 * nf : 2] = proj.real
    rhs[:, 1 : 2 * nf : 2] = -proj.imag
    rhs[:, -1] = p.sums
    coef = np.linalg.solve(gram, rhs.T).T  # (M, P)
    energy = p.energy
    rss = energy - np.einsum("mp,mp->m", coef, rhs)
    suspect = rss < _CANCELLATION_GUARD * np.maximum(energy, np.finfo(float).tiny)
    if np.any(suspect):
        direct = _blocks.residual_sum_squares(
            p.records[suspect],
            x,
            phi,
            coef[suspect, 0 : 2 * nf : 2],
            coef[suspect, 1 : 2 * nf : 2],
            coef[suspect, -1],
        )
        rss = rss.copy()
        rss[suspect] = direct
    rss = np.maximum(rss, 0.0)
    return _Solution(
        cos_coef=coef[:, 0 : 2 * nf : 2],
        sin_coef=coef[:, 1 : 2 * nf : 2],
        offset=coef[:, -1],
        rss=rss,
        inverse_gram=inverse,
        n=n,
    )


def solve(
    records: np.ndarray, sample_rate: float, frequencies: np.ndarray, t0: float = 0.0
) -> _Solution:
    """Least squares for columns [cos, sin] per frequency plus an offset, every record at once."""
    freqs = np.atleast_1d(np.asarray(frequencies, dtype=float))
    _check_rate_frequency(sample_rate, freqs)
    if records.shape[1] <= 2 * freqs.size + 1:
        raise AnalysisError(
            f"{records.shape[1]} samples cannot determine {2 * freqs.size + 1} parameters"
        )
    return solve_projected(project_records(records, sample_rate, freqs, t0))


def _component(sol: _Solution, i: int) -> dict[str, np.ndarray]:
    """Amplitude, phase and their sigmas of frequency i for every record (delta method)."""
    nf = sol.cos_coef.shape[1]
    dof = sol.n - (2 * nf + 1)
    s2 = sol.rss / dof
    a = sol.cos_coef[:, i]
    b = sol.sin_coef[:, i]
    amp = np.hypot(a, b)
    phase = np.arctan2(-b, a)
    c_aa = sol.inverse_gram[2 * i, 2 * i]
    c_bb = sol.inverse_gram[2 * i + 1, 2 * i + 1]
    c_ab = sol.inverse_gram[2 * i, 2 * i + 1]
    quad = np.sqrt(s2 * 0.5 * (c_aa + c_bb))
    with np.errstate(invalid="ignore", divide="ignore"):
        ga = np.where(amp > 0, a / amp, 1.0)
        gb = np.where(amp > 0, b / amp, 0.0)
        var_amp = s2 * (ga * ga * c_aa + 2 * ga * gb * c_ab + gb * gb * c_bb)
        # θ = atan2(−b, a): ∂θ/∂a = b/A², ∂θ/∂b = −a/A²
        var_phase = s2 * (gb * gb * c_aa - 2 * ga * gb * c_ab + ga * ga * c_bb)
        phase_sigma = np.where(amp > 0, np.sqrt(var_phase) / amp, math.inf)
    return {
        "amplitude": amp,
        "phase": phase,
        "amplitude_sigma": np.sqrt(var_amp),
        "phase_sigma": phase_sigma,
        "quadrature_sigma": quad,
        "noise_sigma": np.sqrt(s2),
        "offset_sigma": np.sqrt(s2 * sol.inverse_gram[-1, -1]),
        "residual_rms": np.sqrt(sol.rss / sol.n),
    }


def fit_sine_batch(
    records: object, sample_rate: float, frequency: float, t0: float = 0.0
) -> SineFitBatch:
    """Fit every row of a (M, N) array at one known frequency (vectorised; Monte Carlo, averages)."""
    arr = as_records(records)
    sol = solve(arr, sample_rate, np.array([frequency]), t0)
    parts = _component(sol, 0)
    return SineFitBatch(
        offset=sol.offset,
        n=sol.n,
        frequency=float(frequency),
        sample_rate=float(sample_rate),
        t0=float(t0),
        **parts,
    )


def fit_sine(samples: object, sample_rate: float, frequency: float, t0: float = 0.0) -> SineFit:
    """Three-parameter fit of one record (volts, sample_rate in Sa/s, frequency in Hz).

    t0 is the time of the first sample relative to the phase reference (the trigger).
    """
    arr = as_records(samples)
    if arr.shape[0] != 1:
        raise AnalysisError(f"fit_sine takes one record; got {arr.shape[0]} (use fit_sine_batch)")
    return fit_sine_batch(arr, sample_rate, frequency, t0)[0]


def fit_projected(projection: Projection, index: int = 0) -> SineFit:
    """The three-parameter fit of the first record at the projection's frequency ``index``
    (what fit_sine gives at that frequency, without another pass over the record)."""
    p = projection
    sol = solve_projected(p, [index])
    parts = {k: float(v[0]) for k, v in _component(sol, 0).items()}
    return SineFit(
        offset=float(sol.offset[0]),
        n=sol.n,
        frequency=float(p.frequencies[index]),
        sample_rate=p.sample_rate,
        t0=p.t0,
        **parts,
    )


def fit_sines_projected(projection: Projection) -> MultiSineFit:
    """The joint fit of the first record at all of the projection's frequencies (fit_sines)."""
    p = projection
    if p.records.shape[0] != 1:
        raise AnalysisError(f"fit_sines takes one record; got {p.records.shape[0]}")
    sol = solve_projected(p)
    offset = float(sol.offset[0])
    comps = []
    for i, f in enumerate(p.frequencies):
        parts = {k: float(v[0]) for k, v in _component(sol, i).items()}
        comps.append(
            SineFit(
                offset=offset,
                n=sol.n,
                frequency=float(f),
                sample_rate=p.sample_rate,
                t0=p.t0,
                **parts,
            )
        )
    return MultiSineFit(
        components=tuple(comps),
        offset=offset,
        residual_rms=comps[0].residual_rms,
        noise_sigma=comps[0].noise_sigma,
        n=sol.n,
    )


def fit_sines(
    samples: object, sample_rate: float, frequencies: Sequence[float], t0: float = 0.0
) -> MultiSineFit:
    """Joint fit of several known frequencies plus one offset (e.g. a fundamental and harmonics)."""
    arr = as_records(samples)
    if arr.shape[0] != 1:
        raise AnalysisError(f"fit_sines takes one record; got {arr.shape[0]}")
    freqs = np.asarray(frequencies, dtype=float)
    if freqs.ndim != 1 or freqs.size == 0 or np.unique(freqs).size != freqs.size:
        raise AnalysisError(f"fit_sines needs distinct frequencies, got {freqs.tolist()}")
    if arr.shape[1] <= 2 * freqs.size + 1:
        raise AnalysisError(
            f"{arr.shape[1]} samples cannot determine {2 * freqs.size + 1} parameters"
        )
    return fit_sines_projected(project_records(arr, sample_rate, freqs, t0))
