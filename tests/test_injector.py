"""The injector model against handbook formulas, a worked example computed by hand and scipy."""

from __future__ import annotations

import dataclasses
import math
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nodal_ref import injector_gains
from scipy import signal
from test_injector_cases import CASES, demo_like, field_example, generator, opamp

from benchseq.bench import InjectorValues, PinLoad, load_bench
from benchseq.injector import REASON_BIT, InjectorModel

MIDBAND = 10e3  # Hz, well inside every case's passband


def model_of(case: tuple) -> InjectorModel:
    return InjectorModel(*case)


# -- a worked example (invented values; corners computed by hand from the formulas) --------
def test_field_example_corners() -> None:
    """Worked example (computed by hand): passband −0.952 (−0.42 dB), high-pass 15.2 Hz (τ 10.5 ms),
    bias low-pass 1.59 Hz, noise gain 1.95, −3 dB near 5.1 MHz (= GBW/noise gain, the
    standard op-amp result)."""
    corners = model_of(field_example()).corners()
    assert round(corners.passband_gain, 3) == -0.952
    assert round(20 * math.log10(abs(corners.passband_gain)), 2) == -0.42
    assert round(corners.highpass_hz, 1) == 15.2
    assert corners.coupling_time_constant_s == pytest.approx(10.5e-3)
    assert round(corners.bias_lowpass_hz, 2) == 1.59
    assert round(corners.noise_gain, 2) == 1.95
    assert corners.minus3db_estimate_hz == pytest.approx(5.1e6, rel=0.01)
    assert corners.minus3db_hz == pytest.approx(10e6 / corners.noise_gain, rel=0.01)
    assert corners.peaking_db < 0.01  # Ro = 0: a single-pole loop does not peak


def test_field_example_model_gain_in_passband() -> None:
    """Passband gain −Rf/(Rs+Rin) = −0.952: the ideal inverting amplifier (Horowitz & Hill,
    The Art of Electronics, 3rd ed., ch. 4; from memory)."""
    h = model_of(field_example()).ac_gain(MIDBAND)
    assert abs(h) == pytest.approx(1e3 / 1050, rel=1e-3)
    assert abs(np.angle(h, deg=True)) == pytest.approx(180.0, abs=0.5)


def test_generator_load_mode_factors() -> None:
    """Computed by hand: pin ripple per displayed volt is 1.905 in "50 ohm" mode (EMF = 2x displayed,
    common practice) and 0.952 in high-Z mode, for Rs = 50 Ω into Rin = Rf = 1 kΩ."""
    values, gen, pin = field_example()
    fifty = InjectorModel(values, gen, pin)
    high_z = InjectorModel(values, dataclasses.replace(gen, load_mode="high-z"), pin)
    assert round(abs(complex(fifty.pin_per_displayed(MIDBAND))), 3) == 1.905
    assert round(abs(complex(high_z.pin_per_displayed(MIDBAND))), 3) == 0.952


def test_full_power_bandwidth() -> None:
    """Horowitz & Hill, The Art of Electronics, 3rd ed.: FPBW = SR/(2π·Vpk);
    10 V/µs at 0.5 Vpk -> 3.18 MHz (computed)."""
    assert round(model_of(field_example()).full_power_bandwidth(0.5) / 1e6, 2) == 3.18


def test_current_into_pin_capacitance() -> None:
    """Computed from i = 2π·f·C·Vpk: 50 mVpk into 10 µF takes 0.31 A at 100 kHz."""
    values, gen, _ = field_example()
    pin = PinLoad(capacitance=10e-6)
    ripple = model_of((values, gen, pin)).output_current_per_pin(100e3) * 0.05
    assert round(abs(complex(ripple)), 2) == 0.31


# -- ideal limits and the textbook closed-loop form ----------------------------------------
def test_ideal_limits() -> None:
    """Ideal inverting/non-inverting amplifier limits (Horowitz & Hill, ch. 4): H_ac -> −Rf/(Rs+Rin) in the passband and 0 at DC;
    H_dc -> 1 at DC and 0 at high frequency (A0 -> large, GBW -> large, Ro = 0)."""
    values, gen, pin = field_example()
    ideal = dataclasses.replace(values, opamp=opamp(open_loop_gain=1e9, gain_bandwidth=1e15))
    model = InjectorModel(ideal, gen, pin)
    assert complex(model.ac_gain(1e6)) == pytest.approx(-1e3 / 1050, rel=1e-4)
    assert abs(complex(model.ac_gain(0.0))) == 0.0
    assert abs(complex(model.ac_gain(1e-6))) < 1e-7
    assert complex(model.dc_gain(0.0)) == pytest.approx(1.0, rel=1e-8)
    assert abs(complex(model.dc_gain(1e6))) < 1e-5


