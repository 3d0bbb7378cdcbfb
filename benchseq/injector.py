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
dropping Ro·y_fb against 1 + A·beta and Ro/Rf against A gives the textbook approximation
(Zout = Ro/(1+T), H_ac = −(Rf/Zin)·T/(1+T) with T = A·beta, followed by the pin divider).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.polynomial import polynomial as P

from benchseq.bench import GeneratorSetup, InjectorValues, PinLoad
from benchseq.errors import BadInput

# The feasibility check lives in benchseq.feasibility; its names stay importable from here.
from benchseq.feasibility import (
    REASON_BIT,
    REASON_TITLES,
    REASONS,
    DeviceLimitsLike,
    Feasibility,
    Margins,
    evaluate,
)

__all__ = [
    "REASONS",
    "REASON_BIT",
    "REASON_TITLES",
    "TWO_PI",
    "Corners",
    "DeviceLimitsLike",
    "Feasibility",
    "InjectorModel",
    "Margins",
]

TWO_PI = 2.0 * math.pi


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


class InjectorValuesError(BadInput):
    """The bench's injector values give a network the model cannot evaluate."""


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
        fastest_decay = float(np.min(np.abs(poles.real)))
        if not (math.isfinite(fastest_decay) and fastest_decay > 0):
            raise InjectorValuesError(
                "these component values give the injector a pole at zero frequency (it would "
                "never settle); check the resistor and capacitor values"
            )
        slowest = 1.0 / fastest_decay
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
        exponent = x0 + (x1 - x0) * (-y0) / (y1 - y0)
        if not math.isfinite(exponent) or exponent > 300.0:
            return math.inf  # the level never comes back within a float's range
        return 10**exponent

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
        return evaluate(
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
