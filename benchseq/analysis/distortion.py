"""Harmonics of the injected ripple and its total harmonic distortion (joint fit)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from benchseq.analysis.sinefit import MultiSineFit, SineFit, fit_sines

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


def harmonic_orders(
    frequency: float, sample_rate: float, orders: Sequence[int] = DEFAULT_ORDERS
) -> tuple[int, ...]:
    """The orders of ``orders`` that fit below NYQUIST_MARGIN of the Nyquist frequency."""
    return tuple(
        int(k) for k in orders if k >= 2 and k * frequency < NYQUIST_MARGIN * sample_rate / 2
    )


def harmonics_from_fit(fit: MultiSineFit, orders: tuple[int, ...]) -> HarmonicFit:
    """A HarmonicFit from a joint fit at [f, k·f for k in orders]."""
    fundamental, *harmonics = fit.components
    power = sum(h.amplitude**2 for h in harmonics)
    thd = math.sqrt(power) / fundamental.amplitude if fundamental.amplitude > 0 else math.inf
    return HarmonicFit(fundamental=fundamental, harmonics=tuple(harmonics), orders=orders, thd=thd)


def fit_harmonics(
    samples: object,
    sample_rate: float,
    frequency: float,
    orders: Sequence[int] = DEFAULT_ORDERS,
    t0: float = 0.0,
) -> HarmonicFit:
    """Fit the fundamental and the given harmonic orders jointly; THD from their amplitudes."""
    kept = harmonic_orders(frequency, sample_rate, orders)
    fit = fit_sines(samples, sample_rate, [frequency, *(k * frequency for k in kept)], t0)
    return harmonics_from_fit(fit, kept)