def _design_form(model: InjectorModel, f: np.ndarray) -> np.ndarray:
    """The textbook closed-loop form (gain·T/(1+T), output resistance Ro/(1+T)): −(Rf/Zin)·T/(1+T), then Zpin/(Zpin + Ro/(1+T))."""
    v = model.values
    s = 2j * np.pi * f
    zin = model.generator.source_resistance + v.input_resistor + 1 / (s * v.coupling_capacitor)
    beta = zin / (zin + v.feedback_resistor)
    t = model.open_loop_gain(f) * beta
    zpin = model.pin_impedance(f)
    zout = v.opamp.output_resistance / (1 + t)
    return -(v.feedback_resistor / zin) * t / (1 + t) * zpin / (zpin + zout)


def test_exact_form_reduces_to_design_form() -> None:
    """With Ro = 0 the exact form equals the textbook form; with Ro = 2 Ω the dropped terms
    (Ro/(Zin+Rf) against 1+T, Ro/Rf against A) stay below 0.05 dB up to 10 MHz."""
    f = np.logspace(0, 7, 200)
    exact = model_of(field_example())
    assert np.allclose(exact.ac_gain(f), _design_form(exact, f), rtol=1e-12)
    loaded = model_of(demo_like())
    ratio_db = 20 * np.log10(np.abs(loaded.ac_gain(f) / _design_form(loaded, f)))
    assert np.max(np.abs(ratio_db)) < 0.05
    assert np.max(np.abs(ratio_db)) > 0  # the exact form is not the approximation


def test_output_impedance_limits() -> None:
    """Zout = Ro/(1+A0·beta) at low frequency; Ro at frequencies far above GBW; 0 when Ro = 0."""
    model = model_of(demo_like())
    beta_mid = 1050 / 2050
    assert abs(complex(model.output_impedance(1e3))) == pytest.approx(
        2.0 / abs(1 + complex(model.open_loop_gain(1e3)) * beta_mid), rel=1e-3
    )
    assert abs(complex(model.output_impedance(1e10))) == pytest.approx(2.0, rel=1e-3)
    assert abs(complex(model_of(field_example()).output_impedance(1e3))) == 0.0


# -- against an independent nodal analysis of the netlist -----------------------------------
def _nodal(case: tuple, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    pairs = [injector_gains(*case, float(x)) for x in f]
    return np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])


@pytest.mark.parametrize("name", sorted(CASES))
def test_closed_form_and_polynomials_match_nodal_analysis(name: str) -> None:
    """The closed form, and scipy.signal.freqs on the multiplied-out polynomials, against a
    modified nodal analysis of the same netlist written in tests/nodal_ref.py (Ho, Ruehli
    and Brennan, IEEE Trans. CAS-22(6), 1975), 1 Hz to 100 MHz."""
    case = CASES[name]
    model = model_of(case)
    f = np.logspace(0, 8, 81)
    ac_ref, dc_ref = _nodal(case, f)
    assert np.allclose(model.ac_gain(f), ac_ref, rtol=1e-9, atol=0)
    assert np.allclose(model.dc_gain(f), dc_ref, rtol=1e-9, atol=0)
    polys = model.transfer_polynomials()
    _, h_ac = signal.freqs(*polys["ac"], worN=2 * np.pi * f)
    _, h_dc = signal.freqs(*polys["dc"], worN=2 * np.pi * f)
    assert np.allclose(h_ac, ac_ref, rtol=1e-9, atol=0)
    assert np.allclose(h_dc, dc_ref, rtol=1e-9, atol=0)


