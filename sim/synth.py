"""Scope records from the physics: front-end response, seeded noise, 8-bit quantiser, averaging.

Per channel: node phasors / probe attenuation, times the channel response (AC-coupling
high-pass, analog bandwidth, optional bandwidth limit, gain/phase mismatch and skew), summed
on the sample times (phase zero at the external trigger), plus noise: the node's own noise
shaped in frequency (1/f and its bandwidth, aliased white above Nyquist) and the front end's
white noise, then quantised to codes −128..127. M averaged records are simulated as one
record: noise / √M and the quantiser's mean E[Q(x + n)] (its Gaussian-smoothed staircase,
Widrow & Kollár, Quantization Noise, 2008, ch. 5) plus quantisation noise / √M.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

CODE_MIN, CODE_MAX = -128, 127


@dataclass(frozen=True)
class ChannelSetup:
    """A scope channel's settings at acquisition time (V at the input, Hz, s)."""

    full_scale: float
    offset: float
    coupling: str  # "AC" | "DC"
    bandwidth_limit: float | None
    ac_corner: float
    analog_bandwidth: float
    gain_error: float
    phase_error_deg: float
    skew: float
    noise_rms: float  # front-end noise, V rms at the input

    def response(self, f: np.ndarray) -> np.ndarray:
        f = np.asarray(f, dtype=float)
        h = (1.0 + self.gain_error) / (1.0 + 1j * f / self.analog_bandwidth)
        if self.bandwidth_limit is not None:
            h = h / (1.0 + 1j * f / self.bandwidth_limit)
        if self.coupling == "AC":
            x = 1j * f / self.ac_corner
            h = h * x / (1.0 + x)
        phase = math.radians(self.phase_error_deg) - 2.0 * math.pi * f * self.skew
        return h * np.exp(1j * phase * (f > 0))

    def power_response(self, f: np.ndarray) -> np.ndarray:
        """|response(f)|², computed without complex arithmetic (for noise shaping)."""
        f2 = np.asarray(f, dtype=float) ** 2
        h2 = (1.0 + self.gain_error) ** 2 / (1.0 + f2 / self.analog_bandwidth**2)
        if self.bandwidth_limit is not None:
            h2 = h2 / (1.0 + f2 / self.bandwidth_limit**2)
        if self.coupling == "AC":
            x2 = f2 / self.ac_corner**2
            h2 = h2 * x2 / (1.0 + x2)
        return h2

    @property
    def dc_gain(self) -> float:
        return 0.0 if self.coupling == "AC" else 1.0 + self.gain_error


@dataclass(frozen=True)
class NodeSignal:
    """What a probe tip touches: DC, harmonic phasors (V peak) and a noise density."""

    dc: float
    frequencies: np.ndarray
    phasors: np.ndarray
    white_noise: float  # V/√Hz
    flicker_corner: float  # Hz (0 = none)
    noise_bandwidth: float  # Hz, single pole
    spur_frequency: float = 0.0  # a non-synchronous spur (mains pickup)
    spur_amplitude: float = 0.0
    # what is left of the injector's transient (sim/transient.py): Σ Re(a·e^{r·t}) with t
    # from the first sample, rates r (1/s) and amplitudes a (V at the node)
    mode_rates: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=complex))
    mode_amplitudes: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=complex))


@dataclass
class Record:
    """An acquired record as mean codes (float; whole numbers when not averaged)."""

    codes: np.ndarray
    full_scale: float
    offset: float
    sample_interval: float
    averages: int

    @property
    def points(self) -> int:
        return int(self.codes.size)


def _shaped_noise(
    rng: np.random.Generator,
    n: int,
    dt: float,
    node: NodeSignal,
    channel: ChannelSetup,
    probe: float,
) -> np.ndarray:
    """Node noise at the scope input, generated in the frequency domain (one-sided PSD)."""
    fs = 1.0 / dt
    f = np.fft.rfftfreq(n, dt)
    band = min(node.noise_bandwidth, channel.analog_bandwidth, channel.bandwidth_limit or math.inf)
    white = node.white_noise / probe
    psd = white**2 / (1.0 + (f / node.noise_bandwidth) ** 2)
    if node.flicker_corner > 0:
        psd = psd * (1.0 + node.flicker_corner / np.maximum(f, f[1] if n > 1 else 1.0))
    psd = psd * channel.power_response(f)
    alias = white**2 * max(0.0, 0.5 * math.pi * band - fs / 2.0) / (fs / 2.0)
    psd = psd + alias * (1.0 + channel.gain_error) ** 2
    psd[0] = 0.0
    scale = np.sqrt(psd * fs * n / 4.0)
    spectrum = (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size)) * scale
    return np.fft.irfft(spectrum, n)


def _quantiser_mean(x: np.ndarray, sigma: float) -> np.ndarray:
    """E[round(x + n)] for n ~ N(0, σ²) in codes: x plus the smoothed sawtooth's series."""
    out = x.copy()
    for k in range(1, 4):
        weight = math.exp(-2.0 * math.pi**2 * k * k * sigma * sigma)
        if weight < 1e-7:
            break
        out += ((-1) ** k / (math.pi * k)) * weight * np.sin(2.0 * math.pi * k * x)
    return out


