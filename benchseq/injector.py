"""The op-amp injector's transfer functions, corners and generator set-points (pure numpy).

The netlist modelled (node names as in the tests' ngspice reference):

    generator EMF --Rs--Cc--Rin-- n (− input) --Rf-- p (the device pin)
    DC supply --Rb-- q (+ input), Cb from q to ground
    op-amp: o = A(s)·(v_q − v_n), A(s) = A0/(1 + s·A0/(2π·GBW)); Ro from o to p
    pin load Zpin from p to ground: (1/(s·Cpin) + ESR) ∥ R_load

Rf is taken from the pin node p, after the op-amp's output resistance, as a real injector
board does: the loop then regulates the pin itself and includes the pin load (whose
capacitance adds a pole inside the loop). A DC current sink at the pin is an ideal current
source: it carries no ripple, so it is open for AC and appears only in DC currents.

Exact closed form (s = j·2π·f, Rg = Rs + Rin, Zin = Rg + 1/(s·Cc)):

    alpha = Rf/(Zin + Rf),  beta = Zin/(Zin + Rf),  y_fb = 1/(Zin + Rf),  Ypin = 1/Zpin
    D     = 1 + A·beta + Ro·(Ypin + y_fb)
    H_ac  = V_pin/V_emf = −alpha·(A − Ro/Rf) / D
    H_dc  = V_pin/V_dc  = A / D · 1/(1 + s·Rb·Cb)
    Zout  = Ro / (1 + A·beta + Ro·y_fb)            (the pin node looking back, load removed)
    loop gain L = A·beta / (1 + Ro·(Ypin + y_fb))

Writing D = (1 + A·beta + Ro·y_fb)·(1 + Zout·Ypin) shows V_pin = V_thevenin·Zpin/(Zpin + Zout);
dropping Ro·y_fb against 1 + A·beta and Ro/Rf against A gives DESIGN.md's approximation
(Zout = Ro/(1+T), H_ac = −(Rf/Zin)·T/(1+T) with T = A·beta, followed by the pin divider).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from numpy.polynomial import polynomial as P

from benchseq.bench import GeneratorSetup, InjectorValues, PinLoad

TWO_PI = 2.0 * math.pi

# Reason codes of the feasibility check, in report order.
REASONS: tuple[str, ...] = (
    "invalid-point",
    "generator-frequency",
    "generator-amplitude-high",
    "generator-amplitude-low",
    "slew-rate",
    "output-current",
    "output-swing",
    "device-absolute-max",
    "device-min-operating",
    "device-load-current",
    "supply-overvoltage",
    "outside-usable-band",
    "gbw-sensitive",
)
REASON_BIT: dict[str, int] = {code: 1 << k for k, code in enumerate(REASONS)}
REASON_TITLES: dict[str, str] = {
    "invalid-point": "frequency or ripple not positive",
    "generator-frequency": "above the generator's highest frequency",
    "generator-amplitude-high": "generator amplitude above its maximum",
    "generator-amplitude-low": "generator amplitude below its minimum",
    "slew-rate": "op-amp slew rate",
    "output-current": "op-amp output current limit",
    "output-swing": "op-amp output swing",
    "device-absolute-max": "DC + ripple above the device's absolute maximum",
    "device-min-operating": "DC − ripple below the device's minimum operating level",
    "device-load-current": "load current above the device's maximum",
    "supply-overvoltage": "DC set-point at the supply's over-voltage protection",
    "outside-usable-band": "outside the injector's usable band (gain off passband)",
    "gbw-sensitive": "gain sensitive to the op-amp's gain-bandwidth",
}


class DeviceLimitsLike(Protocol):
    """What feasibility needs of the device (benchseq.plan.DeviceLimits fits)."""

    @property
    def absolute_max_v(self) -> float: ...
    @property
    def min_operating_v(self) -> float: ...
    @property
    def max_load_current(self) -> float | None: ...


@dataclass(frozen=True)
class Margins:
    """Where a point turns from ok to marginal (our choices, common practice style)."""

    slew_fraction: float = 0.8  # of the slew rate
    current_fraction: float = 0.8  # of the output current limit
    swing_v: float = 0.2  # V of headroom to output_low / output_high
    generator_fraction: float = 0.9  # of the generator's largest amplitude
    device_v: float = 0.05  # V to the device's absolute maximum / minimum operating level
    band_db: float = 3.0  # |H_ac| within this of the passband gain
    gbw_tolerance: float = 0.3  # relative GBW error considered (±30 %)
    gbw_sensitivity_db: float = 0.5  # largest gain change allowed for that GBW error


@dataclass(frozen=True)
class Corners:
    """The injector's characteristic figures (Hz, s, V/V)."""

    passband_gain: float  # −Rf/(Rs+Rin), V_pin per V of EMF in mid-band (ideal)
    noise_gain: float  # 1 + Rf/(Rs+Rin)
    highpass_hz: float  # 1/(2π·(Rs+Rin)·Cc)
    bias_lowpass_hz: float  # 1/(2π·Rb·Cb)
    minus3db_estimate_hz: float  # GBW / noise gain (standard op-amp result)
    minus3db_hz: float  # model: where |H_ac| first falls 3 dB below passband above mid-band
    peaking_db: float  # largest |H_ac| above the passband gain, dB (0 when none)
    peak_hz: float  # where that largest gain is
    crossover_hz: float  # loop gain |L| = 1
    phase_margin_deg: float  # 180° + arg L at crossover
    usable_band: tuple[float, float]  # Hz: contiguous band around mid-band passing the checks
    coupling_time_constant_s: float  # (Rs+Rin)·Cc
    bias_time_constant_s: float  # Rb·Cb
    slowest_time_constant_s: float  # 1/min|Re(pole)| over the whole network (AC and DC paths)


