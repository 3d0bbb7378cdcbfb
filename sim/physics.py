"""The bench's physics at one instrument state: supply → injector → pin → device → output.

Small-signal phasors come from the nodal solution (benchseq.sim.circuit). When the op-amp
would exceed its slew rate, its output swing or its current limit, one period of its output
is built in the time domain, limited sample by sample (slew limiter, swing clip, current
clamp), and its harmonics carried to the pin through the passive path behind the op-amp:
overdriving distorts and shrinks the pin waveform as on a bench.

A device with ``large_signal(frequency, pin_harmonics, op)`` (a netlist with
``[device.large_signal]``) may answer a point with the output's harmonics and mean level
from a transient analysis driven by the pin ripple; the output then carries the device's own
dropout, clipping and slew, and the truth's transfer is the fundamental's ratio.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from benchseq.sim.circuit import DcSolution, InjectorCircuit, solve_ac, solve_dc
from benchseq.sim.devices import Device, OperatingPoint

PERIOD_SAMPLES = 512  # samples of one period for the limiters
HARMONICS = 31  # harmonics kept when a limiter acts


@dataclass(frozen=True)
class SupplyOutput:
    voltage: float  # V at the supply terminals (the injector's set-point)
    current: float  # A
    current_limited: bool


@dataclass(frozen=True)
class PointPhysics:
    """Everything the instruments and the truth need at one state (SI units, peak phasors)."""

    frequency: float  # Hz, the generator's true frequency
    emf: complex  # V peak, generator open-circuit EMF phasor (phase 0 at the sync output)
    supply: SupplyOutput
    dc: DcSolution
    op: OperatingPoint
    output_dc: float
    harmonic_frequencies: np.ndarray  # k·f, k = 1..K (K = 1 when nothing limits)
    opamp_harmonics: np.ndarray  # complex, V peak at the op-amp output
    pin_harmonics: np.ndarray  # complex, V peak at the pin
    output_harmonics: np.ndarray  # complex, V peak at the device output
    transfer: complex  # device V_out/V_pin at f (the truth of rejection)
    slew_limited: bool
    swing_limited: bool
    current_limited: bool
    peak_output_current: float  # A, op-amp output, DC + ripple
    large_signal: bool = False  # the output came from the device's transient analysis


def _slew_limit(wave: np.ndarray, max_step: float) -> np.ndarray:
    """Periodic steady state of a slew-rate limiter following ``wave`` (one period)."""
    n = wave.size
    out = np.empty(n)
    y = float(wave[0])
    for _ in range(3):  # settle into the periodic solution, keep the last pass
        for i in range(n):
            step = wave[i] - y
            if step > max_step:
                step = max_step
            elif step < -max_step:
                step = -max_step
            y += step
            out[i] = y
    return out


def _harmonics(wave: np.ndarray, count: int) -> np.ndarray:
    """Peak phasors of harmonics 1..count of one period (A·cos(kωt+θ) -> A·e^{jθ})."""
    spectrum = np.fft.rfft(wave) * (2.0 / wave.size)
    return spectrum[1 : count + 1]


def _synthesise(harmonics: np.ndarray, n: int) -> np.ndarray:
    spectrum = np.zeros(n // 2 + 1, dtype=complex)
    spectrum[1 : harmonics.size + 1] = harmonics * (n / 2.0)
    return np.fft.irfft(spectrum, n)


def pin_admittance(device: Device, op: OperatingPoint) -> Callable[[np.ndarray], np.ndarray]:
    """The device's pin admittance over frequency at ``op``: a device whose pin depends on
    its operating point (a netlist) has ``pin_admittance(f, op)``; others a fixed ``pin``."""
    at_point = getattr(device, "pin_admittance", None)
    if at_point is None:
        return device.pin.admittance
    return lambda f: at_point(f, op)


def solve_point(
    circuit: InjectorCircuit,
    device: Device,
    supply: SupplyOutput,
    frequency: float,
    emf_peak: float,
    output_current: float,
    setpoint: float | None = None,
) -> PointPhysics:
    """The physics at one state: DC operating point, fundamental and (if limited) harmonics.

    ``setpoint`` is the voltage on the op-amp's + input (V) when the bias filter is still
    settling after a supply change; by default the supply's terminal voltage."""

    def draw(v_pin: float) -> float:
        return device.input_current(OperatingPoint(v_pin, output_current))

    dc = solve_dc(circuit, supply.voltage if setpoint is None else setpoint, draw)
    op = OperatingPoint(dc.pin, output_current)
    admittance = pin_admittance(device, op)
    emf = complex(emf_peak)
    ac = solve_ac(circuit, np.array([frequency]), admittance)
    opamp1 = ac.opamp_per_emf[0] * emf
    current1 = ac.current_per_emf[0] * emf
    slew = 2 * math.pi * frequency * abs(opamp1) > circuit.slew_rate
    swing = (dc.opamp_output + abs(opamp1) > circuit.output_high) or (
        dc.opamp_output - abs(opamp1) < circuit.output_low
    )
    peak_current = abs(dc.current) + abs(current1)
    over_current = peak_current > circuit.current_limit
    if emf_peak > 0 and (slew or swing or over_current):
        freqs = frequency * np.arange(1, HARMONICS + 1)
        acs = solve_ac(circuit, freqs, admittance)
        phase = np.arange(PERIOD_SAMPLES) / PERIOD_SAMPLES
        wave = np.real(opamp1 * np.exp(2j * np.pi * phase))
        if slew:
            wave = _slew_limit(wave, circuit.slew_rate / (frequency * PERIOD_SAMPLES))
        if swing:
            wave = (
                np.clip(dc.opamp_output + wave, circuit.output_low, circuit.output_high)
                - dc.opamp_output
            )
        opamp_h = _harmonics(wave, HARMONICS)
        pin_h = opamp_h * acs.pin_per_opamp
        current_h = opamp_h * acs.current_per_opamp
        current_wave = dc.current + _synthesise(current_h, PERIOD_SAMPLES)
        peak_current = float(np.max(np.abs(current_wave)))
        if peak_current > circuit.current_limit:
            over_current = True
            clamped = np.clip(current_wave, -circuit.current_limit, circuit.current_limit)
            current_h = _harmonics(clamped, HARMONICS)
            pin_h = current_h * (acs.pin_per_emf / acs.current_per_emf)
            opamp_h = pin_h / acs.pin_per_opamp
        else:
            over_current = False
    else:
        freqs = np.array([frequency])
        opamp_h = np.array([opamp1])
        pin_h = ac.pin_per_emf * emf
    transient = getattr(device, "large_signal", None)
    answer = transient(frequency, pin_h, op) if transient is not None and emf_peak > 0 else None
    if answer is None:
        transfer = device.transfer(freqs, op)
        output_h = pin_h * transfer
        fundamental = complex(transfer[0])
        output_dc = device.output_dc(op)
    else:
        count = max(answer.harmonics.size, pin_h.size)
        freqs = frequency * np.arange(1, count + 1)
        pin_h = np.concatenate([pin_h, np.zeros(count - pin_h.size, dtype=complex)])
        opamp_h = np.concatenate([opamp_h, np.zeros(count - opamp_h.size, dtype=complex)])
        output_h = np.zeros(count, dtype=complex)
        output_h[: answer.harmonics.size] = answer.harmonics
        fundamental = complex(output_h[0] / pin_h[0])
        output_dc = answer.mean
    return PointPhysics(
        frequency=frequency,
        emf=emf,
        supply=supply,
        dc=dc,
        op=op,
        output_dc=output_dc,
        harmonic_frequencies=freqs,
        opamp_harmonics=opamp_h,
        pin_harmonics=pin_h,
        output_harmonics=output_h,
        transfer=fundamental,
        slew_limited=bool(slew and emf_peak > 0),
        swing_limited=bool(swing and emf_peak > 0),
        current_limited=bool(over_current or dc.current_limited),
        peak_output_current=peak_current,
        large_signal=answer is not None,
    )