@settings(max_examples=40, deadline=None)
@given(
    rin=st.floats(100, 1e5),
    rf=st.floats(100, 1e5),
    cc=st.floats(1e-7, 1e-4),
    ro=st.one_of(st.just(0.0), st.floats(1e-3, 50)),  # 0 or a physical resistance
    cpin=st.floats(1e-9, 1e-4),
    esr=st.floats(0, 1),
    a0_db=st.floats(60, 140),
    gbw=st.floats(1e5, 1e8),
    load=st.one_of(st.none(), st.floats(1, 1e4)),
)
def test_rational_form_any_values(rin, rf, cc, ro, cpin, esr, a0_db, gbw, load) -> None:
    """Property: the closed form and scipy.signal.freqs of the polynomial form agree with
    the nodal analysis of tests/nodal_ref.py for any component values."""
    values = InjectorValues(
        input_resistor=rin,
        coupling_capacitor=cc,
        feedback_resistor=rf,
        bias_resistor=1e4,
        bias_capacitor=1e-5,
        opamp=opamp(open_loop_gain=10 ** (a0_db / 20), gain_bandwidth=gbw, output_resistance=ro),
    )
    pin = PinLoad(capacitance=cpin, capacitor_esr=esr, load_resistance=load)
    model = InjectorModel(values, generator(), pin)
    f = np.logspace(0, 8, 17)
    ac_ref, _ = _nodal((values, generator(), pin), f)
    num, den = model.transfer_polynomials()["ac"]
    _, h = signal.freqs(num, den, worN=2 * np.pi * f)
    assert np.allclose(h, ac_ref, rtol=1e-7, atol=0)
    assert np.allclose(model.ac_gain(f), ac_ref, rtol=1e-7, atol=0)


def test_slowest_time_constant_is_the_bias_filter() -> None:
    """From the network's poles: the slowest is Rb·Cb = 0.1 s for the worked example."""
    corners = model_of(field_example()).corners()
    assert corners.slowest_time_constant_s == pytest.approx(0.1, rel=1e-3)


# -- set-points --------------------------------------------------------------------------------
def test_generator_setting_puts_the_target_on_the_pin() -> None:
    """In "50 ohm" mode the EMF is twice the displayed amplitude (common practice): the
    displayed Vpp/2 × 2 × |V_pin/V_emf| from the nodal analysis is the target (peak)."""
    case = demo_like()
    model = model_of(case)
    f = np.logspace(1, 6, 21)
    setting = model.generator_setting_pp(f, 0.05)
    ac_ref, _ = _nodal(case, f)
    assert np.allclose(setting / 2 * 2.0 * np.abs(ac_ref), 0.05, rtol=1e-9)
    assert isinstance(float(model.generator_setting_pp(1e3, 0.05)), float)


def test_supply_setting_gives_the_pin_level() -> None:
    """The set-point that puts 5 V on the pin, fed back through H_dc(0) and the load drop."""
    model = model_of(CASES["high-gain-resistive"])  # resistive load: its drop is in H_dc(0)
    supply = float(model.supply_setting(5.0))
    assert supply * abs(complex(model.dc_gain(0.0))) == pytest.approx(5.0, rel=1e-12)


# -- feasibility -------------------------------------------------------------------------------
DEVICE = SimpleNamespace(absolute_max_v=6.0, min_operating_v=3.6, max_load_current=0.5)


def demo_model() -> InjectorModel:
    bench = load_bench(None)
    return InjectorModel(bench.injector, bench.generator, bench.pin)


def test_demo_bench_refuses_two_volts_at_five_megahertz() -> None:
    """2 Vpp at 5 MHz is beyond the demo injector (10 V/µs: FPBW at 1 Vpk is 1.6 MHz,
    Horowitz & Hill); feasible demo points (100 mVpp, 100 Hz-100 kHz at 5 V) pass."""
    model = demo_model()
    result = model.feasibility(
        [5e6, 100.0, 1e3, 10e3, 100e3], [1.0, 0.05, 0.05, 0.05, 0.05], 4.5, device=DEVICE
    )
    assert list(result.verdict) == ["refused", "ok", "ok", "ok", "ok"]
    codes = dict(result.reasons(0))
    assert codes["slew-rate"] == "refused"
    assert any("slew rate" in text for text in result.messages(0))


def _bare_model(**opamp_changes: float) -> InjectorModel:
    values, gen, _ = field_example()
    values = dataclasses.replace(values, opamp=opamp(current_limit=100.0, **opamp_changes))
    return InjectorModel(values, gen, PinLoad(capacitance=1e-12))


def test_slew_limit_at_full_power_bandwidth() -> None:
    """Horowitz & Hill FPBW: 0.5 Vpk refused just above 3.18 MHz, not at 0.7x of it."""
    model = _bare_model(gain_bandwidth=1e9, output_high=20.0)
    fpbw = model.full_power_bandwidth(0.5)
    result = model.feasibility([1.05 * fpbw, 0.7 * fpbw], 0.5, 5.0)
    assert result.refused_bits[0] & REASON_BIT["slew-rate"]
    assert not (result.refused_bits[1] | result.marginal_bits[1]) & REASON_BIT["slew-rate"]
    near = model.feasibility(0.9 * fpbw, 0.5, 5.0)
    assert near.marginal_bits[0] & REASON_BIT["slew-rate"]


