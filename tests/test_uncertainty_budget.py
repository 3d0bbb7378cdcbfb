"""The uncertainty budget's parts: the channel-match Type B term, the value threshold, the
bound's use of the plan's time, and the bench-file keys that feed them.

External references:
- JCGM 100:2008 (GUM) §4.3.7: a quantity known only to lie within ±a, uniformly, has the
  standard uncertainty a/√3; §5.1.6: relative uncertainties of a quotient's independent
  factors add in quadrature. JCGM 101:2008 (propagation of distributions by a Monte Carlo
  method) is the reference the first test uses, independent of the formula.
- The F distribution (scipy.stats.f) for |fit|²/(2σ̂²) of a noise-only output when σ̂ is
  estimated from ν squared quadratures (a ratio of two independent χ²/dof variables).
- The Rice distribution of a sine amplitude in Gaussian noise (S. O. Rice, "Mathematical
  analysis of random noise", Bell System Technical Journal, 1944–45; from memory), drawn
  directly with numpy as |A + n|.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from benchseq import analysis, batches
from benchseq.analysis import (
    ChannelCalibration,
    ChannelTolerances,
    SineFit,
    db_uncertainty,
    measure_point,
    rejection,
    value_threshold,
)
from benchseq.bench import embedded_bench_text, parse_bench
from benchseq.errors import FileKeyError
from benchseq.tomlfile import parse_toml_text

DB = 20.0 / math.log(10.0)  # dB per neper


# -- the channel match without a calibration ----------------------------------------------
def test_tolerance_term_matches_a_monte_carlo_of_the_ratio() -> None:
    """Two channel gains ±1.5 % and a pin probe ±1 %, each uniform (GUM §4.3.7): the spread
    of ln(out-channel/pin-channel) drawn by Monte Carlo (JCGM 101) is the stated u_match,
    within the Monte Carlo's own relative standard error √(1/(2n)) times 4."""
    tol = ChannelTolerances(gain_pin=0.015, gain_output=0.015, probe_pin=0.01)
    rng = np.random.default_rng(5)
    n = 200_000
    gain_pin = 1 + rng.uniform(-0.015, 0.015, n)
    gain_out = 1 + rng.uniform(-0.015, 0.015, n)
    probe_pin = 1 + rng.uniform(-0.01, 0.01, n)
    spread = float(np.std(np.log(gain_out / (gain_pin * probe_pin))))
    assert tol.uncertainty == pytest.approx(spread, rel=4 * math.sqrt(1 / (2 * n)) + 1e-3)
    # 0.118 dB: the demo bench's default budget without a calibration
    assert DB * tol.uncertainty == pytest.approx(0.1176, abs=5e-4)
    with pytest.raises(analysis.AnalysisError, match="gain_pin"):
        ChannelTolerances(gain_pin=-0.01)


def _records(snr_out: float = 100.0):
    fs, n, f = 1e5, 20_000, 1230.0
    t = np.arange(n) / fs
    rng = np.random.default_rng(8)
    noise = 1e-5
    pin = 0.1 * np.cos(2 * np.pi * f * t) + rng.normal(0, noise, n)
    sigma_c = noise * math.sqrt(2 / n)
    out = snr_out * sigma_c * np.cos(2 * np.pi * f * t + 1.0) + rng.normal(0, noise, n)
    return pin, out, 1 / fs, f


def test_uncalibrated_points_carry_the_tolerance_term_and_say_so() -> None:
    """Without a calibration the budget holds u_match beside the noise terms (GUM §5.1.2)
    and the point is flagged; with a calibration covering f, its stored u replaces it and
    there is no flag; outside the calibration's span the tolerance term is back."""
    pin, out, dt, f = _records()
    got = measure_point(pin, out, dt, f, channel_match=0.01)
    rej = got.rejection
    u_pin = got.pin.amplitude_sigma / got.pin.amplitude
    a = math.sqrt(got.output.amplitude**2 - 2 * got.output_sigma**2)
    assert rej.uncertainty_db == pytest.approx(
        db_uncertainty(u_pin, got.output_sigma / a, 0.01), rel=1e-9
    )
    assert "uncalibrated" in got.flags and got.match_uncertainty == 0.01
    assert got.to_row()["output_sigma"] == got.output_floor
    cal = ChannelCalibration.from_sweep([100.0, 1e4], [1.0, 1.0], 0.002)
    calibrated = measure_point(pin, out, dt, f, calibration=cal, channel_match=0.01)
    assert "uncalibrated" not in calibrated.flags and calibrated.match_uncertainty == 0.002
    assert calibrated.rejection.uncertainty_db < rej.uncertainty_db
    outside = ChannelCalibration.from_sweep([1e4, 1e5], [1.0, 1.0], 0.002)
    beyond = measure_point(pin, out, dt, f, calibration=outside, channel_match=0.01)
    assert {"uncalibrated", "outside_calibration"} <= set(beyond.flags)
    assert beyond.match_uncertainty == 0.01


