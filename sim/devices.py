"""Device-under-test models with known truth: rejection, pin impedance, output noise, DC.

Truth is ``output ripple = pin ripple × transfer(f, operating point)`` (complex), so the
device's own rejection is −20·log10|transfer|. Each model also gives the admittance of its
supply pin (a resistance in parallel with a capacitor and its ESR, so ngspice can model it),
its DC input current, its output DC level and its output noise density.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol, cast

import numpy as np

from benchseq import plugins
from benchseq.tomlfile import Section


@dataclass(frozen=True)
class OperatingPoint:
    """Where the device works: DC at its supply pin (V) and the current its output supplies (A)."""

    pin_dc: float
    output_current: float


@dataclass(frozen=True)
class PinImpedance:
    """The device's own supply-pin impedance: ``resistance`` ∥ (``capacitance`` + ``esr``)."""

    resistance: float  # Ω, dynamic input resistance (inf = none)
    capacitance: float  # F
    esr: float  # Ω

    def admittance(self, f: np.ndarray) -> np.ndarray:
        s = 2j * math.pi * np.asarray(f, dtype=float)
        y = np.zeros(s.shape, dtype=complex)
        if math.isfinite(self.resistance):
            y += 1.0 / self.resistance
        if self.capacitance > 0:
            y += 1.0 / (self.esr + 1.0 / (s * self.capacitance))
        return y


