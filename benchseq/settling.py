"""How long to wait after the generator changes, before capturing (pure numpy).

One rule for the whole program: the sequencer's waits (each point, each trim, the switch-off
before a floor capture, the switch-on at power-up), the check's bench-time estimate, the
bench time left shown during a run and the pre-flight's longest-wait check all call
``Settling``.

Rule "transient" (the default). A sine switched on, off or changed at the injector's input
excites the injector's natural modes. With H(s) = V_pin/V_emf = k + Σ r_i/(s − p_i) (simple
poles p_i, residues r_i: the partial fractions of the exact closed form,
``InjectorModel.transfer_polynomials``), a generator EMF Re(U·e^{jωt}) switched on at t = 0
from rest gives V_pin = steady state + Σ c_i·e^{p_i·t} with

    c_i = r_i·(U/(2(p_i − jω)) + U*/(2(p_i + jω)))      (Laplace transform of the product)

so |c_i| ≤ |r_i|·|U|·m_i(ω), m_i(ω) = (1/|p_i − jω| + 1/|p_i + jω|)/2, whatever the phase
at the switch. A change from (U1, ω1) to (U2, ω2) is the old sine switched off plus the new
one switched on (superposition): |c_i| ≤ |r_i|·(|U2|·m_i(ω2) + |U1|·m_i(ω1)); an amplitude
change at one frequency with the phase running on (a trim) is a switch-on of U2 − U1. The
wait is the least t with

    Σ_i |c_i|·e^{Re(p_i)·t} ≤ RESIDUAL_FRACTION · u_rel · A_pin

where A_pin is the pin ripple the point measures (as the pin channel reads it: through its
AC coupling when the run has measured one, whose own mode then joins the injector's, the
channel reading H_ac·s/(s + ω_c)) and u_rel = 10^{u/20} − 1 the point's target
standard uncertainty u (dB, k = 1) in amplitude terms. RESIDUAL_FRACTION = 0.1: what is left
of the transient then moves the pin amplitude by at most a tenth of the target uncertainty
at the start of the capture (less on average over it, as the modes keep decaying); added in
quadrature to u it raises u by at most 0.5 %, and even taken as a bias it is a tenth of u,
far inside the ±1.96u interval. The plan's ``settle.wait`` stays a minimum: the wait is
max(settle.wait, transient time).

After a step ΔV of the set-point supply the pin's DC moves through H_dc (the bias filter
Rb·Cb, the coupling capacitor charging through Rg and Rf, the loop): the wait is the least t
with Σ |r_i/p_i|·|ΔV|·e^{Re(p_i)·t} under the same allowance (the residues of H_dc(s)/s).
The model knows the injector, not the device or the room: the wait after a DC level or load
change for the device's own settling or heating (``settle.after_operating_point``) is not
derived here and stays as the plan states it. The residual is judged at the pin: a device whose output follows a
slow pin excursion much more than the test frequency (rejection falling steeply at the
injector's slowest mode) needs a ``settle.wait`` of its own.

Rule "time-constants" (``settle.rule = "time-constants"``): the earlier fixed rule,
settle.wait + settle.time_constants × the injector's slowest time constant after each
point's change, settle.wait + 3 × (Rs+Rin)·Cc after a trim, settle.wait + 5 × the slowest
time constant after switching off for a floor capture, 7·Rb·Cb after a DC step.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from benchseq.distinct import numbered, pairs
from benchseq.injector import TWO_PI, InjectorModel

RESIDUAL_FRACTION = 0.1  # of the target uncertainty (amplitude terms) left of a transient
BIAS_TIME_CONSTANTS = 7.0  # "time-constants" rule: Rb·Cb multiples waited after a DC step
RULES = ("transient", "time-constants")
_BISECTIONS = 40  # the wait to 1e-12 of its upper bound


@dataclass(frozen=True)
class NaturalModes:
    """Poles (1/s, complex) and residues (V_pin per V of EMF per s) of the injector's H_ac."""

    poles: np.ndarray
    residues: np.ndarray

    @classmethod
    def of(cls, model: InjectorModel, highpass_hz: float = 0.0) -> NaturalModes:
        """Partial fractions of H_ac = num/den: r_i = num(p_i)/den'(p_i) for each simple
        root p_i of den (a direct term k makes no transient). With ``highpass_hz``, of the
        pin as an AC-coupled scope channel reads it: H_ac·s/(s + 2π·highpass_hz)."""
        num, den = model.transfer_polynomials()["ac"]
        if highpass_hz > 0:
            num = np.polymul(num, [1.0, 0.0])
            den = np.polymul(den, [1.0, TWO_PI * highpass_hz])
        poles = np.roots(den)
        residues = np.polyval(num, poles) / np.polyval(np.polyder(den), poles)
        return cls(poles.astype(complex), residues.astype(complex))

    def weights(self, frequency: Any) -> np.ndarray:
        """|r_i|·m_i(ω) per frequency (rows) and mode (columns): V_pin per V of EMF switched."""
        w = TWO_PI * np.asarray(frequency, dtype=float)[..., None]
        p = self.poles
        m = 0.5 * (1.0 / np.abs(p - 1j * w) + 1.0 / np.abs(p + 1j * w))
        return np.abs(self.residues) * m

    def residual(self, t: Any, size: np.ndarray) -> np.ndarray:
        """Σ_i size_i·e^{−|Re p_i|·t} (V) for per-mode sizes ``size`` (…, modes)."""
        decay = np.abs(self.poles.real)
        t = np.asarray(t, dtype=float)[..., None]
        return np.sum(size * np.exp(-decay * t), axis=-1)

    def time_to(self, size: np.ndarray, allowed: Any) -> np.ndarray:
        """Least t ≥ 0 (s) with residual(t, size) ≤ allowed, vectorised over the leading axes.

        The residual falls monotonically, so bisection between 0 and the time by which every
        mode alone is under allowed/modes finds it."""
        size = np.asarray(size, dtype=float)
        allowed = np.broadcast_to(np.asarray(allowed, dtype=float), size.shape[:-1])
        decay = np.abs(self.poles.real)
        with np.errstate(divide="ignore"):
            each = np.log(np.maximum(size * size.shape[-1] / allowed[..., None], 1.0)) / decay
        high = np.max(each, axis=-1) if size.shape[-1] else np.zeros(allowed.shape)
        low = np.zeros_like(high)
        done = self.residual(low, size) <= allowed
        for _ in range(_BISECTIONS):
            mid = 0.5 * (low + high)
            ok = self.residual(mid, size) <= allowed
            high = np.where(ok, mid, high)
            low = np.where(ok, low, mid)
        return np.where(done, 0.0, high)


