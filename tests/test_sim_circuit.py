"""The simulator's own nodal solution of the injector against ngspice, and its device models.

Reference: ngspice (batch mode, tests/ngspice_ref.py) on the same netlist, op-amp as a
single-pole macro-model; agreement required 0.001 dB and 0.01° from 1 Hz to 100 MHz.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from ngspice_ref import ac_reference, op_reference

from benchseq.sim.circuit import InjectorCircuit, solve_ac, solve_dc
from benchseq.sim.devices import Amplifier, OperatingPoint, PinImpedance, Regulator, rejection_db

FREQS = np.logspace(0, 8, 8 * 6 + 1)  # 1 Hz .. 100 MHz, 6 per decade

# The worked example's values (invented) (Rin = Rf = 1 kΩ, Cc = 10 µF, Rs = 50 Ω, Rb = 10 kΩ,
# Cb = 10 µF, GBW 10 MHz), Ro = 0.2 Ω into 1 µF with 0.5 Ω ESR.
FIELD = InjectorCircuit(
    source_resistance=50.0, input_resistor=1e3, coupling_capacitor=10e-6,
    feedback_resistor=1e3, bias_resistor=10e3, bias_capacitor=10e-6, open_loop_gain=1e5,
    gain_bandwidth=10e6, output_resistance=0.2, slew_rate=10e6, current_limit=0.6,
    output_low=0.3, output_high=11.5, pin_capacitance=1e-6, pin_capacitor_esr=0.5,
)  # fmt: skip
CASES = {
    "field-example-regulator-pin": (FIELD, PinImpedance(5e3, 10e-9, 0.05)),
    "zero-source-and-output-resistance": (
        replace(FIELD, source_resistance=0.0, output_resistance=0.0, pin_capacitor_esr=0.0),
        PinImpedance(math.inf, 2.2e-6, 0.01),
    ),
    "low-gain-opamp-resistive-load": (
        replace(
            FIELD, open_loop_gain=1e3, gain_bandwidth=1e6, output_resistance=8.0,
            input_resistor=470.0, feedback_resistor=2.2e3, coupling_capacitor=4.7e-6,
            pin_capacitance=100e-9, pin_load_resistance=1e3, source_resistance=600.0,
        ),
        PinImpedance(2e3, 1e-9, 0.1),
    ),
}  # fmt: skip


def netlist(c: InjectorCircuit, pin: PinImpedance, emf_ac: float, dc_ac: float) -> str:
    """The simulator's netlist written out for ngspice (zero resistances as 0 V sources)."""

    def res(name: str, a: str, b: str, value: float) -> str:
        return f"{name} {a} {b} {value!r}" if value > 0 else f"V{name} {a} {b} DC 0"

    lines = [
        "benchseq simulator injector",
        f"Vemf e 0 DC 0 AC {emf_ac!r}",
        f"Vdc d 0 DC 0 AC {dc_ac!r}",
        res("Rs", "e", "a", c.source_resistance),
        f"Cc a b {c.coupling_capacitor!r}",
        res("Rin", "b", "n", c.input_resistor),
        res("Rf", "p", "n", c.feedback_resistor),
        res("Rb", "d", "q", c.bias_resistor),
        f"Cb q 0 {c.bias_capacitor!r}",
        "Gamp 0 x q n 1",
        f"Rpole x 0 {c.open_loop_gain!r}",
        f"Cpole x 0 {1.0 / (2.0 * math.pi * c.gain_bandwidth)!r}",
        "Ebuf o 0 x 0 1",
        res("Ro", "o", "p", c.output_resistance),
        f"Cpin p c {c.pin_capacitance!r}",
        res("Resr", "c", "0", c.pin_capacitor_esr),
        f"Cdev p k {pin.capacitance!r}",
        res("Rdevesr", "k", "0", pin.esr),
    ]
    if math.isfinite(pin.resistance):
        lines.append(f"Rdev p 0 {pin.resistance!r}")
    if c.pin_load_resistance is not None:
        lines.append(f"Rload p 0 {c.pin_load_resistance!r}")
    return "\n".join(lines) + "\n"


def _worst(model: np.ndarray, spice: np.ndarray) -> tuple[float, float]:
    ratio = model / spice
    return float(np.max(np.abs(20 * np.log10(np.abs(ratio))))), float(
        np.max(np.abs(np.degrees(np.angle(ratio))))
    )


