"""Component sets shared by the injector tests (invented values)."""

from __future__ import annotations

from benchseq.bench import GeneratorSetup, InjectorValues, OpAmp, PinLoad


def generator(load_mode: str = "50 ohm", source_resistance: float = 50.0) -> GeneratorSetup:
    return GeneratorSetup(
        load_mode=load_mode,
        source_resistance=source_resistance,
        max_amplitude_pp=10.0,
        min_amplitude_pp=2e-3,
        max_frequency=20e6,
    )


def opamp(**changes: float) -> OpAmp:
    values = dict(
        open_loop_gain=1e5,
        gain_bandwidth=10e6,
        slew_rate=10e6,
        output_resistance=0.0,
        current_limit=0.6,
        output_low=0.3,
        output_high=11.5,
    )
    values.update(changes)
    return OpAmp(**values)  # type: ignore[arg-type]


def field_example(output_resistance: float = 0.0) -> tuple[InjectorValues, GeneratorSetup, PinLoad]:
    """A worked injector example (values invented here; corners computed by hand from the
    inverting-amplifier and RC formulas): Rin = Rf = 1 kΩ, Cc = 10 µF, Rs = 50 Ω,
    Rb = 10 kΩ, Cb = 10 µF, GBW 10 MHz, SR 10 V/µs (A0 = 100 dB, our choice)."""
    values = InjectorValues(
        input_resistor=1e3,
        coupling_capacitor=10e-6,
        feedback_resistor=1e3,
        bias_resistor=10e3,
        bias_capacitor=10e-6,
        opamp=opamp(output_resistance=output_resistance),
    )
    return values, generator(), PinLoad(capacitance=1e-6, load_current=0.05)


def demo_like() -> tuple[InjectorValues, GeneratorSetup, PinLoad]:
    """The demo bench's board: Ro = 2 Ω into 1 µF with 20 mΩ ESR and a 50 mA sink."""
    values, gen, _ = field_example(output_resistance=2.0)
    return values, gen, PinLoad(capacitance=1e-6, capacitor_esr=0.02, load_current=0.05)


def high_gain_resistive() -> tuple[InjectorValues, GeneratorSetup, PinLoad]:
    """Gain of −5 from a high-Z generator, a faster op-amp with 25 Ω out, a resistive load."""
    values = InjectorValues(
        input_resistor=2e3,
        coupling_capacitor=22e-6,
        feedback_resistor=10e3,
        bias_resistor=4.7e3,
        bias_capacitor=47e-6,
        opamp=opamp(open_loop_gain=3e4, gain_bandwidth=50e6, output_resistance=25.0),
    )
    pin = PinLoad(capacitance=10e-6, capacitor_esr=0.1, load_resistance=33.0)
    return values, generator("high-z", 0.0), pin


def low_gain_opamp() -> tuple[InjectorValues, GeneratorSetup, PinLoad]:
    """A0 of only 60 dB and 1 MHz GBW: the finite-gain terms matter at every frequency."""
    values = InjectorValues(
        input_resistor=470.0,
        coupling_capacitor=4.7e-6,
        feedback_resistor=2.2e3,
        bias_resistor=22e3,
        bias_capacitor=1e-6,
        opamp=opamp(open_loop_gain=1e3, gain_bandwidth=1e6, output_resistance=8.0),
    )
    pin = PinLoad(capacitance=100e-9, capacitor_esr=0.5, load_resistance=1e3)
    return values, generator("50 ohm", 600.0), pin


CASES = {
    "field-example": field_example(),
    "demo-like": demo_like(),
    "high-gain-resistive": high_gain_resistive(),
    "low-gain-opamp": low_gain_opamp(),
}