def allowed_residual(pin_peak: Any, target_db: float) -> np.ndarray:
    """The transient left at the capture's start, V: RESIDUAL_FRACTION of the target
    uncertainty in amplitude terms, of the pin ripple measured."""
    return RESIDUAL_FRACTION * (10 ** (target_db / 20.0) - 1.0) * np.asarray(pin_peak, dtype=float)


class Settling:
    """A plan's settle rule applied to one injector (every wait after a generator change).

    Amplitudes are EMF peaks (V) of the generator and pin ripple peaks (V); frequencies Hz.
    Every method is vectorised over its array arguments and returns seconds."""

    def __init__(
        self, rule: Any, model: InjectorModel, target_db: float, highpass_hz: float = 0.0
    ) -> None:
        self.rule = rule  # benchseq.plan.SettleRule (fixed_s, time_constants, rule)
        self.model = model
        self.target_db = float(target_db)
        corners = model.corners()
        self.slowest_s = corners.slowest_time_constant_s
        self.coupling_s = corners.coupling_time_constant_s
        # the pin channel's AC coupling (Hz; 0: none known): its own mode rings too, and the
        # reading it leaves of the pin ripple is what the residual is judged against
        self.highpass_hz = float(highpass_hz)
        self.modes = NaturalModes.of(model, self.highpass_hz)
        num, den = model.transfer_polynomials()["dc"]
        poles = np.roots(den)
        residues = np.polyval(num, poles) / np.polyval(np.polyder(den), poles)
        # a step ΔV of the set-point: V_pin = H_dc(0)·ΔV + Σ (r_i/p_i)·ΔV·e^{p_i t}
        self.dc_modes = NaturalModes(poles.astype(complex), (residues / poles).astype(complex))
        values = model.values
        self.bias_s = values.bias_resistor * values.bias_capacitor

    def reading_through(self, highpass_hz: float) -> Settling:
        """The same rule for a pin read through an AC coupling of ``highpass_hz`` (Hz)."""
        return Settling(self.rule, self.model, self.target_db, highpass_hz)

    @property
    def by_time_constants(self) -> bool:
        return getattr(self.rule, "rule", "transient") == "time-constants"

    def _transient(self, size: np.ndarray, pin_peak: Any, target_db: float | None) -> np.ndarray:
        target = self.target_db if target_db is None else target_db
        wait = self.modes.time_to(size, allowed_residual(pin_peak, target))
        return np.maximum(wait, self.rule.fixed_s)

    def _read(self, frequency: Any, pin_peak: Any) -> np.ndarray:
        """The pin ripple as the channel reads it (through its AC coupling, if any)."""
        pin = np.asarray(pin_peak, dtype=float)
        if self.highpass_hz <= 0:
            return pin
        x = np.asarray(frequency, dtype=float) / self.highpass_hz
        return pin * x / np.sqrt(1.0 + x * x)

    def change(
        self,
        f_old: Any,
        emf_old: Any,
        f_new: Any,
        emf_new: Any,
        pin_peak: Any,
        target_db: float | None = None,
    ) -> np.ndarray:
        """After the generator moves from (f_old, emf_old) to (f_new, emf_new): a new point,
        or a switch-on (emf_old = 0). ``pin_peak``: the pin ripple then measured."""
        if self.by_time_constants:
            shape = np.broadcast(np.asarray(f_new), np.asarray(pin_peak)).shape
            return np.full(shape, self.rule.fixed_s + self.rule.time_constants * self.slowest_s)
        size = np.abs(np.asarray(emf_new, dtype=float))[..., None] * self.modes.weights(f_new)
        size = size + np.abs(np.asarray(emf_old, dtype=float))[..., None] * self.modes.weights(
            f_old
        )
        return self._transient(size, self._read(f_new, pin_peak), target_db)

    def trim(self, frequency: Any, emf_old: Any, emf_new: Any, pin_peak: Any) -> np.ndarray:
        """After an amplitude change at one frequency, the generator's phase running on."""
        if self.by_time_constants:
            shape = np.broadcast(np.asarray(frequency), np.asarray(pin_peak)).shape
            return np.full(shape, self.rule.fixed_s + 3.0 * self.coupling_s)
        step = np.abs(np.asarray(emf_new, dtype=float) - np.asarray(emf_old, dtype=float))
        size = step[..., None] * self.modes.weights(frequency)
        return self._transient(size, self._read(frequency, pin_peak), None)

    def switch_off(self, frequency: Any, emf_old: Any, pin_peak: Any) -> np.ndarray:
        """After the generator goes off (before a floor capture): what is left of the switch
        against the ripple the point measured with it on."""
        if self.by_time_constants:
            shape = np.broadcast(np.asarray(frequency), np.asarray(pin_peak)).shape
            return np.full(shape, self.rule.fixed_s + 5.0 * self.slowest_s)
        size = np.abs(np.asarray(emf_old, dtype=float))[..., None] * self.modes.weights(frequency)
        return self._transient(size, self._read(frequency, pin_peak), None)

    def dc_step(self, step_v: Any, pin_peak: Any) -> np.ndarray:
        """After the set-point supply moves by ``step_v`` (V, the DC ramp taken as one step
        at its end): until what is left of the pin's DC transient (the bias filter and every
        other mode of H_dc) is under the same allowance as a ripple change's."""
        step = np.abs(np.asarray(step_v, dtype=float))
        if self.by_time_constants:
            shape = np.broadcast(step, np.asarray(pin_peak)).shape
            return np.full(shape, BIAS_TIME_CONSTANTS * self.bias_s)
        size = step[..., None] * np.abs(self.dc_modes.residues)
        return self.dc_modes.time_to(size, allowed_residual(pin_peak, self.target_db))

    def emf_for(self, frequency: Any, pin_peak: Any) -> np.ndarray:
        """The EMF peak (V) the model needs for ``pin_peak`` at ``frequency``."""
        with np.errstate(divide="ignore"):
            return np.asarray(pin_peak, dtype=float) / np.abs(self.model.ac_gain(frequency))

    def planned(self, frequency: Any, pin_peak: Any, previous: Any = None) -> np.ndarray:
        """The wait before each point of a run order (the check's and the ETA's estimate):
        each point's change from the one before it (``previous``: its position, −1 for the
        generator off; default the point before in the arrays, the first from off)."""
        f = np.asarray(frequency, dtype=float)
        pin = np.asarray(pin_peak, dtype=float)
        if f.size == 0:
            return np.zeros(0)
        if previous is None:
            previous = np.arange(f.size) - 1
        previous = np.asarray(previous, dtype=np.int64)
        # A wait depends only on the change (old frequency and EMF, new ones, pin ripple):
        # a sweep repeats the same few changes at every DC level and load, so each distinct
        # change is computed once (the same arithmetic per change as point by point).
        uf, fi = numbered(f)
        up, pi = numbered(pin)
        fk, pk, setting = pairs(fi, uf.size, pi, up.size)
        del fi, pi
        uf, upin = uf[fk], up[pk]
        emf = self.emf_for(uf, upin)
        count = uf.size
        before = np.where(previous >= 0, setting[np.maximum(previous, 0)], count)
        old, new, which = pairs(before, count + 1, setting, count)
        del before, setting
        on = old < count
        old = np.minimum(old, count - 1)
        waits = self.change(
            np.where(on, uf[old], uf[new]),
            np.where(on, emf[old], 0.0),
            uf[new],
            emf[new],
            upin[new],
        )
        return waits[which]


def previous_in(order: Any, count: int) -> np.ndarray:
    """For each of ``count`` positions, the position measured just before it in ``order``
    (−1 for the first: the generator is off before it)."""
    order = np.asarray(order, dtype=np.int64)
    previous = np.full(count, -1, dtype=np.int64)
    if order.size:
        previous[order[1:]] = order[:-1]
    return previous
