"""Rejection arithmetic, value/bound typing and channel calibration.

Sources: GUM, JCGM 100:2008 §5.1.2 (law of propagation of uncertainty) for the dB
uncertainty; rejection = 20·log10(V_pin/V_out) (common practice: positive when the device attenuates); a single-pole
low-pass |H| = 1/√(1 + (f/f_c)²), phase −atan(f/f_c) (standard circuit result).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchseq.analysis import (
    AnalysisError,
    ChannelCalibration,
    SineFit,
    db_uncertainty,
    measure_point,
    ratio_db,
    rejection,
)


def _fit(amplitude: float, sigma: float, phase: float = 0.0) -> SineFit:
    """A fit with a given amplitude and per-quadrature σ (long-record limit: σ_A = σ_c)."""
    return SineFit(
        amplitude=amplitude,
        phase=phase,
        offset=0.0,
        residual_rms=sigma,
        amplitude_sigma=sigma,
        phase_sigma=sigma / amplitude if amplitude > 0 else math.inf,
        offset_sigma=sigma,
        quadrature_sigma=sigma,
        noise_sigma=sigma,
        n=10**6,
        frequency=1e3,
        sample_rate=1e7,
    )


def test_db_arithmetic_from_the_gum() -> None:
    """100 mV over 100 µV = 60.000 dB; relative uncertainties 0.1 % and 1 % combine to
    (20/ln 10)·√(0.001² + 0.01²) = 0.0873 dB (GUM, JCGM 100 §5.1.2)."""
    assert round(ratio_db(0.1, 100e-6), 3) == 60.000
    assert round(db_uncertainty(0.001, 0.01), 4) == 0.0873
    rej = rejection(_fit(0.1, 1e-4), _fit(100e-6, 1e-6, phase=0.5))
    assert rej.kind == "value" and not rej.is_bound
    # plus the Rice-bias correction of the output, −10·log10(1 − 2/SNR²) = 0.00087 dB at 100
    assert rej.rejection_db == pytest.approx(60.0 - 10 * math.log10(1 - 2e-4), abs=1e-9)
    assert round(rej.uncertainty_db, 4) == 0.0873
    assert rej.phase == pytest.approx(0.5)
    assert abs(rej.ratio - 1e-3 * np.exp(0.5j)) < 1e-12
    low, high = rej.interval_db
    assert low < rej.rejection_db < high
    assert math.isnan(rej.bound_db)
    assert rej.describe() == "60.00 ± 0.09 dB"


def test_low_snr_interval_is_computed_in_linear_units() -> None:
    """At 6 σ (just above the value threshold of 5 σ) the k = 1 interval, taken in linear
    units and converted, is asymmetric: the high side is 20·log10(1/(1 − u)) and the low
    side 20·log10(1/(1 + u)) (from the definition; GUM §5.1.6 note on non-linear models)."""
    rej = rejection(_fit(1.0, 1e-6), _fit(6e-3, 1e-3))
    low, high = rej.interval_db
    assert high - rej.rejection_db > rej.rejection_db - low > 0
    # the output's Rice bias (A² reads 2σ² high) is removed: A_true² ≈ 36σ² − 2σ²
    assert rej.rejection_db == pytest.approx(-10 * math.log10(34e-6), rel=1e-9)


def test_undetected_output_is_a_bound_and_never_a_value() -> None:
    """Below the value threshold (5 σ_c): a lower bound 20·log10(A_pin/(A_out + 1.645 σ_c)), with every value
    field NaN so it cannot be read as a measurement."""
    rej = rejection(_fit(0.1, 1e-5), _fit(2e-6, 1e-6))
    assert rej.is_bound and rej.kind == "bound"
    assert math.isnan(rej.rejection_db) and math.isnan(rej.uncertainty_db) and math.isnan(rej.phase)
    assert rej.bound_db == pytest.approx(20 * math.log10(0.1 / (2e-6 + 1.645e-6)))
    assert rej.describe().startswith("≥ ")
    # a larger floor given explicitly weakens the bound
    assert rejection(_fit(0.1, 1e-5), _fit(2e-6, 1e-6), output_sigma=1e-5).bound_db < rej.bound_db


def test_calibration_term_enters_the_uncertainty() -> None:
    base = rejection(_fit(0.1, 1e-4), _fit(1e-4, 1e-6))
    cal = rejection(
        _fit(0.1, 1e-4), _fit(1e-4, 1e-6), calibration_ratio=1.02, calibration_uncertainty=0.005
    )
    assert cal.uncertainty_db == pytest.approx(db_uncertainty(0.001, 0.01, 0.005), rel=1e-3)
    assert cal.uncertainty_db > base.uncertainty_db
    assert cal.rejection_db - base.rejection_db == pytest.approx(20 * math.log10(1.02), rel=1e-3)


def _single_pole(f: np.ndarray, fc: float) -> np.ndarray:
    return 1.0 / (1.0 + 1j * f / fc)


def test_calibration_interpolates_a_single_pole_residue() -> None:
    """A 20 MHz single-pole bandwidth limit calibrated at 20 points per decade: at f_c/20 the
    lookup gives −0.011 dB and −2.86° (1/√(1 + 0.05²), −atan(0.05); single-pole RC response)."""
    fc = 20e6
    freqs = np.logspace(1, 7, 121)
    cal = ChannelCalibration.from_sweep(freqs, _single_pole(freqs, fc), 0.002)
    found = cal.lookup(fc / 20)
    assert found.inside
    assert 20 * math.log10(abs(found.ratio)) == pytest.approx(
        -10 * math.log10(1 + 0.05**2), abs=2e-4
    )
    assert math.degrees(np.angle(found.ratio)) == pytest.approx(
        -math.degrees(math.atan(0.05)), abs=0.01
    )
    assert found.uncertainty == pytest.approx(0.002)
    corrected, u, inside = cal.correct(2.0 * found.ratio, fc / 20)
    assert inside and corrected == pytest.approx(2.0) and u == pytest.approx(0.002)


def test_calibration_is_exact_for_power_laws_in_log_frequency() -> None:
    """log|H| and unwrapped phase linear in log f are reproduced exactly between points,
    including a phase that winds past ±π (interpolation of unwrapped phase)."""
    freqs = np.logspace(1, 6, 11)  # phase steps of 1.04 rad: unwrappable
    ratio = (freqs / 10.0) ** -0.3 * np.exp(-1j * 0.9 * np.log(freqs / 10.0))
    cal = ChannelCalibration.from_sweep(freqs[::-1], ratio[::-1])
    for f in (31.6, 2e3, 5e5):
        expected = (f / 10.0) ** -0.3 * np.exp(-1j * 0.9 * math.log(f / 10.0))
        assert abs(cal.lookup(f).ratio - expected) < 1e-12


def test_calibration_refuses_to_extrapolate() -> None:
    freqs = np.array([100.0, 1e3, 1e4])
    cal = ChannelCalibration.from_sweep(freqs, [1.01, 1.02, 1.03])
    for f in (99.0, 1.0001e4):
        found = cal.lookup(f)
        assert not found.inside and math.isnan(found.ratio.real)
        ratio, u, inside = cal.correct(0.5 + 0.1j, f)
        assert ratio == 0.5 + 0.1j and u == 0.0 and not inside
    assert cal.lookup(100.0).inside and cal.lookup(1e4).inside


def test_measure_point_flags_a_frequency_outside_the_calibration() -> None:
    fs, n, f = 1e5, 10_000, 1230.0
    t = np.arange(n) / fs
    pin = 0.1 * np.cos(2 * np.pi * f * t)
    out = 1e-3 * np.cos(2 * np.pi * f * t)
    cal = ChannelCalibration.from_sweep([10e3, 100e3], [1.05, 1.05])
    got = measure_point(pin, out, 1 / fs, f, calibration=cal)
    assert "outside_calibration" in got.flags and not got.calibrated
    inside = ChannelCalibration.from_sweep([100.0, 10e3], [1.05, 1.05])
    got = measure_point(pin, out, 1 / fs, f, calibration=inside)
    assert got.calibrated and got.rejection.rejection_db == pytest.approx(
        40 + 20 * math.log10(1.05), abs=1e-6
    )


@pytest.mark.parametrize(
    ("freqs", "ratio"),
    [
        ([], []),
        ([1.0, 2.0], [1.0]),
        ([1.0, 1.0], [1.0, 1.0]),
        ([-1.0, 2.0], [1, 1]),
        ([1.0, 2.0], [0.0, 1.0]),
    ],
)
def test_bad_calibration_sweeps_are_refused(freqs: list[float], ratio: list[complex]) -> None:
    with pytest.raises(AnalysisError, match="calibration"):
        ChannelCalibration.from_sweep(freqs, ratio)


def test_a_pin_without_ripple_is_an_error_not_a_number() -> None:
    with pytest.raises(AnalysisError, match="no ripple"):
        rejection(_fit(0.0, 1e-5), _fit(1e-4, 1e-6))
