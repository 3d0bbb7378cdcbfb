"""The settle rule: waits after a change of the generator, from the injector's natural modes.

References: scipy.signal.residue (partial fractions of a rational H(s)); scipy.signal.tf2ss
and scipy.linalg.expm (the state-space free response e^{At}·x0). That switching a sine on
from rest leaves, beside the periodic response, the free response from minus the periodic
state at the switching instant is the superposition of zero-state and zero-input responses
of a linear system (Ogata, Modern Control Engineering, 5th ed., §9-6 on the solution of the
state equation x(t) = e^{At}x(0) + ∫e^{A(t−τ)}Bu(τ)dτ).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
import scipy.signal

from benchseq.bench import load_bench
from benchseq.injector import InjectorModel
from benchseq.plan import SettleRule
from benchseq.settling import NaturalModes, Settling, previous_in

TARGET_DB = 0.1
PHASES = np.linspace(0.0, 2 * math.pi, 72, endpoint=False)


def _model() -> InjectorModel:
    bench = load_bench(None)  # the demo board: Rg·Cc ≈ 10.5 ms, Rb·Cb = 0.1 s
    return InjectorModel(bench.injector, bench.generator, bench.pin)


def _switch_on_transient(
    model: InjectorModel, f: float, emf: float, t: float, highpass_hz: float = 0.0
) -> np.ndarray:
    """Pin transient at time t after EMF·cos(ωt + φ) is switched on from rest, for each φ
    in PHASES: the free response C·e^{At}·(−x_periodic(0)) of scipy's state-space form.
    With ``highpass_hz``, as read through a single-pole AC coupling s/(s + ω_c) (an RC
    high-pass, common practice for a scope's AC coupling)."""
    num, den = model.transfer_polynomials()["ac"]
    if highpass_hz:
        num = np.convolve(num, [1.0, 0.0])
        den = np.convolve(den, [1.0, 2 * math.pi * highpass_hz])
    a, b, c, _ = scipy.signal.tf2ss(num, den)
    w = 2 * math.pi * f
    periodic = np.linalg.solve(1j * w * np.eye(a.shape[0]) - a, b[:, 0])  # per unit phasor
    x0 = -np.real(np.outer(periodic, emf * np.exp(1j * PHASES)))
    return (c @ scipy.linalg.expm(a * t) @ x0)[0]


def test_modes_are_the_partial_fractions_of_h() -> None:
    model = _model()
    num, den = model.transfer_polynomials()["ac"]
    residues, poles, _ = scipy.signal.residue(num, den)
    modes = NaturalModes.of(model)
    order = np.argsort(poles.real)
    mine = np.argsort(modes.poles.real)
    assert modes.poles[mine] == pytest.approx(poles[order], rel=1e-9)
    assert modes.residues[mine] == pytest.approx(residues[order], rel=1e-6)


@pytest.mark.parametrize("highpass_hz", [0.0, 9.6])
@pytest.mark.parametrize("f", [10.0, 100.0, 1e3, 10e3])
def test_wait_is_where_the_worst_phase_falls_under_the_allowance(
    f: float, highpass_hz: float
) -> None:
    """A switch-on (generator off before): at the wait the transient is under a tenth of
    the target uncertainty of the pin ripple (as the channel reads it) for every switching
    phase; a little earlier some phase is still over it (the bound is tight, not padded)."""
    model = _model()
    settling = Settling(SettleRule(), model, TARGET_DB).reading_through(highpass_hz)
    pin = 0.05  # V peak at the pin
    emf = float(settling.emf_for(f, pin))
    wait = float(settling.change(f, 0.0, f, emf, pin))
    read = pin / math.sqrt(1 + (highpass_hz / f) ** 2)
    allowed = 0.1 * (10 ** (TARGET_DB / 20) - 1) * read
    assert wait > 0
    ringing = _switch_on_transient(model, f, emf, wait, highpass_hz)
    assert np.max(np.abs(ringing)) <= allowed * (1 + 1e-6)
    for later in (1.3, 2.0):  # and it stays under: the modes only decay from there
        assert (
            np.max(np.abs(_switch_on_transient(model, f, emf, later * wait, highpass_hz)))
            <= allowed
        )
    if not highpass_hz:  # one slow mode: the bound is tight, not padded
        earlier = _switch_on_transient(model, f, emf, 0.9 * wait)
        assert np.max(np.abs(earlier)) > allowed
    # through the coupling two slow modes of opposite residues partly cancel, which the
    # bound (a sum of magnitudes) does not count on: it is safe there, up to ~3x long


def test_waits_fall_with_frequency_and_with_a_smaller_step() -> None:
    """The coupling mode's residue for a sine at f falls as 1/f; a trim (a small amplitude
    step, phase running on) needs less than a switch-on; the old rule is kept on request."""
    model = _model()
    settling = Settling(SettleRule(), model, TARGET_DB)
    f = np.array([10.0, 100.0, 1e3, 10e3, 100e3, 1e6])
    emf = settling.emf_for(f, 0.05)
    waits = settling.change(f, emf, f, emf, 0.05)
    assert np.all(np.diff(waits) < 0)
    trim = settling.trim(100.0, emf[1], 1.02 * emf[1], 0.05)
    assert 0 < float(trim) < float(waits[1])
    assert float(settling.switch_off(100.0, emf[1], 0.05)) < float(waits[1])
    fixed = Settling(SettleRule(fixed_s=0.2), model, TARGET_DB).change(f, emf, f, emf, 0.05)
    assert np.all(fixed >= 0.2)
    old = Settling(SettleRule(time_constants=6, rule="time-constants"), model, TARGET_DB)
    assert old.change(f, emf, f, emf, 0.05) == pytest.approx(np.full(f.size, 6 * 0.1), rel=1e-6)


def test_planned_waits_follow_the_run_order() -> None:
    model = _model()
    settling = Settling(SettleRule(), model, TARGET_DB)
    f = np.array([1e3, 10.0, 1e3])
    pin = np.full(3, 0.05)
    order = [2, 0, 1]
    previous = previous_in(order, 3)
    assert previous.tolist() == [2, 0, -1]
    waits = settling.planned(f, pin, previous)
    emf = settling.emf_for(f, pin)
    assert waits[2] == pytest.approx(float(settling.change(1e3, 0.0, 1e3, emf[2], 0.05)))
    assert waits[1] == pytest.approx(float(settling.change(1e3, emf[0], 10.0, emf[1], 0.05)))


def test_dc_step_wait_against_scipy_step_response() -> None:
    """After a 1 V step of the set-point supply, the pin's DC (H_dc's step response from
    scipy's state-space form: y = C·A⁻¹(e^{At} − I)·B + D, Ogata §9-6) is within the
    allowance of its final value at the wait, and not yet at 0.9 x it."""
    model = _model()
    settling = Settling(SettleRule(), model, TARGET_DB)
    wait = float(settling.dc_step(1.0, 0.05))
    num, den = model.transfer_polynomials()["dc"]
    final = np.polyval(num, 0.0) / np.polyval(den, 0.0)
    allowed = 0.1 * (10 ** (TARGET_DB / 20) - 1) * 0.05
    a, b, c, d = scipy.signal.tf2ss(num, den)

    def step(t: float) -> float:
        x = np.linalg.solve(a, (scipy.linalg.expm(a * t) - np.eye(a.shape[0])) @ b)
        return float((c @ x + d)[0, 0])

    y = [step(t) for t in (0.0, 0.9 * wait, wait, 2 * wait)]
    assert abs(y[2] - final) <= allowed * (1 + 1e-6)
    assert abs(y[3] - final) <= allowed
    assert abs(y[1] - final) > allowed
    old = Settling(SettleRule(rule="time-constants"), model, TARGET_DB)
    assert float(old.dc_step(1.0, 0.05)) == pytest.approx(7 * 10e3 * 10e-6)
