"""Frequency refinement: the four-parameter sine fit (IEEE Std 1057), O(N) per step.

Gauss–Newton on y ≈ a·cos θ + b·sin θ + c with θ_n = φ + 2π x n: each step fits (a, b, c)
at the present x, then solves the linearised system with the extra column
u_n·(−a·sin θ_n + b·cos θ_n), u = n/N, for the frequency step. It converges when started
within about ±0.5 bin (1/T) of the truth (the project's own experiment), so it is meant for the strong
pin channel only; the weak output channel is then fitted at the refined frequency.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from benchseq.analysis import _blocks
from benchseq.analysis.errors import AnalysisError, FitNotConverged
from benchseq.analysis.sinefit import SineFit, as_records, fit_sine

DEFAULT_MIN_SNR = 30.0  # A/σ_c below this: the pin channel may be too near its floor to refine
_MAX_STEPS = 40
# refine_frequency works on the record averaged in boxes of D samples, D as large as keeps
# this many samples per cycle and at least _MIN_DECIMATED samples
DECIMATED_SAMPLES_PER_CYCLE = 32
_MIN_DECIMATED = 4096


@dataclass(frozen=True)
class FreeSineFit:
    """Result of the four-parameter fit: the sine at the fitted frequency and how it got there."""

    fit: SineFit
    frequency: float  # Hz
    frequency_sigma: float  # Hz, standard uncertainty from the four-parameter covariance
    iterations: int


def _four_parameter_system(
    record: np.ndarray, x: float, phi: float
) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Normal equations of the linearised four-parameter model at x (cycles/sample)."""
    n = record.size
    proj, sums, weighted = _blocks.project(
        record[None, :], np.array([x]), np.array([phi]), weighted=True
    )
    assert weighted is not None
    s, w, total = proj[0, 0], weighted[0, 0], float(sums[0])
    gram3 = _blocks.sine_gram(n, np.array([x]), np.array([phi]))
    rhs3 = np.array([s.real, -s.imag, total])
    a, b, _offset = np.linalg.solve(gram3, rhs3)
    g1 = _blocks.weighted_exp_sums(n, x, phi, 2)
    g2 = _blocks.weighted_exp_sums(n, 2 * x, 2 * phi, 2)
    u_pow = np.array([n * 1.0, (n - 1) / 2.0, (n - 1) * (2 * n - 1) / (6.0 * n)])  # Σ u^p, p=0..2
    uc2 = 0.5 * (u_pow + g2.real)  # Σ u^p cos²
    us2 = 0.5 * (u_pow - g2.real)
    usc = 0.5 * g2.imag
    h_c = -a * usc[1] + b * uc2[1]
    h_s = -a * us2[1] + b * usc[1]
    h_1 = -a * g1[1].imag + b * g1[1].real
    h_h = a * a * us2[2] - 2 * a * b * usc[2] + b * b * uc2[2]
    gram = np.zeros((4, 4))
    gram[:3, :3] = gram3
    gram[3, :3] = gram[:3, 3] = (h_c, h_s, h_1)
    gram[3, 3] = h_h
    yh = -a * (-w.imag) + b * w.real  # Σ y·u·(−a sin θ + b cos θ)
    rhs = np.array([*rhs3, yh])
    return gram, rhs, float(record @ record), n