@pytest.mark.parametrize("name", sorted(CASES))
def test_nodal_solution_matches_ngspice(name: str) -> None:
    """Pin and op-amp output per volt of EMF, and pin per volt of set-point, = ngspice AC."""
    circuit, pin = CASES[name]
    ours = solve_ac(circuit, FREQS, pin.admittance)
    by_emf = ac_reference(netlist(circuit, pin, 1.0, 0.0), ["p", "o"], FREQS)
    by_dc = ac_reference(netlist(circuit, pin, 0.0, 1.0), ["p"], FREQS)
    for model, spice in (
        (ours.pin_per_emf, by_emf["p"]),
        (ours.opamp_per_emf, by_emf["o"]),
        (ours.pin_per_setpoint, by_dc["p"]),
    ):
        db, deg = _worst(model, spice)
        assert db < 1e-3 and deg < 1e-2, (name, db, deg)


def test_dc_operating_point_matches_ngspice() -> None:
    """Pin DC with a 50 mA current load = ngspice .op (the AC-open current source loads DC)."""
    circuit = FIELD
    text = netlist(circuit, PinImpedance(math.inf, 0.0, 0.0), 0.0, 0.0).replace(
        "Vdc d 0 DC 0", "Vdc d 0 DC 5"
    )
    spice = op_reference(text + "Iload p 0 DC 0.05\n", "p")
    ours = solve_dc(circuit, 5.0, lambda v: 0.05)
    assert ours.pin == pytest.approx(spice, abs=2e-6)  # ngspice prints ~7 digits
    # the closed form of the brief: set-point × A0/(1+A0) − I·Ro/(1+A0)
    a0 = circuit.open_loop_gain
    assert ours.pin == pytest.approx((5.0 * a0 - 0.05 * 0.2) / (1 + a0), abs=1e-12)


def test_dc_swing_and_current_limits() -> None:
    clipped = solve_dc(FIELD, 20.0, lambda v: 0.0)
    assert clipped.swing_limited and clipped.pin == pytest.approx(FIELD.output_high)
    starved = solve_dc(FIELD, 5.0, lambda v: 1.0)
    assert starved.current_limited and starved.pin < 5.0 * 0.7


def test_injector_passband_gain_is_field_example() -> None:
    """Computed by hand (ideal inverting amplifier): passband gain −Rf/(Rs+Rin) = −0.952 (−0.42 dB) at 1 kHz."""
    ours = solve_ac(FIELD, np.array([1e3]))
    assert abs(ours.pin_per_emf[0]) == pytest.approx(1000 / 1050, rel=1e-3)
    assert np.degrees(np.angle(ours.pin_per_emf[0])) == pytest.approx(180.0, abs=1.5) or (
        np.degrees(np.angle(ours.pin_per_emf[0])) == pytest.approx(-180.0, abs=1.5)
    )


def test_regulator_rejection_has_the_trade_shape() -> None:
    """A typical regulator curve (common practice): high at low frequency, ~20 dB/decade
    fall past the error amplifier's bandwidth, a minimum near 100 kHz–1 MHz, then a rise."""
    device = Regulator()
    op = OperatingPoint(5.0, 0.05)
    low = rejection_db(device, np.array([100.0]), op)[0]
    assert 75.0 <= low <= 90.0
    r2k, r20k = rejection_db(device, np.array([2e3, 20e3]), op)
    assert -24.0 < r20k - r2k < -16.0
    f = np.logspace(3, 7.3, 200)
    curve = rejection_db(device, f, op)
    assert 100e3 <= f[np.argmin(curve)] <= 2e6
    assert curve[np.argmin(np.abs(f - 5e6))] > curve.min() + 10.0
    # headroom and load lower the rejection (common practice)
    at = np.array([1e3])
    ample = rejection_db(device, at, op)[0]
    assert rejection_db(device, at, OperatingPoint(3.65, 0.05))[0] < ample - 2.0
    assert rejection_db(device, at, OperatingPoint(5.0, 0.3))[0] < rejection_db(device, at, op)[0]


def test_amplifier_rejection_is_referred_to_input() -> None:
    """Input-referred rejection (common practice for amplifiers): output ripple = supply ripple / rejection × noise gain, so
    110 dB referred to the input at a gain of 10 (20 dB) rejects 90 dB at the output."""
    device = Amplifier(input_rejection_db=110.0, noise_gain=10.0, headroom_knee=1e-9)
    value = rejection_db(device, np.array([0.1]), OperatingPoint(12.0, 0.0))[0]
    assert value == pytest.approx(90.0, abs=0.01)
    assert rejection_db(device, np.array([0.1]), OperatingPoint(2.0, 0.0))[0] < 21.0