def test_bench_file_states_its_tolerances() -> None:
    """scope.gain_accuracy and each channel's probe_accuracy, as percentages; defaults
    ±1.5 % per channel and ±1 % for an attenuating probe, none for a 1:1 connection."""
    text = embedded_bench_text("demo")
    source = "bay2.toml"
    _, data = parse_toml_text(text, source)
    scope = parse_bench(data, source, text).scope
    assert scope.gain_accuracy == 0.015
    assert scope.pin.probe_accuracy == 0.01 and scope.output.probe_accuracy == 0.0
    edited = text.replace("\n[scope]\n", '\n[scope]\ngain_accuracy = "1 %"\n').replace(
        'pin = { channel = 1, probe = 10, coupling = "AC" }',
        'pin = { channel = 1, probe = 10, coupling = "AC", probe_accuracy = "2 %" }',
    )
    _, data = parse_toml_text(edited, source)
    tol = parse_bench(data, source, edited).scope.tolerances()
    assert (tol.gain_pin, tol.gain_output, tol.probe_pin, tol.probe_output) == (
        0.01,
        0.01,
        0.02,
        0.0,
    )
    from benchseq import bench as bench_module
    from benchseq.analysis import match

    assert bench_module.DEFAULT_GAIN_ACCURACY == match.DEFAULT_GAIN_ACCURACY
    assert bench_module.DEFAULT_PROBE_ACCURACY == match.DEFAULT_PROBE_ACCURACY
    bad = text.replace("\n[scope]\n", "\n[scope]\ngain_accuracy = 0.01\n")
    _, data = parse_toml_text(bad, source)
    with pytest.raises(FileKeyError, match=r"gain_accuracy.*percentage"):
        parse_bench(data, source, bad)


# -- value or bound -------------------------------------------------------------------------
@pytest.mark.parametrize("dof", [8, 16, 20, 36, 100])
def test_value_threshold_keeps_false_values_rare(dof: int) -> None:
    """A noise-only output passes as a value when |fit|/σ̂ ≥ K, i.e. F(2, ν) ≥ K²/2: its
    tail at the threshold is at most 1e-4, and equal to it where that condition binds."""
    k = value_threshold(dof)
    tail = float(stats.f.sf(k * k / 2, 2, dof))
    assert tail <= 1e-4 * (1 + 1e-9)
    if k > analysis.DEFAULT_DETECTION_K:
        assert tail == pytest.approx(1e-4, rel=1e-6)
    # known σ: the Rayleigh tail e^(−K²/2) (here the bias condition, K = 5, binds)
    assert value_threshold() == 5.0 and math.exp(-12.5) < 1e-4


def _sine_fit(amplitude: float, sigma: float) -> SineFit:
    return SineFit(
        amplitude=amplitude,
        phase=0.0,
        offset=0.0,
        residual_rms=sigma,
        amplitude_sigma=sigma,
        phase_sigma=sigma / amplitude,
        offset_sigma=sigma,
        quadrature_sigma=sigma,
        noise_sigma=sigma,
        n=10**6,
        frequency=1e3,
        sample_rate=1e7,
    )


@pytest.mark.parametrize(("snr", "under_quarter"), [(4.0, False), (5.0, True), (8.0, True)])
def test_bias_of_a_value_against_u_sets_the_threshold(snr: float, under_quarter: bool) -> None:
    """Rice amplitudes |A + n| (n complex Gaussian, σ per quadrature) at a true A/σ: the mean
    error of rejection()'s dB value is under u/4 from A/σ = 5 on, not at 4 — the bias
    condition behind the value threshold. 20,000 draws: the mean's standard error is
    under u/100."""
    rng = np.random.default_rng(int(snr))
    sigma, pin = 1.0, 1e3
    true_db = 20 * math.log10(pin / snr)
    amplitudes = np.abs(snr + rng.normal(0, sigma, 20_000) + 1j * rng.normal(0, sigma, 20_000))
    pin_fit = _sine_fit(pin, 1e-9)
    errors = [
        rejection(pin_fit, _sine_fit(float(a), sigma), detection_k=0.0).rejection_db - true_db
        for a in amplitudes
    ]
    u = DB * sigma / snr
    assert (abs(float(np.mean(errors))) < u / 4) is under_quarter


# -- a bound uses the plan's time -----------------------------------------------------------
def _bound_result(pin: float, floor: float):
    from types import SimpleNamespace

    return SimpleNamespace(
        pin=SimpleNamespace(amplitude=pin, amplitude_sigma=1e-6),
        output=SimpleNamespace(amplitude=floor),
        output_floor=floor,
        rejection=SimpleNamespace(is_bound=True),
        value_threshold=5.0,
    )


def test_the_last_look_for_an_output_takes_all_the_time_left() -> None:
    """Before a bound is settled for, the last detection top-up fills the plan's max_time
    (whole records of duration + re-arm); with no room left it is capped (the point is then
    flagged bound_time_limited by the sequencer)."""
    res = _bound_result(0.05, 1e-7)
    first = batches.top_up(res, 2, 0.2, 0.1, 0.002, 0.1, 5.0, expected_ratio=1e-2)
    assert first.detecting and first.records >= 1 and not first.capped
    last = batches.top_up(res, 2, 0.2, 0.1, 0.002, 0.1, 5.0, 1e-2, last_look=True)
    assert last.records == int((5.0 - 0.2) / 0.102) and not last.capped
    full = batches.top_up(res, 49, 4.998, 0.1, 0.002, 0.1, 5.0, 1e-2, last_look=True)
    assert full.records == 0 and full.capped


def test_noise_aims_at_half_the_target_when_the_match_uses_it_up() -> None:
    """A channel match larger than the target: more records cannot meet it, so the noise
    part is taken down to half the target, not without end (and not left where it is)."""
    from types import SimpleNamespace

    res = SimpleNamespace(
        pin=SimpleNamespace(amplitude=0.05, amplitude_sigma=5e-6),
        output=SimpleNamespace(amplitude=5e-6),
        output_floor=1e-7,
        rejection=SimpleNamespace(is_bound=False),
    )
    u_noise = db_uncertainty(1e-7 / 5e-6, 5e-6 / 0.05)
    got = batches.top_up(res, 4, 4.01, 1.0, 0.002, 0.1, 1e3, 1e-4, calibration_uncertainty=0.02)
    want = math.ceil(4 * (u_noise**2 / 0.05**2 * batches.TOP_UP_MARGIN - 1))
    assert got.records == want and not got.capped
