"""A simulated device built from a stored measurement (``benchseq replay --device learned``).

The device's response is what a run measured: the stored ratio V_out/V_pin per operating
point, interpolated over frequency as log10|H| and unwrapped arg H against log10 f with a
shape-preserving piecewise-cubic Hermite interpolant (PCHIP, Fritsch & Carlson, SIAM J.
Numer. Anal. 17 (1980) 238; the derivative rule of scipy.interpolate.PchipInterpolator,
which the tests use as the reference). Outside the stored span the end values are held
(no extrapolation).

* Points that ended as lower bounds (``is_bound``) carry no measured response: the device
  attenuates at least ``bound_db``. Their magnitude knot is put at ``bound_db +
  BOUND_MARGIN_DB`` (10 dB: a replay on the same settings sees an output about a third of
  what the bound corresponds to, so it stays undetected; a replay that resolves it has a
  floor at least about twice lower). Their phase is not used (phase knots come from
  detected points only). Each knot remembers whether it came from a bound.
* Operating points are (DC level, load current) groups of the stored table; the device
  answers the nearest one to the operating point the simulator asks about (pin DC,
  output current) and ``match_setpoint`` says whether a plan's point was stored exactly.
* Noise: ``output_floor`` is the per-quadrature floor σ_c a fit at f saw. With T = record
  length × sample interval × averages (one read record assumed: rows do not store how
  many averaged waveforms were read), S = σ_c²·T is the one-sided density at f after
  aliasing (σ_c = √(S/T)). The simulated scope's own front-end and
  quantisation noise at the stored range is subtracted (never below 1 % of S), and the rest
  is taken as broadband device noise folded by the sampling as the simulator folds it
  (sim/synth.py: density e, bandwidth set by the scope, effective e²·max(1, π·B·Δt)).
  ``noise_at_test_frequency`` tells the simulator to use the density at the generator
  frequency as white noise (sim/world.py).
* Not learned (the stored table does not say): the device's own pin impedance, output DC
  level, DC input current and board load; they come from a stand-in device (the stored
  scenario's device, "demo" for a stored real bench).

The stored ratio carries every ratio error of the bench that measured it (channel gain and
phase mismatch, probe error) and the Rice bias of |V_out| (relative σ_c²/A² in power): a
replay on this device should therefore use a scope without channel mismatch.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from benchseq.sim.devices import Device, OperatingPoint, PinImpedance
from benchseq.sim.scenario import ScopeTruth

BOUND_MARGIN_DB = 10.0  # a bound's knot sits this far above the bound (more attenuation)
NOISE_SHARE_MIN = 0.01  # device noise power kept at least this share of the measured floor
EXACT_DC_V = 0.025  # operating points closer than this (V) ...
EXACT_CURRENT_A = 0.5e-3  # ... and this (A, or 2 % of the current) are the same point
CODES_PER_RANGE = 256  # the simulated 8-bit scope: codes over the full-scale range


class Pchip:
    """Piecewise-cubic Hermite interpolant with Fritsch-Carlson slopes; ends held outside.

    Interior slopes: 0 where the neighbouring secant slopes differ in sign or one is 0,
    else their weighted harmonic mean (w1 = 2h_k + h_(k-1), w2 = h_k + 2h_(k-1)); end
    slopes by the one-sided three-point formula kept shape-preserving (as in
    scipy.interpolate.PchipInterpolator). Two knots: a straight line; one: a constant.
    """

    def __init__(self, x: np.ndarray, y: np.ndarray) -> None:
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        if x.ndim != 1 or x.shape != y.shape or x.size == 0:
            raise ValueError("Pchip needs matching 1-D knots, at least one")
        if x.size > 1 and not np.all(np.diff(x) > 0):
            raise ValueError("Pchip knots must be strictly increasing")
        self.x, self.y = x, y
        self.d = self._slopes(x, y)

    @staticmethod
    def _edge(h0: float, h1: float, m0: float, m1: float) -> float:
        d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
        if np.sign(d) != np.sign(m0):
            return 0.0
        if np.sign(m0) != np.sign(m1) and abs(d) > 3.0 * abs(m0):
            return 3.0 * m0
        return float(d)

    @classmethod
    def _slopes(cls, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        n = x.size
        d = np.zeros(n)
        if n == 1:
            return d
        h = np.diff(x)
        m = np.diff(y) / h
        if n == 2:
            return np.array([m[0], m[0]])
        w1 = 2.0 * h[1:] + h[:-1]
        w2 = h[1:] + 2.0 * h[:-1]
        flat = (np.sign(m[1:]) != np.sign(m[:-1])) | (m[1:] == 0) | (m[:-1] == 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            whmean = (w1 / m[:-1] + w2 / m[1:]) / (w1 + w2)
            d[1:-1] = np.where(flat, 0.0, 1.0 / whmean)
        d[0] = cls._edge(h[0], h[1], m[0], m[1])
        d[-1] = cls._edge(h[-1], h[-2], m[-1], m[-2])
        return d

    def __call__(self, xq: np.ndarray | float) -> np.ndarray:
        xq = np.asarray(xq, dtype=float).clip(self.x[0], self.x[-1])
        if self.x.size == 1:
            return np.full(xq.shape, self.y[0])
        i = np.clip(np.searchsorted(self.x, xq, side="right") - 1, 0, self.x.size - 2)
        h = self.x[i + 1] - self.x[i]
        t = (xq - self.x[i]) / h
        h00 = (1.0 + 2.0 * t) * (1.0 - t) ** 2
        h10 = t * (1.0 - t) ** 2
        h01 = t * t * (3.0 - 2.0 * t)
        h11 = t * t * (t - 1.0)
        return (
            h00 * self.y[i]
            + h10 * h * self.d[i]
            + h01 * self.y[i + 1]
            + h11 * h * self.d[i + 1]
        )


def _log_f(f: Any) -> np.ndarray:
    return np.log10(np.maximum(np.asarray(f, dtype=float), 1e-12))


@dataclass(frozen=True)
class LearnedCurve:
    """The stored response at one operating point (knots sorted by frequency)."""

    dc_level: float  # V, the plan's DC set-point
    load_current: float  # A, the electronic load's current (nan: no load axis)
    pin_dc: float  # V, median measured pin DC
    output_current: float  # A, what the device output supplies (stand-in board load + load)
    frequencies: np.ndarray  # Hz, magnitude knots
    log_magnitude: np.ndarray  # log10|H| (bounds: at the bound plus the margin)
    from_bound: np.ndarray  # bool per magnitude knot
    uncertainty_db: np.ndarray  # stored standard uncertainty per knot (nan at bounds)
    bound_db: np.ndarray  # stored bound per knot (nan at values)
    phase_frequencies: np.ndarray  # Hz, detected knots only
    phase: np.ndarray  # rad, unwrapped
    noise_frequencies: np.ndarray  # Hz
    log_noise: np.ndarray  # log10 of the device noise density (V/√Hz)
    magnitude_interp: Pchip = field(init=False, repr=False, compare=False)
    phase_interp: Pchip | None = field(init=False, repr=False, compare=False)
    noise_interp: Pchip | None = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        build = object.__setattr__  # frozen: the interpolants are derived once here
        build(self, "magnitude_interp", Pchip(_log_f(self.frequencies), self.log_magnitude))
        phase = self.phase_frequencies
        build(self, "phase_interp", Pchip(_log_f(phase), self.phase) if phase.size else None)
        noise = self.noise_frequencies
        build(self, "noise_interp", Pchip(_log_f(noise), self.log_noise) if noise.size else None)

    def transfer(self, f: np.ndarray) -> np.ndarray:
        lf = _log_f(f)
        magnitude = 10.0 ** self.magnitude_interp(lf)
        phase = self.phase_interp(lf) if self.phase_interp is not None else np.zeros(lf.shape)
        return magnitude * np.exp(1j * phase)

    def rejection_db(self, f: np.ndarray) -> np.ndarray:
        return -20.0 * self.magnitude_interp(_log_f(f))

    def noise_density(self, f: np.ndarray) -> np.ndarray:
        lf = _log_f(f)
        if self.noise_interp is None:
            return np.zeros(lf.shape)
        return 10.0 ** self.noise_interp(lf)

    @property
    def span(self) -> tuple[float, float]:
        return float(self.frequencies[0]), float(self.frequencies[-1])

    def neighbours(self, f: float) -> tuple[int, int]:
        """Indices of the knots either side of ``f`` (equal when f is a knot or outside)."""
        x = self.frequencies
        if f <= x[0]:
            return 0, 0
        if f >= x[-1]:
            return x.size - 1, x.size - 1
        hit = np.flatnonzero(np.isclose(x, f, rtol=1e-9, atol=0.0))
        if hit.size:
            return int(hit[0]), int(hit[0])
        j = int(np.searchsorted(x, f))
        return j - 1, j


def front_end_noise(scope: ScopeTruth, full_scale: float, bandwidth_limit: float | None) -> float:
    """The simulated scope's white front-end noise, V rms at its input, on a range of
    ``full_scale`` V (pp at the input): the formula of sim/instruments.py Scope.channel_setup."""
    division = full_scale / scope.divisions
    noise = math.hypot(scope.noise_per_division * division, scope.noise_floor)
    if bandwidth_limit is not None:
        noise *= math.sqrt(min(1.0, bandwidth_limit / scope.analog_bandwidth))
    return noise


def scope_density(
    scope: ScopeTruth,
    range_at_tip: float,
    probe: float,
    bandwidth_limit: float | None,
    sample_interval: float,
) -> float:
    """One-sided density (V²/Hz at the probe tip) of the simulated scope's own noise:
    front end plus quantisation (q²/12, smoothed as in sim/synth.py), white per sample."""
    full_scale = range_at_tip / probe
    noise = front_end_noise(scope, full_scale, bandwidth_limit)
    q = full_scale / CODES_PER_RANGE
    quantisation = q * q / 12.0 * (1.0 - math.exp(-((noise / q / 0.3) ** 2)))
    return 2.0 * (noise * noise + quantisation) * probe * probe * sample_interval


def alias_factor(scope: ScopeTruth, bandwidth_limit: float | None, sample_interval: float) -> float:
    """How much broadband device noise (density e) the simulated scope folds into the band
    at f: the effective density is e²·max(1, π·B·Δt), B the scope's bandwidth (sim/synth.py)."""
    band = min(scope.analog_bandwidth, bandwidth_limit or math.inf)
    return max(1.0, math.pi * band * sample_interval)


