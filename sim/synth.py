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
        """|response(f)|², computed without complex arithmetic (for noise shaping); float32
        in, float32 out."""
        f = np.asarray(f)
        f2 = (f if f.dtype == np.float32 else f.astype(float)) ** 2
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
    white_rms: float = 0.0,
) -> np.ndarray:
    """Node noise at the scope input (V, float32), generated in the frequency domain
    (one-sided PSD). The spectrum's shape needs no more than float32's 7 digits.

    ``white_rms`` (V per sample) adds the front end's white noise to the same spectrum, a
    flat one-sided density of white_rms²·2/fs, rather than drawing it sample by sample: one
    set of random numbers for both. Only the record's mean (the DC bin, 1/n of the white
    power) is left out with the node noise's."""
    fs = 1.0 / dt
    size = n // 2 + 1
    f = np.arange(size, dtype=np.float32) * np.float32(fs / n)  # np.fft.rfftfreq(n, dt)
    band = min(node.noise_bandwidth, channel.analog_bandwidth, channel.bandwidth_limit or math.inf)
    white = node.white_noise / probe
    psd = np.float32(white**2) / (np.float32(1.0) + np.square(f / np.float32(node.noise_bandwidth)))
    if node.flicker_corner > 0:
        psd *= np.float32(1.0) + np.float32(node.flicker_corner) / np.maximum(
            f, f[1] if n > 1 else np.float32(1.0)
        )
    psd *= channel.power_response(f)
    alias = white**2 * max(0.0, 0.5 * math.pi * band - fs / 2.0) / (fs / 2.0)
    psd += np.float32(alias * (1.0 + channel.gain_error) ** 2 + white_rms**2 * 2.0 / fs)
    psd[0] = 0.0
    scale = np.sqrt(psd * np.float32(fs * n / 4.0))
    spectrum = np.empty(size, dtype=np.complex64)
    spectrum.real = rng.standard_normal(size, dtype=np.float32) * scale
    spectrum.imag = rng.standard_normal(size, dtype=np.float32) * scale
    return np.fft.irfft(spectrum, n).astype(np.float32, copy=False)


def _quantiser_mean(x: np.ndarray, sigma: float) -> np.ndarray:
    """E[round(x + n)] for n ~ N(0, σ²) in codes: x plus the smoothed sawtooth's series.

    sin(2πk·x) = sin(2πk·r) with r = x − round(x) (exact in float32 for |x| < 2²³), and
    the harmonics k = 2, 3 follow from sin and cos of 2πr by the angle-sum identities."""
    weights = []
    for k in range(1, 4):
        weight = math.exp(-2.0 * math.pi**2 * k * k * sigma * sigma)
        if weight < 1e-7:
            break
        weights.append(((-1) ** k / (math.pi * k)) * weight)
    out = x.copy()
    if not weights:
        return out
    angle = (x - np.rint(x)) * np.float32(2.0 * math.pi)
    s1 = np.sin(angle)
    out += np.float32(weights[0]) * s1
    if len(weights) > 1:
        c1 = np.cos(angle)
        s2 = np.float32(2.0) * s1 * c1
        out += np.float32(weights[1]) * s2
        if len(weights) > 2:
            c2 = np.float32(1.0) - np.float32(2.0) * s1 * s1
            out += np.float32(weights[2]) * (s2 * c1 + c2 * s1)
    return out


# Above this many harmonic phasors the record is drawn from a one-period table instead.
_DIRECT_TONES = 16