class Device(Protocol):
    """What the simulated bench needs from a device model (read-only: frozen dataclasses
    satisfy it)."""

    @property
    def kind(self) -> str: ...
    @property
    def pin(self) -> PinImpedance: ...
    @property
    def board_load_current(self) -> float:
        """A, drawn from the output by the device's own board."""

    def transfer(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        """V_out / V_pin (complex) at each frequency (Hz)."""

    def output_dc(self, op: OperatingPoint) -> float:
        """Output DC level (V)."""

    def input_current(self, op: OperatingPoint) -> float:
        """DC current drawn at the supply pin (A)."""

    def noise_density(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        """Output noise density (V/√Hz) at each frequency, before the noise bandwidth."""

    @property
    def noise_bandwidth(self) -> float:
        """Hz, single-pole corner of the output noise."""


def rejection_db(device: Device, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
    """The device's own rejection 20·log10(|V_pin| / |V_out|) in dB."""
    return -20.0 * np.log10(np.abs(device.transfer(f, op)))


@dataclass(frozen=True)
class Regulator:
    """A low-dropout regulator: rejection from its loop gain.

    V_out/V_pin = F(f) / (1 + T(f)): F = Zo/(Zo + r_pass) is the pass device's feed-through
    into the output node (Zo = load ∥ output capacitor with ESR and ESL), T the loop gain
    T0/((1 + jf/f_ea)(1 + jf/f_2)). T0 shrinks with headroom (Vin − Vout − dropout) and
    with load current, so rejection falls near dropout and at heavy load (practice).
    """

    output_voltage: float = 3.3
    dropout_at_zero: float = 0.08  # V
    dropout_resistance: float = 2.4  # Ω: dropout grows with load current
    quiescent_current: float = 0.5e-3  # A
    board_load_current: float = 0.05  # A, the device board's own load (besides any e-load)
    loop_gain_db: float = 80.0  # T0 at the reference load with ample headroom
    reference_load_current: float = 0.05  # A
    error_amp_bandwidth: float = 200.0  # Hz
    second_pole: float = 400e3  # Hz
    pass_resistance: float = 2.0  # Ω, pass device output resistance
    output_capacitance: float = 2.2e-6  # F
    output_esr: float = 0.005  # Ω
    output_esl: float = 0.5e-9  # H
    headroom_knee: float = 0.1  # V: T0 halves at this headroom
    pin: PinImpedance = PinImpedance(5e3, 10e-9, 0.05)
    white_noise: float = 40e-9  # V/√Hz at the output
    flicker_corner: float = 300.0  # Hz
    noise_bandwidth: float = 100e3  # Hz
    kind: str = "regulator"

    def dropout(self, output_current: float) -> float:
        return self.dropout_at_zero + self.dropout_resistance * max(output_current, 0.0)

    def headroom(self, op: OperatingPoint) -> float:
        return op.pin_dc - self.output_voltage - self.dropout(op.output_current)

    def loop_gain_dc(self, op: OperatingPoint) -> float:
        headroom = self.headroom(op)
        if headroom <= 0:
            return 0.0
        load = max(op.output_current, 1e-4)
        t0 = 10 ** (self.loop_gain_db / 20.0) * math.sqrt(self.reference_load_current / load)
        return t0 * headroom / (headroom + self.headroom_knee)

    def transfer(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        f = np.asarray(f, dtype=float)
        s = 2j * math.pi * f
        zcap = self.output_esr + s * self.output_esl + 1.0 / (s * self.output_capacitance)
        vout = self.output_dc(op)
        if op.output_current > 0 and vout > 0:
            zload = vout / op.output_current
            zo = zcap * zload / (zcap + zload)
        else:
            zo = zcap
        feed = zo / (zo + self.pass_resistance)
        loop = self.loop_gain_dc(op) / (
            (1.0 + 1j * f / self.error_amp_bandwidth) * (1.0 + 1j * f / self.second_pole)
        )
        return feed / (1.0 + loop)

    def output_dc(self, op: OperatingPoint) -> float:
        return max(0.0, min(self.output_voltage, op.pin_dc - self.dropout(op.output_current)))

    def input_current(self, op: OperatingPoint) -> float:
        if op.pin_dc <= 0:
            return 0.0
        return self.quiescent_current + max(op.output_current, 0.0)

    def noise_density(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        f = np.maximum(np.asarray(f, dtype=float), 1e-3)
        return self.white_noise * np.sqrt(1.0 + self.flicker_corner / f)


@dataclass(frozen=True)
class Amplifier:
    """An amplifier whose rejection is referred to its input: output ripple = pin ripple /
    PSRR_in(f) × noise gain (input-referred rejection, common practice). PSRR_in(f) = P0/(1 + jf/f_p); the
    closed-loop gain rolls off at GBW/noise gain. Below its minimum supply it stops rejecting.
    """

    output_level: float = 1.5  # V, output DC (set by its reference)
    minimum_supply: float = 2.7  # V
    quiescent_current: float = 2e-3  # A
    board_load_current: float = 0.0  # A
    input_rejection_db: float = 110.0  # P0, referred to the input
    rejection_pole: float = 100.0  # Hz
    noise_gain: float = 10.0
    gain_bandwidth: float = 10e6  # Hz
    headroom_knee: float = 0.2  # V
    pin: PinImpedance = PinImpedance(2e3, 1e-9, 0.1)
    input_noise: float = 10e-9  # V/√Hz referred to the input
    flicker_corner: float = 50.0  # Hz
    kind: str = "amplifier"

    @property
    def noise_bandwidth(self) -> float:
        return self.gain_bandwidth / self.noise_gain

    def transfer(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        f = np.asarray(f, dtype=float)
        headroom = op.pin_dc - self.minimum_supply
        p0 = 10 ** (self.input_rejection_db / 20.0)
        knee = headroom / (headroom + self.headroom_knee) if headroom > 0 else 0.0
        p0 = 1.0 + (p0 - 1.0) * knee
        gain = self.noise_gain / (1.0 + 1j * f * self.noise_gain / self.gain_bandwidth)
        return gain * (1.0 + 1j * f / self.rejection_pole) / p0

    def output_dc(self, op: OperatingPoint) -> float:
        return self.output_level if op.pin_dc >= self.minimum_supply else 0.0

    def input_current(self, op: OperatingPoint) -> float:
        if op.pin_dc <= 0:
            return 0.0
        return self.quiescent_current + max(op.output_current, 0.0)

    def noise_density(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        f = np.maximum(np.asarray(f, dtype=float), 1e-3)
        return self.input_noise * self.noise_gain * np.sqrt(1.0 + self.flicker_corner / f)


# -- building a device from a scenario's [device] table ----------------------------------------

_QUANTITY_KEYS: dict[str, dict[str, str]] = {
    "regulator": {
        "output_voltage": "V",
        "dropout_at_zero": "V",
        "dropout_resistance": "ohm",
        "quiescent_current": "A",
        "board_load_current": "A",
        "loop_gain": "dB",
        "reference_load_current": "A",
        "error_amp_bandwidth": "Hz",
        "second_pole": "Hz",
        "pass_resistance": "ohm",
        "output_capacitance": "F",
        "output_esr": "ohm",
        "headroom_knee": "V",
        "flicker_corner": "Hz",
        "noise_bandwidth": "Hz",
    },
    "amplifier": {
        "output_level": "V",
        "minimum_supply": "V",
        "quiescent_current": "A",
        "board_load_current": "A",
        "input_rejection": "dB",
        "rejection_pole": "Hz",
        "gain_bandwidth": "Hz",
        "headroom_knee": "V",
        "flicker_corner": "Hz",
    },
}
# quantities the models divide by (corner frequencies, a capacitance in series with the
# output, a current that scales the loop gain): zero is refused as well as a negative value
_POSITIVE_KEYS = frozenset(
    {
        "error_amp_bandwidth",
        "second_pole",
        "noise_bandwidth",
        "output_capacitance",
        "reference_load_current",
        "rejection_pole",
        "gain_bandwidth",
    }
)
_NUMBER_KEYS: dict[str, dict[str, float]] = {
    # plain numbers with their unit in the key name -> scale to SI
    "regulator": {"output_esl_nh": 1e-9, "white_noise_nv_per_root_hz": 1e-9},
    "amplifier": {"noise_gain": 1.0, "input_noise_nv_per_root_hz": 1e-9},
}
_RENAMES = {
    "loop_gain": "loop_gain_db",
    "input_rejection": "input_rejection_db",
    "output_esl_nh": "output_esl",
    "white_noise_nv_per_root_hz": "white_noise",
    "input_noise_nv_per_root_hz": "input_noise",
}


def device_from_section(section: Section, folder: Path | None = None) -> Device:
    """A device model from a scenario's [device] table (model = "regulator" | "amplifier" |
    "netlist"; a netlist file is read relative to ``folder``, the scenario file's folder)."""
    model = section.text("model")
    if model not in (*_QUANTITY_KEYS, "netlist"):
        if model in plugins.registered("device"):
            factory = plugins.load("device", model, section.source, section.key_path("model"))
            return cast(Device, factory(section, folder))
        section.text("model", choices=(*_QUANTITY_KEYS, "netlist", *plugins.names("device")))
    if model == "netlist":
        from benchseq.sim.netlist import netlist_device_from_section

        return netlist_device_from_section(section, folder or Path(section.source).parent)
    values: dict[str, object] = {}
    for key, dimension in _QUANTITY_KEYS[model].items():
        if section.has(key):
            values[_RENAMES.get(key, key)] = section.quantity(
                key,
                dimension,
                positive=key in _POSITIVE_KEYS,
                nonnegative=dimension not in ("dB",),
            )
    for key, scale in _NUMBER_KEYS[model].items():
        if section.has(key):
            values[_RENAMES.get(key, key)] = section.number(key, positive=True) * scale
    pin = section.section("pin", required=False)
    if pin is not None:
        resistance = pin.raw("resistance", default="inf")
        values["pin"] = PinImpedance(
            resistance=math.inf
            if resistance == "inf"
            else pin.parse_value(resistance, "ohm", "resistance"),
            capacitance=pin.quantity("capacitance", "F", default=0.0, nonnegative=True),
            esr=pin.quantity("esr", "ohm", default=0.0, nonnegative=True),
        )
        pin.done()
    section.done()
    if model == "regulator":
        return Regulator(**values)  # type: ignore[arg-type]
    return Amplifier(**values)  # type: ignore[arg-type]
