"""Local noise floor at the test frequency from fits at neighbouring frequencies.

The residual of a fit holds harmonics, mains pickup and spurs as well as noise, so it can
misstate the noise at f. Like a spectrum analyser's noise marker, fit f_k = f ± k/T
(k = 2…K, T the record duration) jointly with f itself (so the tone at f cannot leak in),
skip neighbours near harmonics of f, DC and Nyquist, and read the noise per quadrature
from their amplitudes: with no signal E[A_k²] = 2σ_c² (Rayleigh).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from benchseq.analysis import _blocks
from benchseq.analysis.errors import AnalysisError
from benchseq.analysis.sinefit import Projection, as_records, project_records

DEFAULT_NEIGHBOURS = 10  # K: neighbours at k = 2…K bins on each side
DEFAULT_HARMONICS = 5  # harmonics of f fitted along with each neighbour
DEFAULT_DETECTION_K = 5.0  # a value when A > 5·σ_c (value_threshold: Rice bias < u/4)
FALSE_VALUE_RATE = 1e-4  # a noise-only output may pass as a value this often per look, at most
SKIP_BINS = 1.5  # neighbours this close (in bins) to a harmonic, DC or Nyquist are skipped
RAYLEIGH_MEAN = math.sqrt(math.pi / 2.0)  # mean of a noise-only amplitude, in σ_c


@dataclass(frozen=True)
class NoiseFloor:
    """Noise at the test frequency of one record.

    sigma: σ_c, the standard deviation per quadrature a fit at f would have (V);
    mean_amplitude: what a noise-only fit at f reads on average, √(π/2)·σ_c (V);
    density: one-sided noise density at f after aliasing, σ_c·√T (V/√Hz);
    used: how many neighbour fits went into it.
    """

    sigma: float
    mean_amplitude: float
    density: float
    used: int
    frequencies: tuple[float, ...]


def neighbour_frequencies(
    frequency: float, duration: float, sample_rate: float, neighbours: int = DEFAULT_NEIGHBOURS
) -> np.ndarray:
    """f ± k/T for k = 2…K, without those near harmonics of f (and its multiples), DC and Nyquist."""
    bin_width = 1.0 / duration
    ks = np.arange(2, max(neighbours, 2) + 1, dtype=float)
    cand = np.concatenate([frequency - ks * bin_width, frequency + ks * bin_width])
    nyquist = sample_rate / 2.0
    keep = (cand > SKIP_BINS * bin_width) & (cand < nyquist - SKIP_BINS * bin_width)
    order = np.round(cand / frequency)
    near_harmonic = (order >= 2) & (np.abs(cand - order * frequency) < SKIP_BINS * bin_width)
    return np.sort(cand[keep & ~near_harmonic])


def floor_frequencies(
    frequency: float,
    n: int,
    sample_rate: float,
    neighbours: int = DEFAULT_NEIGHBOURS,
    harmonics: int = DEFAULT_HARMONICS,
) -> tuple[np.ndarray, np.ndarray]:
    """What noise_floor fits on an n-sample record: the known tones [f, 2f…] and the
    neighbours f_k (may be empty)."""
    duration = n / sample_rate
    near = neighbour_frequencies(frequency, duration, sample_rate, neighbours)
    nyquist = sample_rate / 2.0
    known = [frequency] + [
        h * frequency
        for h in range(2, harmonics + 1)
        if h * frequency < nyquist - SKIP_BINS / duration
    ]
    return np.array(known, dtype=float), near


def noise_floor(
    samples: object,
    sample_rate: float,
    frequency: float,
    t0: float = 0.0,
    neighbours: int = DEFAULT_NEIGHBOURS,
    harmonics: int = DEFAULT_HARMONICS,
) -> NoiseFloor:
    """σ_c at ``frequency`` from joint fits [f, 2f…, f_k, offset] at each neighbour f_k.

    The tone at f and its harmonics up to ``harmonics`` (below Nyquist) are fitted with every
    neighbour, so they cannot leak into it even when the record is not coherent; other
    spurs vanish from the neighbours only in a coherent record (f = J/T).
    """
    record = as_records(samples)
    if record.shape[0] != 1:
        raise AnalysisError("noise_floor takes one record")
    known, near = floor_frequencies(frequency, record.shape[1], sample_rate, neighbours, harmonics)
    _no_neighbours(near, frequency, record.shape[1], sample_rate)
    projection = project_records(record, sample_rate, np.concatenate([known, near]), t0)
    return floor_from_projection(projection, known.size)


def _no_neighbours(near: np.ndarray, frequency: float, n: int, sample_rate: float) -> None:
    if near.size == 0:
        raise AnalysisError(
            f"no neighbour frequencies around {frequency:.6g} Hz fit in a {n / sample_rate:.4g} s "
            f"record at {sample_rate:.6g} Sa/s: capture more cycles"
        )


def floor_from_projection(projection: Projection, known: int) -> NoiseFloor:
    """noise_floor from a projection onto [known tones (f first)…, neighbours…] (the one
    pass over the record that the output's fit at f shares)."""
    p = projection
    n = p.n
    x, phi, proj, sums = p.x, p.phi, p.proj, p.sums
    frequency = float(p.frequencies[0])
    _no_neighbours(p.frequencies[known:], frequency, n, p.sample_rate)
    duration = n / p.sample_rate
    single = np.linalg.inv(_blocks.sine_gram(n, x[:1], phi[:1]))
    at_f = single[0, 0] + single[1, 1]  # σ_c² of the single-tone fit at f, in units of s²
    m = known
    scaled = []
    for i in range(m, x.size):
        cols = np.array([*range(m), i])
        gram = _blocks.sine_gram(n, x[cols], phi[cols])
        rhs = np.empty(2 * cols.size + 1)
        rhs[0:-1:2] = proj[0, cols].real
        rhs[1:-1:2] = -proj[0, cols].imag
        rhs[-1] = sums[0]
        try:
            inverse = np.linalg.inv(gram)
        except np.linalg.LinAlgError:
            continue
        a, b = (inverse @ rhs)[2 * m : 2 * m + 2]
        own = inverse[2 * m, 2 * m] + inverse[2 * m + 1, 2 * m + 1]
        scaled.append((a * a + b * b) * at_f / own)
    if not scaled:
        raise AnalysisError(f"no usable neighbour fits around {frequency:.6g} Hz")
    sigma = math.sqrt(float(np.mean(scaled)) / 2.0)
    return NoiseFloor(
        sigma=sigma,
        mean_amplitude=RAYLEIGH_MEAN * sigma,
        density=sigma * math.sqrt(duration),
        used=len(scaled),
        frequencies=tuple(float(f) for f in p.frequencies[known:]),
    )


def widened_quantile(z: float, dof: float) -> float:
    """Student-t quantile for a normal quantile z when σ is estimated with ``dof`` degrees of
    freedom (Cornish–Fisher expansion, Abramowitz & Stegun 26.7.5, from memory).

    The neighbour floor estimates σ_c² from 2·used squared quadratures, so a bound built
    with it needs t rather than z to keep its coverage.
    """
    if not math.isfinite(dof):
        return z
    if dof < 3:
        raise AnalysisError(f"{dof:g} degrees of freedom is too few to widen a quantile")
    z3, z5 = z**3, z**5
    return z + (z3 + z) / (4 * dof) + (5 * z5 + 16 * z3 + 3 * z) / (96 * dof**2)


def value_threshold(
    dof: float = math.inf, k: float = DEFAULT_DETECTION_K, rate: float = FALSE_VALUE_RATE
) -> float:
    """The least A_out/σ_c at which a rejection is reported as a value rather than a bound.

    Two conditions, the larger wins:

    - bias: the value uses √(A² − 2σ_c²) (A² of a Rice amplitude reads 2σ_c² high); what is
      left of the bias in dB is about −σ_c²/A² nepers against u = σ_c/A nepers, i.e. u/ρ at
      ρ = A/σ_c. Below u/4 needs ρ > 4 to first order; a Monte Carlo of the full estimator
      gives 0.33u at ρ = 4 and 0.23u at ρ = 5, hence ``k`` = 5;
    - false values: with no signal A²/(2σ_c²) is exponential, and with σ_c estimated from
      ``dof`` squared quadratures A²/(2σ̂_c²) follows F(2, dof), whose tail is
      (1 + x·2/dof)^(−dof/2) (Abramowitz & Stegun 26.6.4 for two numerator degrees of
      freedom, from memory). The threshold where that tail is ``rate``:
      ρ² = dof·(rate^(−2/dof) − 1), tending to 2·ln(1/rate) (4.29 at 1e-4) for a known σ_c.
    """
    if not math.isfinite(dof):
        return max(k, math.sqrt(2.0 * math.log(1.0 / rate)))
    if dof < 2:
        raise AnalysisError(f"{dof:g} degrees of freedom is too few for a value threshold")
    return max(k, math.sqrt(dof * (rate ** (-2.0 / dof) - 1.0)))


def is_detected(amplitude: float, sigma: float, k: float = DEFAULT_DETECTION_K) -> bool:
    """A fitted amplitude counts as a signal (a value) when it exceeds k·σ_c."""
    return bool(amplitude > k * sigma)