def _as_freq(f: Any) -> np.ndarray:
    return np.asarray(f, dtype=float)


class InjectorModel:
    """Transfer functions of one injector board driving one pin, from a bench's values."""

    def __init__(self, values: InjectorValues, generator: GeneratorSetup, pin: PinLoad) -> None:
        self.values = values
        self.generator = generator
        self.pin = pin
        self.opamp = values.opamp

    # -- building blocks (all vectorised over f, Hz) -------------------------------------
    def open_loop_gain(self, f: Any) -> np.ndarray:
        """A(s) = A0/(1 + s·A0/(2π·GBW)), the op-amp's single-pole open-loop gain."""
        s = 1j * TWO_PI * _as_freq(f)
        a0 = self.opamp.open_loop_gain
        return a0 / (1.0 + s * a0 / (TWO_PI * self.opamp.gain_bandwidth))

    def pin_admittance(self, f: Any) -> np.ndarray:
        """1/Zpin: the capacitor (with ESR) in parallel with a resistive load, S."""
        s = 1j * TWO_PI * _as_freq(f)
        c = self.pin.capacitance
        y = s * c / (1.0 + s * c * self.pin.capacitor_esr)
        if self.pin.load_resistance is not None:
            y = y + 1.0 / self.pin.load_resistance
        return y

    def pin_impedance(self, f: Any) -> np.ndarray:
        """Zpin, Ω (infinite at DC for a current load)."""
        with np.errstate(divide="ignore"):
            return 1.0 / self.pin_admittance(f)

    def _network(self, f: Any, gain_bandwidth: float | None = None) -> dict[str, np.ndarray]:
        v = self.values
        s = 1j * TWO_PI * _as_freq(f)
        rg = self.generator.source_resistance + v.input_resistor
        rf = v.feedback_resistor
        cc = v.coupling_capacitor
        denominator = 1.0 + s * cc * (rg + rf)
        y_fb = s * cc / denominator  # 1/(Zin + Rf)
        alpha = rf * y_fb  # Rf/(Zin + Rf)
        beta = (1.0 + s * cc * rg) / denominator  # Zin/(Zin + Rf)
        a0 = self.opamp.open_loop_gain
        gbw = self.opamp.gain_bandwidth if gain_bandwidth is None else gain_bandwidth
        a = a0 / (1.0 + s * a0 / (TWO_PI * gbw))
        ro = self.opamp.output_resistance
        ypin = self.pin_admittance(f)
        d = 1.0 + a * beta + ro * (ypin + y_fb)
        return {"s": s, "alpha": alpha, "beta": beta, "y_fb": y_fb, "a": a, "ypin": ypin, "d": d}

    # -- transfer functions ---------------------------------------------------------------
    def ac_gain(self, f: Any) -> np.ndarray:
        """V_pin / V_emf (generator open-circuit EMF), exact for the netlist above."""
        n = self._network(f)
        ro_rf = self.opamp.output_resistance / self.values.feedback_resistor
        return -n["alpha"] * (n["a"] - ro_rf) / n["d"]

    def _ac_gain_with_gbw(self, f: Any, gbw: float) -> np.ndarray:
        n = self._network(f, gain_bandwidth=gbw)
        ro_rf = self.opamp.output_resistance / self.values.feedback_resistor
        return -n["alpha"] * (n["a"] - ro_rf) / n["d"]

    def dc_gain(self, f: Any) -> np.ndarray:
        """V_pin / V_dc (the set-point supply), through the bias filter and the follower."""
        n = self._network(f)
        bias = 1.0 / (1.0 + n["s"] * self.values.bias_resistor * self.values.bias_capacitor)
        return n["a"] * bias / n["d"]

    def output_impedance(self, f: Any) -> np.ndarray:
        """Closed-loop impedance at the pin node looking back into the injector, Ω."""
        n = self._network(f)
        ro = self.opamp.output_resistance
        return ro / (1.0 + n["a"] * n["beta"] + ro * n["y_fb"])

    def loop_gain(self, f: Any) -> np.ndarray:
        """L = A·beta/(1 + Ro·(Ypin + 1/(Zin+Rf))): the loop broken at the op-amp's output."""
        n = self._network(f)
        ro = self.opamp.output_resistance
        return n["a"] * n["beta"] / (1.0 + ro * (n["ypin"] + n["y_fb"]))

    def pin_per_displayed(self, f: Any) -> np.ndarray:
        """V_pin per volt of the generator's displayed amplitude (load mode applied)."""
        return self.ac_gain(f) * self.generator.emf_per_displayed

    def generator_setting_pp(self, f: Any, ripple_peak: Any) -> np.ndarray:
        """Displayed generator Vpp that puts ``ripple_peak`` (V peak) on the pin at ``f``."""
        with np.errstate(divide="ignore"):
            return 2.0 * np.asarray(ripple_peak, dtype=float) / np.abs(self.pin_per_displayed(f))

    def opamp_output_per_pin(self, f: Any) -> np.ndarray:
        """Ripple at the op-amp's output (before Ro) per volt of pin ripple (AC path)."""
        return 1.0 + self.opamp.output_resistance * self.output_current_per_pin(f)

    def output_current_per_pin(self, f: Any) -> np.ndarray:
        """Op-amp output ripple current (into the pin load and Rf) per volt of pin ripple, A/V."""
        n = self._network(f)
        with np.errstate(divide="ignore", invalid="ignore"):
            h = -n["alpha"] * (
                n["a"] - self.opamp.output_resistance / self.values.feedback_resistor
            )
            h = h / n["d"]
            v_minus = n["alpha"] / h + n["beta"]  # − input per volt at the pin
        return n["ypin"] + (1.0 - v_minus) / self.values.feedback_resistor

    def supply_setting(self, dc_level: Any, load_current: Any = 0.0) -> np.ndarray:
        """DC supply voltage that puts ``dc_level`` on the pin with a ``load_current`` sink."""
        a0 = self.opamp.open_loop_gain
        ro = self.opamp.output_resistance
        y_load = 0.0 if self.pin.load_resistance is None else 1.0 / self.pin.load_resistance
        dc = np.asarray(dc_level, dtype=float)
        return (dc * (1.0 + a0 + ro * y_load) + ro * np.asarray(load_current, dtype=float)) / a0

    def full_power_bandwidth(self, peak: float) -> float:
        """SR/(2π·Vpk), Hz [Horowitz & Hill, The Art of Electronics, 3rd ed.]."""
        return self.opamp.slew_rate / (TWO_PI * peak)

    def transfer_polynomials(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """{"ac": (num, den), "dc": (num, den)}: rational forms in s, highest power first.

        The same network multiplied out (for scipy.signal.freqs, pole/zero analysis)."""
        v, amp = self.values, self.opamp
        rg = self.generator.source_resistance + v.input_resistor
        rf, cc, ro = v.feedback_resistor, v.coupling_capacitor, amp.output_resistance
        a0 = amp.open_loop_gain
        dz = np.array([1.0, cc * (rg + rf)])  # ascending powers of s
        beta_num = np.array([1.0, cc * rg])
        da = np.array([1.0, a0 / (TWO_PI * amp.gain_bandwidth)])
        na = np.array([a0])
        c, esr = self.pin.capacitance, self.pin.capacitor_esr
        if self.pin.load_resistance is None:
            ny, dy = np.array([0.0, c]), np.array([1.0, c * esr])
        else:
            rl = self.pin.load_resistance
            ny, dy = np.array([1.0, c * (rl + esr)]), np.array([rl, rl * c * esr])
        den = P.polyadd(P.polymul(P.polymul(da, dz), dy), P.polymul(P.polymul(na, beta_num), dy))
        den = P.polyadd(den, ro * P.polymul(P.polymul(ny, da), dz))
        den = P.polyadd(den, ro * cc * P.polymul(np.array([0.0, 1.0]), P.polymul(da, dy)))
        open_minus_feedthrough = P.polysub(na, (ro / rf) * da)
        num_ac = -rf * cc * P.polymul(np.array([0.0, 1.0]), P.polymul(open_minus_feedthrough, dy))
        num_dc = P.polymul(P.polymul(na, dz), dy)
        den_dc = P.polymul(den, np.array([1.0, v.bias_resistor * v.bias_capacitor]))

        def high_first(c_: np.ndarray) -> np.ndarray:
            return np.trim_zeros(c_[::-1], "f")

        return {
            "ac": (high_first(num_ac), high_first(den)),
            "dc": (high_first(num_dc), high_first(den_dc)),
        }

    # -- figures ----------------------------------------------------------------------------
    def corners(self, margins: Margins | None = None) -> Corners:
        """Passband gain, corners, −3 dB point, peaking, loop margin, usable band, settling."""
        m = margins or Margins()
        v, amp = self.values, self.opamp
        rg = self.generator.source_resistance + v.input_resistor
        passband = -v.feedback_resistor / rg
        noise_gain = 1.0 + v.feedback_resistor / rg
        highpass = 1.0 / (TWO_PI * rg * v.coupling_capacitor)
        bias_lp = 1.0 / (TWO_PI * v.bias_resistor * v.bias_capacitor)
        estimate = amp.gain_bandwidth / noise_gain

        grid = np.logspace(
            math.log10(highpass) - 3, math.log10(max(estimate, highpass) * 100.0), 2400
        )
        gain_db = 20 * np.log10(np.abs(self.ac_gain(grid)) / abs(passband))
        top = int(np.argmax(gain_db))
        peaking = max(0.0, float(gain_db[top]))
        peak_hz = float(grid[top]) if peaking > 0 else float("nan")
        mid = math.sqrt(highpass * estimate)
        above = (grid > mid) & (gain_db < -3.0)
        minus3 = (
            self._refine(grid, gain_db + 3.0, int(np.argmax(above))) if above.any() else math.inf
        )

        loop = self.loop_gain(grid)
        crossing = np.nonzero((np.abs(loop[:-1]) >= 1.0) & (np.abs(loop[1:]) < 1.0))[0]
        if crossing.size:
            k = int(crossing[-1])
            crossover = self._refine(grid, 20 * np.log10(np.abs(loop)), k + 1)
            margin = 180.0 + float(np.degrees(np.angle(self.loop_gain(crossover))))
        else:
            crossover, margin = math.nan, math.nan

        usable = self.usable_mask(grid, m)
        usable_band = self._band_around(grid, usable, mid)

        polys = self.transfer_polynomials()
        poles = np.concatenate([np.roots(polys["ac"][1]), np.roots(polys["dc"][1])])
        slowest = 1.0 / float(np.min(np.abs(poles.real)))
        return Corners(
            passband_gain=passband,
            noise_gain=noise_gain,
            highpass_hz=highpass,
            bias_lowpass_hz=bias_lp,
            minus3db_estimate_hz=estimate,
            minus3db_hz=minus3,
            peaking_db=peaking,
            peak_hz=peak_hz,
            crossover_hz=crossover,
            phase_margin_deg=margin,
            usable_band=usable_band,
            coupling_time_constant_s=rg * v.coupling_capacitor,
            bias_time_constant_s=v.bias_resistor * v.bias_capacitor,
            slowest_time_constant_s=slowest,
        )

    @staticmethod
    def _refine(grid: np.ndarray, level_db: np.ndarray, k: int) -> float:
        """Log-frequency interpolation of the zero of ``level_db`` between grid[k-1], grid[k]."""
        if k <= 0:
            return float(grid[0])
        x0, x1 = math.log10(grid[k - 1]), math.log10(grid[k])
        y0, y1 = float(level_db[k - 1]), float(level_db[k])
        if y1 == y0:
            return float(grid[k])
        return 10 ** (x0 + (x1 - x0) * (-y0) / (y1 - y0))

    @staticmethod
    def _band_around(grid: np.ndarray, mask: np.ndarray, centre: float) -> tuple[float, float]:
        k = int(np.argmin(np.abs(np.log(grid / centre))))
        if not mask[k]:
            return (math.nan, math.nan)
        lo = k
        while lo > 0 and mask[lo - 1]:
            lo -= 1
        hi = k
        while hi < grid.size - 1 and mask[hi + 1]:
            hi += 1
        return (float(grid[lo]), float(grid[hi]))

    def gain_error_db(self, f: Any) -> np.ndarray:
        """20·log10(|H_ac|/|passband gain|), dB."""
        rg = self.generator.source_resistance + self.values.input_resistor
        with np.errstate(divide="ignore"):
            return 20 * np.log10(np.abs(self.ac_gain(f)) * rg / self.values.feedback_resistor)

    def gbw_sensitivity_db(self, f: Any, tolerance: float = 0.3) -> np.ndarray:
        """Largest |gain change| in dB for a GBW off by ±tolerance (relative)."""
        h = np.abs(self.ac_gain(f))
        gbw = self.opamp.gain_bandwidth
        with np.errstate(divide="ignore", invalid="ignore"):
            low = np.abs(
                20 * np.log10(np.abs(self._ac_gain_with_gbw(f, gbw * (1 - tolerance))) / h)
            )
            high = np.abs(
                20 * np.log10(np.abs(self._ac_gain_with_gbw(f, gbw * (1 + tolerance))) / h)
            )
        return np.maximum(low, high)

    def usable_mask(self, f: Any, margins: Margins | None = None) -> np.ndarray:
        """True where the correction is trustworthy: gain near passband, GBW-insensitive."""
        m = margins or Margins()
        near = np.abs(self.gain_error_db(f)) <= m.band_db
        steady = self.gbw_sensitivity_db(f, m.gbw_tolerance) <= m.gbw_sensitivity_db
        return near & steady

    # -- feasibility ------------------------------------------------------------------------
    def feasibility(
        self,
        frequency: Any,
        ripple_peak: Any,
        dc_level: Any,
        load_current: Any = None,
        *,
        device: DeviceLimitsLike | None = None,
        margins: Margins | None = None,
        supply_protection_v: float | None = None,
    ) -> Feasibility:
        """Per planned point: ok / marginal / refused with reason codes (vectorised).

        ``frequency`` Hz, ``ripple_peak`` V peak at the pin, ``dc_level`` V at the pin,
        ``load_current`` A (nan or None: the bench's pin load sets the DC current);
        ``device`` limits (None: not checked); ``supply_protection_v`` the set-point supply's
        over-voltage protection (None: not checked)."""
        return _evaluate(
            self,
            frequency,
            ripple_peak,
            dc_level,
            load_current,
            device,
            margins,
            supply_protection_v,
        )

    def sweep_feasibility(
        self, sweep: Any, device: DeviceLimitsLike | None = None, margins: Margins | None = None
    ) -> Feasibility:
        """feasibility() of a benchseq.plan.Sweep (or anything with its four arrays)."""
        return self.feasibility(
            sweep.frequency,
            sweep.ripple_peak,
            sweep.dc_level,
            sweep.load_current,
            device=device,
            margins=margins,
        )


@dataclass(frozen=True)
class Feasibility:
    """Verdicts of a set of planned points, with the figures behind them (arrays of length n)."""

    frequency: np.ndarray  # Hz
    ripple_peak: np.ndarray  # V peak at the pin
    dc_level: np.ndarray  # V at the pin
    dc_current: np.ndarray  # A, DC load current used
    generator_pp: np.ndarray  # V, displayed amplitude needed
    opamp_output_peak: np.ndarray  # V peak at the op-amp's output (before Ro)
    output_current_peak: np.ndarray  # A, DC + ripple current peak out of the op-amp
    slew_needed: np.ndarray  # V/s, 2π·f·(op-amp output peak)
    gain_error_db: np.ndarray  # dB, |H_ac| against the passband gain
    gbw_sensitivity_db: np.ndarray  # dB, for the margin's GBW tolerance
    refused_bits: np.ndarray  # int, OR of REASON_BIT
    marginal_bits: np.ndarray  # int, OR of REASON_BIT
    severity: dict[str, np.ndarray]  # per reason: how far the point is into it (>1 = over)
    limits: dict[str, float]  # the limits the check used (names as in the messages)
    margins: Margins = field(default_factory=Margins)

    def __len__(self) -> int:
        return int(self.frequency.size)

    @property
    def refused(self) -> np.ndarray:
        return self.refused_bits != 0

    @property
    def marginal(self) -> np.ndarray:
        return (self.refused_bits == 0) & (self.marginal_bits != 0)

    @property
    def ok(self) -> np.ndarray:
        return (self.refused_bits == 0) & (self.marginal_bits == 0)

    @property
    def verdict(self) -> np.ndarray:
        """'ok' / 'marginal' / 'refused' per point."""
        out = np.full(len(self), "ok", dtype=object)
        out[self.marginal] = "marginal"
        out[self.refused] = "refused"
        return out

    def count(self, code: str, severity: str = "refused") -> int:
        bits = self.refused_bits if severity == "refused" else self.marginal_bits
        return int(np.count_nonzero(bits & REASON_BIT[code]))

    def indices(self, code: str, severity: str = "refused") -> np.ndarray:
        bits = self.refused_bits if severity == "refused" else self.marginal_bits
        return np.nonzero(bits & REASON_BIT[code])[0]

    def reasons(self, i: int) -> list[tuple[str, str]]:
        """[(code, "refused"|"marginal"), ...] of point ``i``."""
        out = []
        for code in REASONS:
            if int(self.refused_bits[i]) & REASON_BIT[code]:
                out.append((code, "refused"))
            elif int(self.marginal_bits[i]) & REASON_BIT[code]:
                out.append((code, "marginal"))
        return out

    def messages(self, i: int) -> list[str]:
        """Human sentences for point ``i``'s reasons, with the numbers."""
        return [_describe(self, i, code, severity) for code, severity in self.reasons(i)]


def _evaluate(
    model: InjectorModel,
    frequency: Any,
    ripple_peak: Any,
    dc_level: Any,
    load_current: Any,
    device: DeviceLimitsLike | None,
    margins: Margins | None,
    supply_protection_v: float | None = None,
) -> Feasibility:
    """The vectorised feasibility check behind InjectorModel.feasibility."""
    m = margins or Margins()
    amp, gen, pin = model.opamp, model.generator, model.pin
    lc_in = math.nan if load_current is None else load_current
    f, vpk, vdc, lc = (
        np.atleast_1d(np.asarray(x, dtype=float)).ravel()
        for x in np.broadcast_arrays(
            np.asarray(frequency, dtype=float),
            np.asarray(ripple_peak, dtype=float),
            np.asarray(dc_level, dtype=float),
            np.asarray(lc_in, dtype=float),
        )
    )
    valid = np.isfinite(f) & np.isfinite(vpk) & np.isfinite(vdc) & (f > 0) & (vpk > 0)
    f_eval = np.where(valid, f, 1.0)

    if pin.load_current is not None:
        bench_current = np.full(f.shape, pin.load_current)
    elif pin.load_resistance is not None:
        bench_current = vdc / pin.load_resistance
    else:
        bench_current = np.zeros(f.shape)
    dc_current = np.where(np.isfinite(lc), lc, bench_current)

    net = model._network(f_eval)
    ro, rf = amp.output_resistance, model.values.feedback_resistor
    h = -net["alpha"] * (net["a"] - ro / rf) / net["d"]
    current_per_pin = net["ypin"] + (1.0 - (net["alpha"] / h + net["beta"])) / rf
    opamp_out_peak = np.abs(1.0 + ro * current_per_pin) * vpk
    ripple_current = np.abs(current_per_pin) * vpk
    output_current = np.abs(dc_current) + ripple_current
    slew_needed = TWO_PI * f_eval * opamp_out_peak
    generator_pp = 2.0 * vpk / (np.abs(h) * gen.emf_per_displayed)
    rg = gen.source_resistance + model.values.input_resistor
    gain_error = 20 * np.log10(np.abs(h) * rg / rf)
    sensitivity = model.gbw_sensitivity_db(f_eval, m.gbw_tolerance)
    opamp_dc = vdc + ro * dc_current
    swing_excess = np.maximum(
        opamp_dc + opamp_out_peak - amp.output_high, amp.output_low - (opamp_dc - opamp_out_peak)
    )

    nan = math.nan
    absolute_max = device.absolute_max_v if device is not None else nan
    min_operating = device.min_operating_v if device is not None else nan
    max_load = device.max_load_current if device is not None else None
    with np.errstate(invalid="ignore", divide="ignore"):
        severity: dict[str, np.ndarray] = {
            "invalid-point": (~valid).astype(float),
            "generator-frequency": f / gen.max_frequency,
            "generator-amplitude-high": generator_pp / gen.max_amplitude_pp,
            "generator-amplitude-low": gen.min_amplitude_pp / generator_pp,
            "slew-rate": slew_needed / amp.slew_rate,
            "output-current": output_current / amp.current_limit,
            "output-swing": swing_excess,
            "device-absolute-max": vdc + vpk - absolute_max,
            "device-min-operating": min_operating - (vdc - vpk),
            "device-load-current": (
                np.abs(dc_current) / max_load if max_load else np.zeros(f.shape)
            ),
            "supply-overvoltage": (
                model.supply_setting(vdc, np.where(pin.load_resistance is None, dc_current, 0.0))
                / supply_protection_v
                if supply_protection_v
                else np.zeros(f.shape)
            ),
            "outside-usable-band": np.abs(gain_error),
            "gbw-sensitive": sensitivity,
        }
    refuse_at = {
        "invalid-point": 0.5,
        "generator-frequency": 1.0,
        "generator-amplitude-high": 1.0,
        "generator-amplitude-low": 1.0,
        "slew-rate": 1.0,
        "output-current": 1.0,
        "output-swing": 0.0,
        "device-absolute-max": 0.0,
        "device-min-operating": 0.0,
        "device-load-current": 1.0,
        "supply-overvoltage": 0.999,
    }
    flag_at = {
        "generator-amplitude-high": m.generator_fraction,
        "slew-rate": m.slew_fraction,
        "output-current": m.current_fraction,
        "output-swing": -m.swing_v,
        "device-absolute-max": -m.device_v,
        "device-min-operating": -m.device_v,
        "outside-usable-band": m.band_db,
        "gbw-sensitive": m.gbw_sensitivity_db,
    }
    refused_bits = np.zeros(f.shape, dtype=np.int64)
    marginal_bits = np.zeros(f.shape, dtype=np.int64)
    for code, level in refuse_at.items():
        over = severity[code] > level
        if code != "invalid-point":
            over &= valid
        refused_bits |= np.where(over, REASON_BIT[code], 0)
    for code, level in flag_at.items():
        near = valid & (severity[code] > level)
        marginal_bits |= np.where(near, REASON_BIT[code], 0)
    marginal_bits &= ~refused_bits

    limits = {
        "slew_rate": amp.slew_rate,
        "current_limit": amp.current_limit,
        "output_low": amp.output_low,
        "output_high": amp.output_high,
        "generator_max_pp": gen.max_amplitude_pp,
        "generator_min_pp": gen.min_amplitude_pp,
        "generator_max_frequency": gen.max_frequency,
        "absolute_max_v": absolute_max,
        "min_operating_v": min_operating,
        "max_load_current": math.nan if max_load is None else max_load,
        "supply_protection_v": math.nan if supply_protection_v is None else supply_protection_v,
    }
    return Feasibility(
        frequency=f,
        ripple_peak=vpk,
        dc_level=vdc,
        dc_current=dc_current,
        generator_pp=generator_pp,
        opamp_output_peak=opamp_out_peak,
        output_current_peak=output_current,
        slew_needed=slew_needed,
        gain_error_db=gain_error,
        gbw_sensitivity_db=sensitivity,
        refused_bits=refused_bits,
        marginal_bits=marginal_bits,
        severity=severity,
        limits=limits,
        margins=m,
    )


def _describe(feas: Feasibility, i: int, code: str, severity: str) -> str:
    """One sentence for one reason at one point, numbers included."""
    from benchseq.units import format_si

    lim = feas.limits
    f = format_si(float(feas.frequency[i]), "Hz", 3)
    vpk = float(feas.ripple_peak[i])
    vdc = float(feas.dc_level[i])
    word = "over" if severity == "refused" else "close to"
    if code == "invalid-point":
        return "frequency and ripple must be positive numbers"
    if code == "generator-frequency":
        return f"{f} is above the generator's {format_si(lim['generator_max_frequency'], 'Hz', 3)}"
    if code == "generator-amplitude-high":
        need = format_si(float(feas.generator_pp[i]), "Vpp", 3)
        return (
            f"needs {need} on the generator at {f}, {word} its "
            f"{format_si(lim['generator_max_pp'], 'Vpp', 3)} maximum"
        )
    if code == "generator-amplitude-low":
        need = format_si(float(feas.generator_pp[i]), "Vpp", 3)
        return (
            f"needs {need} on the generator, below its "
            f"{format_si(lim['generator_min_pp'], 'Vpp', 3)} minimum"
        )
    if code == "slew-rate":
        slew = float(feas.slew_needed[i]) / 1e6
        return (
            f"{format_si(vpk, 'Vpk', 3)} at {f} needs {slew:.3g} V/µs at the op-amp output, "
            f"{word} its {lim['slew_rate'] / 1e6:.3g} V/µs slew rate"
        )
    if code == "output-current":
        return (
            f"op-amp output current {format_si(float(feas.output_current_peak[i]), 'A', 3)} peak "
            f"(DC {format_si(float(feas.dc_current[i]), 'A', 3)} + ripple into the pin at {f}), "
            f"{word} its {format_si(lim['current_limit'], 'A', 3)} limit"
        )
    if code == "output-swing":
        peak = float(feas.opamp_output_peak[i])
        return (
            f"op-amp output {vdc:.3g} V ± {format_si(peak, 'V', 3)} is {word} its swing "
            f"{lim['output_low']:.3g}–{lim['output_high']:.3g} V"
        )
    if code == "device-absolute-max":
        return (
            f"DC {vdc:.4g} V + ripple {format_si(vpk, 'Vpk', 3)} = {vdc + vpk:.4g} V is {word} the "
            f"device's absolute maximum {lim['absolute_max_v']:.4g} V"
        )
    if code == "device-min-operating":
        return (
            f"DC {vdc:.4g} V − ripple {format_si(vpk, 'Vpk', 3)} = {vdc - vpk:.4g} V is "
            f"{'below' if severity == 'refused' else 'close to'} the device's minimum "
            f"operating level {lim['min_operating_v']:.4g} V"
        )
    if code == "device-load-current":
        return (
            f"load current {format_si(float(feas.dc_current[i]), 'A', 3)} is over the device's "
            f"{format_si(lim['max_load_current'], 'A', 3)} maximum"
        )
    if code == "supply-overvoltage":
        return (
            f"DC {vdc:.4g} V needs the set-point supply at its "
            f"{lim['supply_protection_v']:.4g} V over-voltage protection: it would trip"
        )
    if code == "outside-usable-band":
        return (
            f"at {f} the injector's gain is {float(feas.gain_error_db[i]):+.2f} dB off its "
            f"passband: the pin ripple there relies on the model more than in the passband"
        )
    if code == "gbw-sensitive":
        return (
            f"at {f} a ±{feas.margins.gbw_tolerance:.0%} error in the op-amp's gain-bandwidth "
            f"moves the gain by {float(feas.gbw_sensitivity_db[i]):.2f} dB"
        )
    return REASON_TITLES.get(code, code)