def _tones(
    n: int, dt: float, start: float, frequencies: np.ndarray, phasors: np.ndarray
) -> np.ndarray:
    """Σ_h Re(X_h·e^{j2π f_h (start + i·dt)}), i = 0…n−1, as float32, without a cos per sample.

    With i = kB + b (B ≈ √n), e^{j2πf(start + kB·dt)} (block starts) and e^{j2πf·b·dt}
    (offsets) are evaluated in float64 with phases reduced to one turn, rounded to float32,
    and the record is one matrix product of the two: each sample is a sum of 2H products,
    good to about (2H + 1)·2⁻²⁴ of Σ|X_h|."""
    b = max(1, math.isqrt(n))
    k = -(-n // b)
    f = np.asarray(frequencies, dtype=float)
    starts = np.exp(
        2j * math.pi * np.mod(np.multiply.outer(np.arange(k) * (b * dt), f) + f * start, 1.0)
    )
    offsets = np.exp(2j * math.pi * np.mod(np.multiply.outer(np.arange(b) * dt, f), 1.0))
    u = starts * np.asarray(phasors)  # (K, H)
    left = np.concatenate([u.real, -u.imag], axis=1).astype(np.float32)  # (K, 2H)
    right = np.concatenate([offsets.real, offsets.imag], axis=1).T.astype(np.float32)  # (2H, B)
    return (left @ right).reshape(-1)[:n]


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
    """One (averaged) record of one channel.

    The record is built in codes and in float32 throughout: one code step (1/256 of the
    full scale) is over 10⁵ times float32's rounding at the largest code (2⁻²⁴ × 128), and
    the record leaves here as float32 codes anyway."""
    n, dt, m = points, sample_interval, max(1, averages)
    volts_per_code = channel.full_scale / 256.0
    per_volt = 1.0 / volts_per_code
    jitter = rng.normal(0.0, trigger_jitter / math.sqrt(m)) if trigger_jitter > 0 else 0.0
    dc = ((node.dc / probe) * channel.dc_gain - channel.offset) * per_volt
    if node.phasors.size:
        x = node.phasors * channel.response(node.frequencies) / probe * per_volt
        if trigger_jitter > 0 and m > 1:  # jitter spreads the records: the average shrinks
            x = x * np.exp(-0.5 * (2 * math.pi * node.frequencies * trigger_jitter) ** 2)
        if not synchronous:  # free-running: each record starts at a random phase
            turns = rng.random(m)
            order = np.arange(1, x.size + 1)
            x = x * np.mean(np.exp(2j * np.pi * np.outer(order, turns)), axis=1)
        if x.size <= _DIRECT_TONES:
            y = _tones(n, dt, jitter, node.frequencies, x)
        else:
            table_n = 2048
            table = np.zeros(table_n + 1)
            spectrum = np.zeros(table_n // 2 + 1, dtype=complex)
            keep = min(x.size, table_n // 2 - 1)
            spectrum[1 : keep + 1] = x[:keep] * (table_n / 2.0)
            table[:table_n] = np.fft.irfft(spectrum, table_n)
            table[table_n] = table[0]
            cycles = (node.frequencies[0] * (np.arange(n) * dt + jitter)) % 1.0
            y = np.interp(cycles * table_n, np.arange(table_n + 1), table).astype(np.float32)
        y += np.float32(dc)
    else:
        y = np.full(n, dc, dtype=np.float32)
    if node.mode_amplitudes.size:
        floor = 1e-3 * probe / per_volt  # modes under 1e-3 code: left out
        kept = np.abs(node.mode_amplitudes) > floor
        if np.any(kept):
            t = np.arange(n) * dt + jitter
            for rate, amplitude in zip(
                node.mode_rates[kept], node.mode_amplitudes[kept], strict=True
            ):
                y += (np.real(amplitude * np.exp(rate * t)) * (per_volt / probe)).astype(np.float32)
    if node.spur_amplitude > 0:
        amp = (
            node.spur_amplitude / probe * abs(channel.response(np.array([node.spur_frequency]))[0])
        )
        turns = rng.random(m)
        amp *= abs(np.mean(np.exp(2j * np.pi * turns)))
        phase = 2 * math.pi * rng.random()
        y += _tones(
            n,
            dt,
            jitter,
            np.array([node.spur_frequency]),
            np.array([amp * per_volt * np.exp(1j * phase)]),
        )
    node_noise_rms = shaped_rms = 0.0
    white_rms = channel.noise_rms
    band = min(node.noise_bandwidth, channel.analog_bandwidth, channel.bandwidth_limit or math.inf)
    if node.white_noise > 0 and node.flicker_corner <= 0 and band >= 1.0 / (2.0 * dt):
        # white after aliasing: fold it into the front end's white noise
        node_noise_rms = node.white_noise / probe * math.sqrt(0.5 * math.pi * band)
        node_noise_rms *= 1.0 + channel.gain_error
        white_rms = math.hypot(white_rms, node_noise_rms)
    elif node.white_noise > 0:
        noise = _shaped_noise(rng, n, dt, node, channel, probe, white_rms)
        # the front end's white noise is in it: σ below is the realised rms of both
        shaped_rms = math.sqrt(float(np.square(noise).mean(dtype=np.float64))) if n else 0.0
        white_rms = 0.0
        noise *= np.float32(per_volt / math.sqrt(m))
        y += noise
    if white_rms > 0:
        noise = rng.standard_normal(n, dtype=np.float32)
        noise *= np.float32(white_rms / math.sqrt(m) * per_volt)
        y += noise
    codes = y
    if m == 1:
        np.rint(codes, out=codes)
    else:
        sigma = math.hypot(white_rms, shaped_rms) * per_volt
        if sigma < 0.2:
            np.rint(codes, out=codes)
        else:
            codes = _quantiser_mean(codes, sigma)
            quantisation = math.sqrt((1.0 - math.exp(-((sigma / 0.3) ** 2))) / 12.0 / m)
            noise = rng.standard_normal(n, dtype=np.float32)
            noise *= np.float32(quantisation)
            codes += noise
    np.clip(codes, CODE_MIN, CODE_MAX, out=codes)
    return Record(codes, channel.full_scale, channel.offset, dt, m)


def format_codes(record: Record, sixteen_bit: bool, little_endian: bool) -> bytes:
    """The record's codes as TRAC:DATA? sends them: int8, or int16 = 256 × mean code."""
    if sixteen_bit:
        # × 256 is exact in float32, and rint of a float32 code is the same whole number
        values = np.clip(np.rint(record.codes * np.float32(256.0)), -32768, 32512)
        dtype = "<i2" if little_endian else ">i2"
        return values.astype(dtype).tobytes()
    return np.clip(np.rint(record.codes), CODE_MIN, CODE_MAX).astype(np.int8).tobytes()