def test_device_limits_and_output_swing() -> None:
    """Vdc + Vpk above the absolute maximum, Vdc − Vpk below the minimum operating level,
    and DC ± ripple outside the op-amp's swing are refused (common practice)."""
    model = demo_model()
    result = model.feasibility(1e3, [0.1, 0.1, 0.1], [5.95, 3.65, 5.0], device=DEVICE)
    assert result.refused_bits[0] & REASON_BIT["device-absolute-max"]
    assert result.refused_bits[1] & REASON_BIT["device-min-operating"]
    assert result.verdict[2] == "ok"
    swing = model.feasibility(1e3, 0.2, 11.4)
    assert swing.refused_bits[0] & REASON_BIT["output-swing"]


def test_output_current_limit() -> None:
    """DC load + ripple current into the pin capacitance over the op-amp's limit is refused."""
    model = demo_model()  # 600 mA limit, 1 µF pin, 50 mA DC
    result = model.feasibility([10e3, 300e3], 0.3, 5.0, load_current=[0.59, 0.05])
    assert result.refused_bits[0] & REASON_BIT["output-current"]  # 0.59 A DC + 19 mA ripple
    # ripple current = V / |ESR + 1/(jωC)| (Ohm's law on the pin capacitor, 0.5 Ω ESR)
    z_pin = abs(0.5 + 1 / (2j * np.pi * 300e3 * 1e-6))
    assert result.output_current_peak[1] > 0.05 + 0.3 / z_pin * 0.9


def test_generator_range() -> None:
    """Near the coupling high-pass corner the generator runs out of amplitude; above its
    highest frequency a point is refused; below its smallest amplitude too."""
    model = demo_model()
    result = model.feasibility([0.05, 25e6, 1e3], [1.0, 0.001, 0.0005], 5.0)
    assert result.refused_bits[0] & REASON_BIT["generator-amplitude-high"]
    assert result.refused_bits[1] & REASON_BIT["generator-frequency"]
    assert result.refused_bits[2] & REASON_BIT["generator-amplitude-low"]


def test_usable_band_flags_are_marginal() -> None:
    """Below the high-pass corner (|H| more than 3 dB off) a point is marginal, not refused."""
    model = demo_model()
    result = model.feasibility([5.0, 1e3], 0.01, 5.0)
    assert result.verdict[0] == "marginal"
    assert dict(result.reasons(0))["outside-usable-band"] == "marginal"
    lo, hi = model.corners().usable_band
    assert lo == pytest.approx(15.2, rel=0.05) and 1e3 < hi < 1e7


def test_capacitive_load_peaking_is_reported() -> None:
    """Ro·Cpin inside the loop (a capacitive load inside an op-amp loop, common practice) costs phase margin: 2 Ω into
    1 µF with a low-ESR capacitor puts a pole near 80 kHz in a 5 MHz loop; peaking shows
    in the corners. The demo board's 0.5 Ω ESR adds a zero that restores the margin."""

    demo = demo_model()
    opamp = dataclasses.replace(demo.values.opamp, output_resistance=2.0)
    stiff = InjectorModel(
        dataclasses.replace(demo.values, opamp=opamp),
        demo.generator,
        dataclasses.replace(demo.pin, capacitor_esr=0.02),
    )
    corners = stiff.corners()
    assert corners.phase_margin_deg < 45 and corners.peaking_db > 3
    assert 1e5 < corners.peak_hz < 2e6
    damped = demo.corners()
    assert damped.phase_margin_deg > 60 and damped.peaking_db < 1


def test_invalid_points_and_vectors() -> None:
    """Non-positive frequency or ripple is refused; 10,000 points give 10,000 verdicts."""
    model = demo_model()
    result = model.feasibility([0.0, 1e3], [0.05, -1.0], 5.0)
    assert list(result.verdict) == ["refused", "refused"]
    many = model.feasibility(np.logspace(1, 6, 10_000), 0.05, 5.0, device=DEVICE)
    assert len(many) == 10_000 and many.verdict.shape == (10_000,)


def test_supply_overvoltage_protection() -> None:
    """A DC set-point at the supply's over-voltage protection would trip it (common practice:
    set over-voltage limits before any output turns on): refused when checked."""
    model = demo_model()
    result = model.feasibility(1e3, 0.05, [6.6, 5.0], supply_protection_v=6.5)
    assert result.refused_bits[0] & REASON_BIT["supply-overvoltage"]
    assert result.verdict[1] == "ok"
    assert "over-voltage" in " ".join(result.messages(0))