def acquire_channel(
    rng: np.random.Generator,
    node: NodeSignal,
    channel: ChannelSetup,
    probe: float,
    points: int,
    sample_interval: float,
    averages: int,
    synchronous: bool,
    trigger_jitter: float,
) -> Record:
    """One (averaged) record of one channel."""
    n, dt, m = points, sample_interval, max(1, averages)
    volts_per_code = channel.full_scale / 256.0
    jitter = rng.normal(0.0, trigger_jitter / math.sqrt(m)) if trigger_jitter > 0 else 0.0
    t = np.arange(n) * dt + jitter
    y = np.full(n, (node.dc / probe) * channel.dc_gain - channel.offset)
    if node.phasors.size:
        x = node.phasors * channel.response(node.frequencies) / probe
        if trigger_jitter > 0 and m > 1:  # jitter spreads the records: the average shrinks
            x = x * np.exp(-0.5 * (2 * math.pi * node.frequencies * trigger_jitter) ** 2)
        if not synchronous:  # free-running: each record starts at a random phase
            turns = rng.random(m)
            order = np.arange(1, x.size + 1)
            x = x * np.mean(np.exp(2j * np.pi * np.outer(order, turns)), axis=1)
        if x.size == 1:
            y += np.abs(x[0]) * np.cos(2 * math.pi * node.frequencies[0] * t + np.angle(x[0]))
        else:
            table_n = 2048
            table = np.zeros(table_n + 1)
            spectrum = np.zeros(table_n // 2 + 1, dtype=complex)
            keep = min(x.size, table_n // 2 - 1)
            spectrum[1 : keep + 1] = x[:keep] * (table_n / 2.0)
            table[:table_n] = np.fft.irfft(spectrum, table_n)
            table[table_n] = table[0]
            cycles = (node.frequencies[0] * t) % 1.0
            y += np.interp(cycles * table_n, np.arange(table_n + 1), table)
    if node.mode_amplitudes.size:
        scale = channel.full_scale / 256.0 * 1e-3 * probe  # modes under 1e-3 code: left out
        for rate, amplitude in zip(node.mode_rates, node.mode_amplitudes, strict=True):
            if abs(amplitude) > scale:
                y += np.real(amplitude * np.exp(rate * t)) / probe
    if node.spur_amplitude > 0:
        amp = (
            node.spur_amplitude / probe * abs(channel.response(np.array([node.spur_frequency]))[0])
        )
        turns = rng.random(m)
        amp *= abs(np.mean(np.exp(2j * np.pi * turns)))
        y += amp * np.cos(2 * math.pi * node.spur_frequency * t + 2 * math.pi * rng.random())
    node_noise_rms = shaped_rms = 0.0
    white_rms = channel.noise_rms
    band = min(node.noise_bandwidth, channel.analog_bandwidth, channel.bandwidth_limit or math.inf)
    if node.white_noise > 0 and node.flicker_corner <= 0 and band >= 1.0 / (2.0 * dt):
        # white after aliasing: fold it into the front end's white noise
        node_noise_rms = node.white_noise / probe * math.sqrt(0.5 * math.pi * band)
        node_noise_rms *= 1.0 + channel.gain_error
        white_rms = math.hypot(white_rms, node_noise_rms)
    elif node.white_noise > 0:
        noise = _shaped_noise(rng, n, dt, node, channel, probe)
        shaped_rms = float(np.sqrt(np.mean(noise**2))) if n else 0.0
        y += noise / math.sqrt(m)
    y += rng.standard_normal(n) * (white_rms / math.sqrt(m))
    codes = y / volts_per_code
    if m == 1:
        codes = np.rint(codes)
    else:
        sigma = math.hypot(white_rms, shaped_rms) / volts_per_code
        if sigma < 0.2:
            codes = np.rint(codes)
        else:
            codes = _quantiser_mean(codes, sigma)
            quantisation = math.sqrt((1.0 - math.exp(-((sigma / 0.3) ** 2))) / 12.0 / m)
            codes += rng.standard_normal(n) * quantisation
    np.clip(codes, CODE_MIN, CODE_MAX, out=codes)
    return Record(codes.astype(np.float32), channel.full_scale, channel.offset, dt, m)


def format_codes(record: Record, sixteen_bit: bool, little_endian: bool) -> bytes:
    """The record's codes as TRAC:DATA? sends them: int8, or int16 = 256 × mean code."""
    if sixteen_bit:
        values = np.clip(np.rint(record.codes.astype(np.float64) * 256.0), -32768, 32512)
        dtype = "<i2" if little_endian else ">i2"
        return values.astype(dtype).tobytes()
    return np.clip(np.rint(record.codes), CODE_MIN, CODE_MAX).astype(np.int8).tobytes()