def _high_pass_gain(f: float, corner: float) -> float:
    """|x/(1 + x)|, x = j·f/f_c: a first-order high-pass (1 without a corner)."""
    if not corner > 0:
        return 1.0
    x = f / corner
    return x / math.sqrt(1.0 + x * x)


def _column(table: Mapping[str, Any], name: str) -> np.ndarray:
    values = table[name]
    return np.asarray(getattr(values, "to_numpy", lambda: values)())


def _same(a: float, b: float) -> bool:
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) and math.isnan(b)
    return abs(a - b) <= 1e-9 * max(abs(a), abs(b), 1e-12)


@dataclass
class LearnedDevice:
    """A device whose response and output noise are a stored measurement (sim Device)."""

    curves: tuple[LearnedCurve, ...]
    standin: Device
    source: str = ""
    margin_db: float = BOUND_MARGIN_DB
    clamped_noise: int = 0  # points where the scope's own noise explained the floor
    kind: str = "learned"
    noise_at_test_frequency: bool = True  # sim/world.py: white at the density at f
    flicker_corner: float = 0.0
    noise_bandwidth: float = math.inf  # broadband: the scope's bandwidth limits it
    _nearest_cache: dict[tuple[float, float], int] = field(default_factory=dict, repr=False)

    @property
    def pin(self) -> PinImpedance:
        return self.standin.pin

    @property
    def board_load_current(self) -> float:
        return float(getattr(self.standin, "board_load_current", 0.0))

    # -- operating points -----------------------------------------------------------------
    def _nearest(self, pin_dc: float, output_current: float) -> int:
        key = (round(pin_dc, 9), round(output_current, 12))
        found = self._nearest_cache.get(key)
        if found is not None:
            return found
        v = np.array([c.pin_dc for c in self.curves])
        i = np.array([c.output_current for c in self.curves])
        span_v = max(float(np.ptp(v)), 1.0)
        span_i = max(float(np.ptp(i)), 0.1)
        distance = np.abs(v - pin_dc) / span_v + np.abs(i - output_current) / span_i
        best = int(np.argmin(distance))
        self._nearest_cache[key] = best
        return best

    def curve_for(self, op: OperatingPoint) -> tuple[LearnedCurve, bool]:
        """The stored curve for what the simulator asks about, and whether it is the same
        operating point (else the nearest stored one)."""
        curve = self.curves[self._nearest(op.pin_dc, op.output_current)]
        exact = abs(curve.pin_dc - op.pin_dc) <= EXACT_DC_V and abs(
            curve.output_current - op.output_current
        ) <= max(EXACT_CURRENT_A, 0.02 * abs(curve.output_current))
        return curve, exact

    def match_setpoint(self, dc_level: float, load_current: float) -> tuple[LearnedCurve, bool]:
        """The stored curve for a plan's (DC level, load current): exact, else the nearest."""
        for curve in self.curves:
            if _same(curve.dc_level, dc_level) and _same(curve.load_current, load_current):
                return curve, True
        load = 0.0 if math.isnan(load_current) else load_current
        dc = np.array([c.dc_level for c in self.curves])
        cur = np.array([0.0 if math.isnan(c.load_current) else c.load_current for c in self.curves])
        span_v = max(float(np.ptp(dc)), 1.0)
        span_i = max(float(np.ptp(cur)), 0.1)
        best = int(np.argmin(np.abs(dc - dc_level) / span_v + np.abs(cur - load) / span_i))
        return self.curves[best], False

    # -- the sim Device protocol ----------------------------------------------------------
    def transfer(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        return self.curve_for(op)[0].transfer(f)

    def output_dc(self, op: OperatingPoint) -> float:
        return self.standin.output_dc(op)

    def input_current(self, op: OperatingPoint) -> float:
        return self.standin.input_current(op)

    def noise_density(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        return self.curve_for(op)[0].noise_density(f)


def learn_device(
    table: Mapping[str, Any],
    *,
    standin: Device,
    scope: ScopeTruth,
    output_probe: float,
    bandwidth_limit: float | None,
    source: str = "",
    margin_db: float = BOUND_MARGIN_DB,
    output_ac_corner: float = 0.0,
) -> LearnedDevice:
    """Build a LearnedDevice from a run's table of points (benchseq.store.read_results, or
    any mapping of column name -> array with the same columns).

    ``scope``/``output_probe``/``bandwidth_limit``: the simulated scope the device will be
    measured with (its own noise is taken out of the stored floor). ``output_ac_corner``
    (Hz, 0 = none): a run that refers its output readings back to the node through the
    scope's AC coupling (meta ``scope_ac_corner_hz``) stores the floor divided by that
    high-pass; the floor the scope itself saw is taken back."""
    f = _column(table, "frequency").astype(float)
    dc = _column(table, "dc_level").astype(float)
    load = _column(table, "load_current").astype(float)
    ratio = _column(table, "ratio").astype(complex)
    bound = _column(table, "is_bound").astype(bool)
    bound_db = _column(table, "bound_db").astype(float)
    u_db = _column(table, "uncertainty_db").astype(float)
    pin_dc = _column(table, "pin_dc").astype(float)
    floor = _column(table, "output_floor").astype(float)
    length = _column(table, "record_length").astype(float)
    interval = _column(table, "sample_interval").astype(float)
    averages = _column(table, "averages").astype(float)
    out_range = _column(table, "output_range").astype(float)

    usable = np.isfinite(f) & (f > 0)
    usable &= np.where(bound, np.isfinite(bound_db), np.isfinite(ratio) & (np.abs(ratio) > 0))
    if not np.any(usable):
        raise ValueError("no stored point has a usable ratio or bound to learn from")

    board = float(getattr(standin, "board_load_current", 0.0))
    groups: list[tuple[float, float]] = []
    for d, c in zip(dc[usable], load[usable], strict=True):
        if not any(_same(d, g[0]) and _same(c, g[1]) for g in groups):
            groups.append((float(d), float(c)))

    clamped = 0
    curves = []
    for g_dc, g_load in groups:
        member = usable & np.array(
            [_same(d, g_dc) and _same(c, g_load) for d, c in zip(dc, load, strict=True)]
        )
        freqs = np.unique(f[member])
        log_mag, from_bound, knot_u, knot_bound = [], [], [], []
        phase_f, phase = [], []
        for fk in freqs:
            at = member & (f == fk)
            values = at & ~bound
            if np.any(values):  # a value wins over a bound at the same frequency
                log_mag.append(float(np.mean(np.log10(np.abs(ratio[values])))))
                from_bound.append(False)
                knot_u.append(float(np.nanmean(u_db[values])))
                knot_bound.append(math.nan)
                phase_f.append(float(fk))
                phase.append(complex(np.mean(ratio[values] / np.abs(ratio[values]))))
            else:
                b = float(np.max(bound_db[at]))
                log_mag.append(-(b + margin_db) / 20.0)
                from_bound.append(True)
                knot_u.append(math.nan)
                knot_bound.append(b)
        unwrapped = np.unwrap(np.angle(np.array(phase))) if phase else np.zeros(0)

        noise_f, log_noise = [], []
        for fk in freqs:
            at = member & (f == fk) & np.isfinite(floor) & (floor > 0)
            if not np.any(at):
                continue
            densities = []
            for j in np.flatnonzero(at):
                duration = length[j] * interval[j] * max(averages[j], 1.0)
                seen = floor[j] * _high_pass_gain(float(f[j]), output_ac_corner)
                measured = seen**2 * duration
                own = scope_density(scope, out_range[j], output_probe, bandwidth_limit, interval[j])
                device_part = measured - own
                if device_part < NOISE_SHARE_MIN * measured:
                    device_part = NOISE_SHARE_MIN * measured
                    clamped += 1
                densities.append(device_part / alias_factor(scope, bandwidth_limit, interval[j]))
            noise_f.append(float(fk))
            log_noise.append(0.5 * math.log10(float(np.mean(densities))))

        pins = pin_dc[member & np.isfinite(pin_dc)]
        curve = LearnedCurve(
            dc_level=g_dc,
            load_current=g_load,
            pin_dc=float(np.median(pins)) if pins.size else g_dc,
            output_current=board + (0.0 if math.isnan(g_load) else g_load),
            frequencies=freqs.astype(float),
            log_magnitude=np.array(log_mag),
            from_bound=np.array(from_bound, dtype=bool),
            uncertainty_db=np.array(knot_u),
            bound_db=np.array(knot_bound),
            phase_frequencies=np.array(phase_f),
            phase=unwrapped,
            noise_frequencies=np.array(noise_f),
            log_noise=np.array(log_noise),
        )
        curves.append(curve)
    return LearnedDevice(
        curves=tuple(curves),
        standin=standin,
        source=source,
        margin_db=margin_db,
        clamped_noise=clamped,
    )