def fit_sine_free(
    samples: object, sample_rate: float, start_frequency: float, t0: float = 0.0
) -> FreeSineFit:
    """Four-parameter fit (frequency free) of one record, started at ``start_frequency`` (Hz).

    Raises FitNotConverged when it wanders more than one bin or does not settle.
    """
    record = as_records(samples)
    if record.shape[0] != 1:
        raise AnalysisError("fit_sine_free takes one record")
    record = record[0]
    n = record.size
    x0 = start_frequency / sample_rate
    x = x0
    iteration = 0
    while iteration < _MAX_STEPS:
        iteration += 1
        phi = _blocks.TWO_PI * math.fmod(x * sample_rate * t0, 1.0)
        gram, rhs, _, _ = _four_parameter_system(record, x, phi)
        try:
            sol = np.linalg.solve(gram, rhs)
        except np.linalg.LinAlgError as exc:
            raise FitNotConverged(
                f"four-parameter fit near {start_frequency:.9g} Hz: singular system"
            ) from exc
        step = sol[3] / (_blocks.TWO_PI * n)
        x += step
        if abs(x - x0) * n > 1.0 or not (0.0 < x < 0.5):
            raise FitNotConverged(
                f"four-parameter fit started at {start_frequency:.9g} Hz moved more than one bin "
                f"({1.0 / (n / sample_rate):.4g} Hz): the start is too far off or the channel too noisy"
            )
        if abs(step) * n < 1e-10:
            break
    if abs(step) * n >= 1e-10:
        raise FitNotConverged(
            f"four-parameter fit near {start_frequency:.9g} Hz did not settle in {_MAX_STEPS} steps"
        )
    frequency = x * sample_rate
    fit = fit_sine(record, sample_rate, frequency, t0)
    phi = _blocks.TWO_PI * math.fmod(frequency * t0, 1.0)
    gram, _, _, _ = _four_parameter_system(record, x, phi)
    dof = n - 4
    s2 = max(fit.residual_rms**2 * n / dof, 0.0)
    var_delta = s2 * np.linalg.inv(gram)[3, 3]
    sigma = math.sqrt(max(var_delta, 0.0)) / (_blocks.TWO_PI * n) * sample_rate
    return FreeSineFit(fit=fit, frequency=frequency, frequency_sigma=sigma, iterations=iteration)


@dataclass(frozen=True)
class FrequencyRefinement:
    """The frequency to fit both channels at; ``refined`` False keeps the generator's value."""

    frequency: float
    refined: bool
    reason: str  # "" when refined, else a short flag: "low_snr", "not_converged", "off_by_over_half_bin"
    frequency_sigma: float


def decimate_for_refinement(
    record: np.ndarray, sample_rate: float, frequency: float, t0: float = 0.0
) -> tuple[np.ndarray, float, float]:
    """The record averaged over boxes of D consecutive samples, with its rate and the time
    of its first (box-centre) sample: (record, sample_rate / D, t0 + (D − 1)/(2·fs)).

    A box average passes the tone at f with gain sinc(π·f·D/fs) and divides white noise's
    variance by D while the samples drop by D, so A²·N/σ² — and with it the Cramér–Rao bound
    of the frequency, 12σ²/((2π)²·A²·N·T²) in cycles² [Kay, Estimation Theory, §3.10] — is
    unchanged up to 1/sinc²: at 32 samples per cycle after decimation that is 0.3 % in
    variance. The noise near f, which alone sets a frequency estimate's spread, passes the
    box almost whole; what it removes lies far above f. Records too short or too coarsely
    sampled for D ≥ 2 come back unchanged."""
    d = int(sample_rate / (DECIMATED_SAMPLES_PER_CYCLE * frequency))
    d = min(d, record.size // _MIN_DECIMATED)
    if d < 2:
        return record, sample_rate, t0
    k = record.size // d
    boxes = record[: k * d].reshape(k, d).mean(axis=1)
    return boxes, sample_rate / d, t0 + 0.5 * (d - 1) / sample_rate


def refine_frequency(
    samples: object,
    sample_rate: float,
    frequency: float,
    t0: float = 0.0,
    min_snr: float = DEFAULT_MIN_SNR,
) -> FrequencyRefinement:
    """Refine the test frequency on a strong channel; refuse quietly (with a reason) otherwise.

    Refuses when the channel's own three-parameter fit has A/σ_c < ``min_snr`` (it may be at
    its floor, where a free frequency locks onto noise), when the fit does not converge, or
    when it lands more than half a bin from the start. Both fits run on the record
    decimated by decimate_for_refinement (σ_c at f and the frequency's bound are those of
    the whole record), so the Gauss–Newton steps read a short record.
    """
    whole = as_records(samples)[0]
    record, rate, start = decimate_for_refinement(whole, sample_rate, frequency, t0)
    first = fit_sine(record, rate, frequency, start)
    if not first.snr >= min_snr:
        return FrequencyRefinement(frequency, False, "low_snr", math.nan)
    try:
        free = fit_sine_free(record, rate, frequency, start)
    except FitNotConverged:
        return FrequencyRefinement(frequency, False, "not_converged", math.nan)
    if abs(free.frequency - frequency) * whole.size / sample_rate > 0.5:
        return FrequencyRefinement(frequency, False, "off_by_over_half_bin", math.nan)
    return FrequencyRefinement(free.frequency, True, "", free.frequency_sigma)
