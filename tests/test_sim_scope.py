"""Scope physics of the simulated bench, checked with a plain least-squares sine fit (IEEE
Std 1057 three-parameter model, solved by numpy.linalg.lstsq here, not benchseq.analysis)."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from benchseq.bench import load_bench
from benchseq.drivers.blocks import decode_samples, parse_block
from benchseq.sim.scenario import load_scenario
from benchseq.sim.world import SimulatedBench


def fit(volts: np.ndarray, interval: float, frequency: float) -> tuple[complex, float]:
    """(peak phasor, residual rms) of A·cos(ωt+θ) + c by least squares (IEEE Std 1057)."""
    t = np.arange(volts.size) * interval
    design = np.column_stack(
        [np.cos(2 * np.pi * frequency * t), np.sin(2 * np.pi * frequency * t), np.ones_like(t)]
    )
    x, *_ = np.linalg.lstsq(design, volts, rcond=None)
    residual = volts - design @ x
    return complex(x[0], -x[1]), float(np.sqrt(np.mean(residual**2)))


def powered(sim: SimulatedBench, frequency: float, amplitude_pp: float, dc: float = 5.0) -> None:
    sim.handler("supply").handle(f"SOUR1:VOLT {dc};CURR 0.1;:OUTP1 ON")
    sim.handler("generator").handle(
        f"SOUR1:FUNC SIN;FREQ {frequency};VOLT {amplitude_pp};:OUTP1:LOAD 50;:OUTP1 ON"
    )
    sim.clock.sleep(1.5)  # 15 time constants of the bias filter: the pin DC has settled


def capture(
    sim: SimulatedBench,
    channel: int,
    full_scale: float,
    interval: float,
    points: int,
    coupling: str = "AC",
    offset: float = 0.0,
    averages: int = 1,
) -> tuple[np.ndarray, float, int]:
    """(volts at the scope input, sample interval, raw codes' extreme count) of one channel."""
    scope = sim.handler("scope")
    scope.handle(
        f'SENS:FUNC:ON "VOLT{channel}";:SENS:VOLT{channel}:RANG:PTP {full_scale};'
        f":SENS:VOLT{channel}:RANG:OFFS {offset};:INP{channel}:COUP {coupling};"
        f":SENS:SWE:OINT {interval};:SENS:SWE:POIN {points};:TRIG:SOUR EXT;"
        f":SENS:AVER:COUN {averages};:SENS:AVER:STAT {'ON' if averages > 1 else 'OFF'};"
        f":FORM:DATA INT,{16 if averages > 1 else 8};:FORM:BORD SWAP;:INIT:IMM"
    )
    raw = scope.handle(f"TRAC:DATA? CH{channel}")
    pre = scope.handle(f"TRAC:PRE? CH{channel}")
    assert raw is not None and pre is not None
    fields = pre.decode().strip().split(",")
    dtype = "int16" if fields[5] == "INT16" else "int8"
    codes = decode_samples(parse_block(raw), dtype)
    extreme = (-32768, 32512) if dtype == "int16" else (-128, 127)
    rails = int(np.count_nonzero((codes == extreme[0]) | (codes == extreme[1])))
    volts = (codes - float(fields[2])) * float(fields[0]) + float(fields[1])
    return volts, float(fields[3]), rails


def ideal_sim(**scenario_changes) -> SimulatedBench:
    """The demo bench with its true values equal to the nominal ones (the worked injector values of tests/test_injector_cases.py)."""
    scenario = replace(load_scenario("demo"), circuit_overrides={}, **scenario_changes)
    return SimulatedBench(load_bench("sim:demo"), scenario, seed=1)


def test_captured_amplitude_matches_truth_times_channel_response() -> None:
    """Pin channel: |truth| / probe × |single-pole AC coupling| × |analog bandwidth pole|,
    within 4 standard deviations of the fit's noise (σ_A ≈ √(2/N)·σ: Kay, Fundamentals of Statistical Signal Processing:
    Estimation Theory, 1993, ch. 3, sinusoid example; from memory)."""
    sim = SimulatedBench.from_scenario("demo", seed=2)
    f = 1e3
    powered(sim, f, 0.1)
    volts, interval, rails = capture(sim, 1, 0.04, 1e-6, 100000)
    truth = sim.truth()
    phasor, residual = fit(volts, interval, truth.frequency)
    corner, bandwidth = sim.scenario.scope.ac_corner, sim.scenario.scope.analog_bandwidth
    response = (1j * f / corner) / (1 + 1j * f / corner) / (1 + 1j * f / bandwidth)
    expected = truth.pin_ripple * response / sim.probe_attenuation(1)
    sigma = math.sqrt(2.0 / volts.size) * residual
    assert rails == 0
    assert abs(abs(phasor) - abs(expected)) < 4 * sigma + 1e-6 * abs(expected)
    assert abs(np.angle(phasor / expected)) < 1e-3
    # the output channel reads 0.3 % high and 0.5° early (the scenario's mismatch)
    out, interval, _ = capture(sim, 2, 0.008, 1e-6, 100000, averages=64)
    phasor, residual = fit(out, interval, truth.frequency)
    expected = truth.output_ripple * response * 1.003 * np.exp(1j * np.radians(0.5))
    assert abs(phasor / expected) == pytest.approx(1.0, abs=0.02)


def test_over_range_clips_at_the_extreme_codes() -> None:
    """A clipped sine's fundamental is below its peak (Fourier series of a clipped sine)."""
    sim = SimulatedBench.from_scenario("demo", seed=2)
    powered(sim, 1e3, 1.0)  # ~0.95 V peak at the pin: 0.19 Vpp at the input of a 10x probe
    volts, interval, rails = capture(sim, 1, 0.08, 1e-6, 10000)
    truth = sim.truth()
    phasor, _ = fit(volts, interval, truth.frequency)
    assert rails > 0.3 * volts.size
    assert volts.max() <= 0.04 + 1e-9 and volts.min() >= -0.04 - 1e-9
    assert abs(phasor) < 0.9 * abs(truth.pin_ripple) / 10.02


def test_ac_coupling_corner_is_minus_3_db() -> None:
    """A single-pole high-pass at its corner passes 1/√2 (−3.01 dB) with +45° (definition)."""
    sim = ideal_sim()
    corner = sim.scenario.scope.ac_corner
    powered(sim, corner, 0.1)
    sim.clock.sleep(1.0)
    ac, dt, _ = capture(sim, 1, 0.04, 1e-4, 100000)
    pin_dc_at_input = sim.truth().pin_dc / sim.probe_attenuation(1)
    dc, dt, _ = capture(sim, 1, 0.04, 1e-4, 100000, coupling="DC", offset=pin_dc_at_input)
    f = sim.truth().frequency
    ratio = fit(ac, dt, f)[0] / fit(dc, dt, f)[0]
    assert abs(ratio) == pytest.approx(1 / math.sqrt(2), rel=0.01)
    assert np.degrees(np.angle(ratio)) == pytest.approx(45.0, abs=1.0)


def test_fifty_ohm_mode_factor_of_field_example() -> None:
    """Common practice, computed here: in "50 Ω" mode the injector's output is 1.905x the displayed
    amplitude (EMF = 2x displayed, divided by Rs + Rin = 1050 Ω, times Rf = 1 kΩ); the pin
    gets that × Zpin/(Zpin + Zout), Zout = Ro/(1 + T) (closed-loop output resistance of a feedback amplifier, Horowitz & Hill, The Art
    of Electronics, 3rd ed., ch. 4; from memory)."""
    sim = ideal_sim(scope=replace(load_scenario("demo").scope, probe_attenuation={}))
    f, displayed_pp = 1e3, 0.1
    powered(sim, f, displayed_pp)
    s = 2j * math.pi * f
    zin = 50 + 1e3 + 1 / (s * 10e-6)
    beta = zin / (zin + 1e3)
    a = 1e5 / (1 + s * 1e5 / (2 * math.pi * 10e6))
    zout = 0.2 / (1 + a * beta)
    zpin_cap = 0.5 + 1 / (s * 1e-6)
    dev = sim.device.pin
    zdev = 1 / (1 / dev.resistance + 1 / (dev.esr + 1 / (s * dev.capacitance)))
    zpin = zpin_cap * zdev / (zpin_cap + zdev)
    divider = abs(zpin / (zpin + zout))
    truth = sim.truth()
    assert abs(truth.pin_ripple) / (displayed_pp / 2) == pytest.approx(1.905 * divider, rel=1e-3)
    volts, dt, _ = capture(sim, 1, 0.04, 1e-6, 200000)
    measured = abs(fit(volts, dt, truth.frequency)[0]) * 10.0
    assert measured / (displayed_pp / 2) == pytest.approx(1.905 * divider, rel=5e-3)
    sim.handler("generator").handle("OUTP1:LOAD INF")  # high-Z: 0.952x
    assert abs(sim.truth().pin_ripple) / (displayed_pp / 2) == pytest.approx(
        0.952 * divider, rel=1e-3
    )


def test_overdriven_injector_slews() -> None:
    """8 Vpp at 5 MHz asks ~120 V/µs of a 10 V/µs op-amp: the pin waveform is distorted
    (large residual after a sine fit) and smaller than the linear prediction
    (full-power bandwidth SR/(2π·Vpk), Horowitz & Hill, The Art of Electronics, 3rd ed.)."""
    sim = SimulatedBench.from_scenario("demo", seed=4)
    powered(sim, 5e6, 8.0)
    truth = sim.truth()
    assert truth.slew_limited
    volts, dt, _ = capture(sim, 1, 0.8, 1e-9, 10000)
    phasor, residual = fit(volts, dt, truth.frequency)
    linear_pin = 8.0 * 1000 / 1050  # EMF 8 V peak × Rf/(Rs+Rin), before any roll-off
    assert abs(phasor) * 10 < 0.5 * linear_pin
    assert residual > 0.1 * abs(phasor)  # far from a sine
    # the same drive at 1 kHz is clean
    sim.handler("generator").handle("SOUR1:FREQ 1000;VOLT 0.1")
    assert not sim.truth().slew_limited


def test_virtual_clock_advances_by_acquisition_time() -> None:
    sim = SimulatedBench.from_scenario("demo")
    start = sim.clock.now()
    capture(sim, 1, 0.8, 1e-6, 10000, averages=4)
    assert sim.clock.now() - start == pytest.approx(4 * (10000 * 1e-6 + 0.002))


def test_pin_dc_settles_through_the_bias_filter() -> None:
    """After a set-point step the pin follows 1 − e^(−t/τ), τ = Rb·Cb (first-order step response;
    e^−5 leaves 0.7 %, e^−7 0.09 %); a scenario switch, off on the demo bench."""
    sim = ideal_sim(bias_settling=True)
    tau = 10e3 * 10e-6
    sim.handler("supply").handle("SOUR1:VOLT 5;:OUTP1 ON")
    assert sim.truth().pin_dc < 0.31  # the op-amp's lowest output, not yet moved
    sim.clock.sleep(tau)
    assert sim.truth().pin_dc == pytest.approx(5.0 * (1 - math.exp(-1)), rel=2e-3)
    sim.clock.sleep(6 * tau)
    assert sim.truth().pin_dc == pytest.approx(5.0 * (1 - math.exp(-7)), rel=2e-4)
    assert ideal_sim().setpoint() == 0.0  # off: the set-point follows the supply at once
