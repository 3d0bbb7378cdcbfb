"""Feasibility of planned points: what the injector and the bench can do at each (pure numpy).

The transfer functions come from ``benchseq.injector.InjectorModel``; this module turns them
into per-point verdicts against the limits of the op-amp (slew rate, output swing, output
current), the generator (frequency, amplitude), the device (absolute maximum, minimum
operating level, load current), the set-point supply (over-voltage protection) and the
model's own trust (usable band, sensitivity to the op-amp's gain-bandwidth).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

if TYPE_CHECKING:
    from benchseq.injector import InjectorModel

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


def evaluate(
    model: InjectorModel,
    frequency: Any,
    ripple_peak: Any,
    dc_level: Any,
    load_current: Any,
    device: DeviceLimitsLike | None,
    margins: Margins | None,
    supply_protection_v: float | None = None,
) -> Feasibility:
    """The vectorised feasibility check behind InjectorModel.feasibility (see there)."""
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

    # the injector's transfer depends on the frequency alone: computed once per distinct
    # frequency (a plan repeats each at every ripple, DC level and load), then per point
    uf = np.unique(f_eval)
    at: Any = slice(None)
    if 2 * uf.size > f_eval.size:  # mostly distinct: grouping would cost more than it saves
        uf = f_eval
    else:
        at = np.searchsorted(uf, f_eval)
    net = model._network(uf)
    ro, rf = amp.output_resistance, model.values.feedback_resistor
    h = -net["alpha"] * (net["a"] - ro / rf) / net["d"]
    current_per_pin = net["ypin"] + (1.0 - (net["alpha"] / h + net["beta"])) / rf
    opamp_out_peak = np.abs(1.0 + ro * current_per_pin)[at] * vpk
    ripple_current = np.abs(current_per_pin)[at] * vpk
    output_current = np.abs(dc_current) + ripple_current
    slew_needed = 2.0 * math.pi * f_eval * opamp_out_peak
    generator_pp = 2.0 * vpk / (np.abs(h) * gen.emf_per_displayed)[at]
    rg = gen.source_resistance + model.values.input_resistor
    gain_error = (20 * np.log10(np.abs(h) * rg / rf))[at]
    sensitivity = model.gbw_sensitivity_db(uf, m.gbw_tolerance)[at]
    del net, h, current_per_pin, ripple_current
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
