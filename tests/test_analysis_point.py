"""measure_point end to end on synthetic two-channel records with a known truth.

Sources: the GUM standard uncertainty (JCGM 100 §5.1.2) should describe the spread of the
result (about 68 % within ±u, normalised errors of unit spread); a lower bound built with
the one-sided normal quantile z = 1.645 (any statistics table) covers ≥ 95 %.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchseq.analysis import AnalysisError, measure_point

FS, N, F = 1e6, 50_000, 1234.5


def _records(
    rejection_db: float, noise: float, rng: np.random.Generator, shape: tuple[int, ...] = ()
):
    t = np.arange(N) / FS
    pin = 0.1 * np.cos(2 * np.pi * F * t + 0.3) + 0.002 * np.cos(4 * np.pi * F * t)
    out = 0.1 * 10 ** (-rejection_db / 20) * np.cos(2 * np.pi * F * t + 1.3)
    return pin + rng.normal(0, noise, (*shape, N)), out + rng.normal(0, noise, (*shape, N))


def test_a_detected_point_gives_a_value_near_the_truth() -> None:
    rng = np.random.default_rng(1)
    pin, out = _records(60.0, 1e-3, rng)
    bin_width = FS / N
    got = measure_point(pin, out, 1 / FS, F + 0.2 * bin_width)
    assert got.refinement.refined and got.frequency == pytest.approx(F, abs=0.02 * bin_width)
    rej = got.rejection
    assert not rej.is_bound and got.flags == ()
    assert abs(rej.rejection_db - 60.0) < 4 * rej.uncertainty_db
    assert rej.phase == pytest.approx(1.0, abs=4 * rej.uncertainty_db / 8.6859)
    assert got.thd == pytest.approx(0.02, abs=0.002)
    row = got.to_row()
    assert row["is_bound"] is False and row["flags"] == "" and isinstance(row["ratio"], complex)


@pytest.mark.slow
def test_normalised_errors_have_unit_spread() -> None:
    """Over 150 points with the output at A/σ_c ≈ 10, (result − truth)/u has a spread near 1
    and no offset beyond chance (the Rice bias of the output amplitude removed)."""
    rng = np.random.default_rng(2)
    errors = []
    for _ in range(150):
        pin, out = _records(60.0, 1.5e-3, rng)
        rej = measure_point(pin, out, 1 / FS, F, harmonic_orders=None).rejection
        assert not rej.is_bound
        errors.append((rej.rejection_db - 60.0) / rej.uncertainty_db)
    assert 0.8 < float(np.std(errors)) < 1.2
    assert abs(float(np.mean(errors))) < 0.3


def test_an_output_under_the_floor_is_a_bound_below_the_truth() -> None:
    rng = np.random.default_rng(3)
    pin, out = _records(110.0, 1e-3, rng)
    got = measure_point(pin, out, 1 / FS, F)
    rej = got.rejection
    assert rej.is_bound and "not_detected" in got.flags
    assert math.isnan(rej.rejection_db) and rej.bound_db < 110.0
    assert got.floor is not None and got.floor.used >= 10
    assert got.output_floor == pytest.approx(1e-3 * math.sqrt(2 / N), rel=0.35)


def test_triggered_records_are_averaged_before_the_fit() -> None:
    """M records averaged sample-wise: noise per quadrature falls by √M (common practice)."""
    rng = np.random.default_rng(4)
    pin, out = _records(60.0, 2e-3, rng, shape=(16,))
    many = measure_point(pin, out, 1 / FS, F, refine=False)
    one = measure_point(pin[0], out[0], 1 / FS, F, refine=False)
    ratio = one.output.quadrature_sigma / many.output.quadrature_sigma
    assert ratio == pytest.approx(4.0, rel=0.1)


def test_a_weak_pin_is_not_refined() -> None:
    rng = np.random.default_rng(5)
    t = np.arange(N) / FS
    pin = 1e-4 * np.cos(2 * np.pi * F * t) + rng.normal(0, 1e-2, N)
    got = measure_point(pin, pin.copy(), 1 / FS, F)
    assert not got.refinement.refined and "unrefined_low_snr" in got.flags and got.frequency == F


def test_mismatched_channels_are_refused() -> None:
    with pytest.raises(AnalysisError, match="differ in length"):
        measure_point(np.zeros(1000), np.zeros(999), 1e-6, 1e3)
    with pytest.raises(AnalysisError, match="sample interval"):
        measure_point(np.zeros(1000), np.zeros(1000), 0.0, 1e3)
