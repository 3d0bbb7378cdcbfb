"""The calibration's quantiser bound (benchseq.calibrate.quantiser_bound) against a direct
simulation written here: a sine rounded to whole codes (a uniform quantiser without
dither) and its fundamental fitted by linear least squares (numpy.linalg.lstsq on cos, sin
and a constant). The rounding is first checked to be the quantiser the GUM describes: an
error uniform over one step, variance q²/12 (JCGM 100:2008, F.2.2.1, the resolution of a
digital indication; 4.3.7, a rectangular distribution of half-width a has variance a²/3,
here a = q/2). The calibration states bound/√3 as the standard uncertainty (the same
clause, a = the bound): the scatter of the simulated error must stay within it."""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchseq.calibrate import quantiser_bound

SEEDS = [11, 12, 13]
N = 4096  # samples per record
CYCLES = 37.0 + (math.sqrt(5.0) - 1.0) / 2.0  # not a whole number: the phases spread
AMPLITUDES = [1.0, 1.5, 2.0, 3.0, 5.0, 8.0, 13.0, 20.0, 40.0, 80.0, 160.0]  # codes, peak
DRAWS = 40  # per amplitude and seed: a random phase and a random offset within one code
K = 4.0  # coverage factor of the outlier limit on a sample mean


def _record(rng: np.random.Generator, amplitude: float) -> tuple[np.ndarray, np.ndarray]:
    """One record before and after rounding to whole codes (step q = 1)."""
    n = np.arange(N)
    x = amplitude * np.cos(2 * math.pi * CYCLES * n / N + rng.uniform(0, 2 * math.pi))
    x += rng.uniform(-0.5, 0.5)
    return x, np.rint(x)


def _fitted_amplitude(codes: np.ndarray) -> float:
    n = np.arange(N)
    w = 2 * math.pi * CYCLES / N
    design = np.column_stack([np.cos(w * n), np.sin(w * n), np.ones(N)])
    (a, b, _), *_ = np.linalg.lstsq(design, codes, rcond=None)
    return math.hypot(a, b)


@pytest.mark.parametrize("seed", SEEDS)
def test_rounding_error_has_the_gum_variance_q2_over_12(seed: int) -> None:
    """The rounding error e of the records (random offset within one step) is uniform over
    ±q/2: its mean square is q²/12 (GUM F.2.2.1). Within a record the samples' errors are
    correlated (a smooth sine), so each record's mean of e² is one observation; the mean
    of DRAWS of them lies within K standard uncertainties (their scatter/√DRAWS) of 1/12."""
    rng = np.random.default_rng(seed)
    for amplitude in AMPLITUDES:
        means = []
        for _ in range(DRAWS):
            x, codes = _record(rng, amplitude)
            means.append(float(np.mean((codes - x) ** 2)))
        u = float(np.std(means, ddof=1)) / math.sqrt(DRAWS)
        assert abs(float(np.mean(means)) - 1 / 12) <= K * u, (amplitude, np.mean(means), u)


@pytest.mark.parametrize("seed", SEEDS)
def test_fitted_amplitude_error_stays_within_the_bound(seed: int) -> None:
    """No draw (phase, offset) moves the fitted amplitude by more than the bound."""
    rng = np.random.default_rng(seed)
    for amplitude in AMPLITUDES:
        bound = float(quantiser_bound(amplitude))
        worst = max(
            abs(_fitted_amplitude(_record(rng, amplitude)[1]) / amplitude - 1) for _ in range(DRAWS)
        )
        assert worst <= bound, (amplitude, worst, bound)


@pytest.mark.parametrize("seed", SEEDS)
def test_the_rectangular_standard_uncertainty_covers_the_scatter(seed: int) -> None:
    """The root-mean-square error over the draws stays below bound/√3, the standard
    uncertainty the calibration states for it (GUM 4.3.7 with a = the bound): the
    rectangular reading of the bound does not understate the quantiser's part."""
    rng = np.random.default_rng(seed)
    for amplitude in AMPLITUDES:
        errors = np.array(
            [_fitted_amplitude(_record(rng, amplitude)[1]) / amplitude - 1 for _ in range(DRAWS)]
        )
        rms = float(np.sqrt(np.mean(errors**2)))
        assert rms <= float(quantiser_bound(amplitude)) / math.sqrt(3.0), (amplitude, rms)
