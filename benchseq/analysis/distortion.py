"""Harmonics of the injected ripple and its total harmonic distortion (joint fit)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from benchseq.analysis.sinefit import SineFit, fit_sines

DEFAULT_ORDERS = (2, 3, 4, 5)
NYQUIST_MARGIN = 0.95  # harmonics above this fraction of fs/2 are left out of the fit


@dataclass(frozen=True)
class HarmonicFit:
    """Fundamental and harmonics from one joint least-squares fit.

    thd: √(Σ A_h²)/A_1 over the harmonics that fit below Nyquist (a ratio; 0.05 = 5 %).
    It includes the noise in each harmonic's fit (Rice bias 2σ_c² per harmonic power).
    """

    fundamental: SineFit
    harmonics: tuple[SineFit, ...]
    orders: tuple[int, ...]
    thd: float


def fit_harmonics(
    samples: object,
    sample_rate: float,
    frequency: float,
    orders: Sequence[int] = DEFAULT_ORDERS,
    t0: float = 0.0,
) -> HarmonicFit:
    """Fit the fundamental and the given harmonic orders jointly; THD from their amplitudes."""
    kept = tuple(
        int(k) for k in orders if k >= 2 and k * frequency < NYQUIST_MARGIN * sample_rate / 2
    )
    fit = fit_sines(samples, sample_rate, [frequency, *(k * frequency for k in kept)], t0)
    fundamental, *harmonics = fit.components
    power = sum(h.amplitude**2 for h in harmonics)
    thd = math.sqrt(power) / fundamental.amplitude if fundamental.amplitude > 0 else math.inf
    return HarmonicFit(fundamental=fundamental, harmonics=tuple(harmonics), orders=kept, thd=thd)
