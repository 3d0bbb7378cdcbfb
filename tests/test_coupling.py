"""The scope's AC-coupling corner (benchseq/coupling.py) against the first-order high-pass
of the circuit handbooks: |H| = f/√(f² + f_c²), arg H = atan(f_c/f) (an RC high-pass;
Horowitz & Hill, The Art of Electronics, 3rd ed., §1.7, from memory), and against scipy's
evaluation of the same analogue transfer function s/(s + ω_c) (scipy.signal.freqs)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import signal

from benchseq.coupling import corner_from_ratio, high_pass

CORNERS_HZ = [0.5, 3.4, 10.0, 120.0]
FREQUENCIES_HZ = np.geomspace(0.05, 2.0e5, 41)


def _handbook(f: float, fc: float) -> tuple[float, float]:
    """|H| and arg H (rad) of the RC high-pass, written as the handbook gives them."""
    return f / math.sqrt(f * f + fc * fc), math.atan(fc / f)


@pytest.mark.parametrize("fc", CORNERS_HZ)
def test_response_matches_the_handbook_high_pass(fc: float) -> None:
    for f in FREQUENCIES_HZ:
        h = high_pass(float(f), fc)
        magnitude, phase = _handbook(float(f), fc)
        assert abs(h) == pytest.approx(magnitude, rel=1e-12)
        assert math.atan2(h.imag, h.real) == pytest.approx(phase, rel=1e-12, abs=1e-15)


@pytest.mark.parametrize("fc", CORNERS_HZ)
def test_response_matches_scipy_freqs(fc: float) -> None:
    """H(s) = s/(s + ω_c) evaluated by scipy at s = jω."""
    w = 2.0 * math.pi * FREQUENCIES_HZ
    _, reference = signal.freqs([1.0, 0.0], [1.0, 2.0 * math.pi * fc], worN=w)
    ours = np.array([high_pass(float(f), fc) for f in FREQUENCIES_HZ])
    np.testing.assert_allclose(ours, reference, rtol=1e-12, atol=0)


def test_the_handbook_landmarks() -> None:
    """At the corner the loss is 3 dB (1/√2) with a 45° lead; a decade below it the
    response falls at 20 dB per decade (common practice: the single pole's asymptote)."""
    fc = 10.0
    h = high_pass(fc, fc)
    assert abs(h) == pytest.approx(1 / math.sqrt(2), rel=1e-12)
    assert math.degrees(math.atan2(h.imag, h.real)) == pytest.approx(45.0, rel=1e-12)
    low = 20 * math.log10(abs(high_pass(fc / 1000, fc)) / abs(high_pass(fc / 100, fc)))
    assert low == pytest.approx(-20.0, abs=1e-3)
    assert high_pass(123.0, 0.0) == 1.0  # no coupling capacitor: no loss


@given(
    fc=st.floats(0.1, 500.0),
    ratio=st.floats(0.02, 100.0),  # measuring frequency over corner
)
def test_corner_recovered_from_the_handbook_magnitude(fc: float, ratio: float) -> None:
    """The AC/DC amplitude ratio a handbook high-pass gives at f: the corner comes back
    (or 0 where the loss is within 0.05 % of none, too small to resolve)."""
    f = fc * ratio
    magnitude, _ = _handbook(f, fc)
    found = corner_from_ratio(f, magnitude)
    if magnitude >= 0.9995:  # |H| within 0.05 % of 1: f above about 32·f_c
        assert found == 0.0
        assert ratio > 31.0
    else:
        assert found == pytest.approx(fc, rel=1e-9)


@pytest.mark.parametrize("bad", [0.0, -0.5, math.nan, math.inf])
def test_corner_refuses_a_ratio_that_is_not_positive_and_finite(bad: float) -> None:
    with pytest.raises(ValueError, match="must be positive"):
        corner_from_ratio(100.0, bad)
