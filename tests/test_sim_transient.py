"""The simulated injector's transient after generator changes (sim/transient.py).

Reference: the free response C·e^{At}·Δx(0) of scipy's state-space form (scipy.signal.tf2ss,
scipy.linalg.expm) of the injector's transfer function, with Δx(0) the old periodic state
minus the new one at the switching instant (superposition of zero-input and zero-state
responses: Ogata, Modern Control Engineering, 5th ed., §9-6). The transfer function is the
closed form whose frequency response tests/test_injector_ngspice.py checks against ngspice,
evaluated at the simulated board's true component values."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.signal

from benchseq.bench import load_bench
from benchseq.injector import InjectorModel
from benchseq.sim.transient import InjectorTransient
from benchseq.sim.world import SimulatedBench


def _true_model(sim: SimulatedBench) -> InjectorModel:
    c, bench = sim.circuit, load_bench(None)
    opamp = dataclasses.replace(
        bench.injector.opamp,
        open_loop_gain=c.open_loop_gain,
        gain_bandwidth=c.gain_bandwidth,
        output_resistance=c.output_resistance,
    )
    injector = dataclasses.replace(
        bench.injector,
        input_resistor=c.input_resistor,
        coupling_capacitor=c.coupling_capacitor,
        feedback_resistor=c.feedback_resistor,
        bias_resistor=c.bias_resistor,
        bias_capacitor=c.bias_capacitor,
        opamp=opamp,
    )
    generator = dataclasses.replace(bench.generator, source_resistance=c.source_resistance)
    pin = dataclasses.replace(
        bench.pin,
        capacitance=c.pin_capacitance,
        capacitor_esr=c.pin_capacitor_esr,
        load_resistance=c.pin_load_resistance,
    )
    return InjectorModel(injector, generator, pin)


def _reference(model: InjectorModel, changes: list[tuple[float, float, float]], t: float) -> float:
    """Pin transient at time t for a list of (time, frequency, EMF peak) changes from rest,
    the generator's phase running on (phase 0 at time 0)."""
    num, den = model.transfer_polynomials()["ac"]
    a, b, c, _ = scipy.signal.tf2ss(num, den)
    eye = np.eye(a.shape[0])

    def periodic(f: float, emf: float, phase: float) -> np.ndarray:
        if emf == 0:
            return np.zeros(a.shape[0])
        x = np.linalg.solve(2j * math.pi * f * eye - a, b[:, 0]) * emf
        return np.real(x * np.exp(1j * phase))

    state = np.zeros(a.shape[0])  # the transient's state
    phase, f_now, emf_now, t_now = 0.0, 0.0, 0.0, 0.0
    for when, f, emf in changes:
        state = scipy.linalg.expm(a * (when - t_now)) @ state
        phase += 2 * math.pi * f_now * (when - t_now)
        state = state + periodic(f_now, emf_now, phase) - periodic(f, emf, phase)
        f_now, emf_now, t_now = f, emf, when
    return float((c @ scipy.linalg.expm(a * (t - t_now)) @ state)[0])


def test_transient_after_switch_on_and_frequency_change_matches_state_space() -> None:
    sim = SimulatedBench.from_scenario("demo")
    model = _true_model(sim)
    changes = [(0.0, 200.0, 0.1), (0.0123, 1e3, 0.05), (0.02, 1e3, 0.06)]
    ringing = InjectorTransient(sim.circuit)
    for when, f, emf in changes:
        ringing.change(when, f, emf)
    scale = 0.05
    for t in (0.02, 0.0201, 0.025, 0.04, 0.08):
        mine = float(np.real(np.sum(ringing.pin_modes(t))))
        assert mine == pytest.approx(_reference(model, changes, t), abs=1e-9 * scale), t
    assert abs(float(np.real(np.sum(ringing.pin_modes(0.021))))) > 1e-3 * scale  # it rings


def test_records_show_the_transient_only_before_it_has_decayed() -> None:
    """A DC-coupled pin record right after switching on differs from the settled one by the
    decaying transient; 20 coupling time constants later it does not."""
    sim = SimulatedBench.from_scenario("demo")
    sim.transient = InjectorTransient(sim.circuit)  # the scenario key injector_transients
    sim.handler("supply").handle("SOUR1:VOLT 5;CURR 0.1;:OUTP1 ON")
    sim.clock.sleep(1.5)
    sim.handler("generator").handle("SOUR1:FUNC SIN;FREQ 100;VOLT 0.1;:OUTP1:LOAD 50;:OUTP1 ON")
    early = sim.node_signal("pin")
    assert early.mode_amplitudes.size and np.max(np.abs(early.mode_amplitudes)) > 1e-3
    sim.clock.sleep(20 * 0.0105)
    late = sim.node_signal("pin")
    assert late.mode_amplitudes.size == 0 or np.max(np.abs(late.mode_amplitudes)) < 1e-9
