"""End to end through real pyvisa-py TCP to the simulated bench's server on 127.0.0.1:
open a session from the served bench file, identify, configure, acquire, and check the
volts against the simulator's own truth; then the same with injected faults, where every
answer is either right or a specific instrument error, never a wrong number.

The reference for the amplitude check is an ordinary least-squares sine fit done here
with numpy (design matrix [cos ωt, sin ωt, 1], IEEE Std 1057 three-parameter fit), not
benchseq.analysis, so the drivers are checked independently of the analysis code.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from fakebench import first_opened, time_bound

from benchseq.bench import parse_bench
from benchseq.drivers.errors import InstrumentError
from benchseq.drivers.session import open_session
from benchseq.sim import faults as faults_module
from benchseq.sim import server as server_module
from benchseq.tomlfile import parse_toml_text

bounded = time_bound(30)  # no test here may take longer, whatever the transport does


def _served_bench(running, timeout_s: float | None = None):
    text = running.bench_text
    bench = parse_bench(parse_toml_text(text, "served bench")[1], "served bench", text)
    if timeout_s is not None:
        specs = {
            r: dataclasses.replace(s, timeout_s=timeout_s) for r, s in bench.instruments.items()
        }
        bench = dataclasses.replace(bench, instruments=specs)
    return bench


def _fit(volts: np.ndarray, interval: float, frequency: float) -> complex:
    """Peak phasor a - jb of a·cos ωt + b·sin ωt + c by least squares (numpy.linalg.lstsq)."""
    t = np.arange(len(volts)) * interval
    w = 2 * np.pi * frequency
    design = np.column_stack([np.cos(w * t), np.sin(w * t), np.ones_like(t)])
    (a, b, _), *_ = np.linalg.lstsq(design, volts, rcond=None)
    return complex(a, -b)


def _power_up(session, frequency: float = 1000.0) -> float:
    bench = session.bench
    gen, sup, scope = session.generator, session.supply, session.scope
    gen.output(False)
    gen.set_load_mode(bench.generator.load_mode)
    sup.set_current_limit(bench.supply.current_limit)
    sup.set_overvoltage_protection(bench.supply.overvoltage_protection)
    sup.set_voltage(5.0)
    sup.output(True)
    gen.set_sine(frequency, 0.1, 0.0)
    gen.output(True)
    scope.trigger_external()
    actual = gen.set_frequency(frequency)
    # Settle: ~10 bias-filter time constants (Rb·Cb) of capture, which also advances the
    # simulator's clock (the truth is the settled state; common practice: wait 5-7 time constants, e^-5 = 0.7 %).
    settle = 10.0 * bench.injector.bias_resistor * bench.injector.bias_capacitor
    scope.set_timebase(1e-5, round(settle / 1e-5))
    scope.acquire(settle)
    return actual


def test_identify_configure_acquire_and_volts_match_the_simulator_truth():
    with server_module.serve("demo", seed=3) as running:
        session = open_session(_served_bench(running))
        try:
            assert set(session.identities) == set(running.addresses)
            assert all(session.identities.values())
            assert session.scope.transport.uses_socket  # the fast socket path is in use
            frequency = _power_up(session)
            scope = session.scope
            pin = session.bench.scope.pin
            scope.configure_channel(
                pin.channel, 0.4, 0.0, pin.coupling, session.bench.scope.bandwidth_limit
            )
            interval, length = scope.set_timebase(1e-6, 100_000)
            scope.set_averages(1)
            scope.acquire(length * interval + scope.capabilities.rearm_time)
            wave = scope.read_waveform(pin.channel)
            assert len(wave.codes) == length and wave.probe == pin.probe
            truth = running.simulator.truth()
            measured = _fit(wave.volts(), wave.sample_interval, frequency)
            # 8-bit scope with noise and channel error: agree within 3 % and 3 degrees.
            assert abs(measured) == pytest.approx(abs(truth.pin_ripple), rel=0.03)
            assert np.degrees(abs(np.angle(measured / truth.pin_ripple))) < 3.0
            steps = session.safe_state()
            assert steps[0].startswith("generator: output off, verified")
            assert not running.simulator.truth().generator_on
        finally:
            session.close()


def test_injected_faults_give_right_answers_or_specific_errors_never_wrong_numbers():
    rates = {
        "generator": faults_module.FaultRates(garbage=0.08, no_reply=0.04),
        "scope": faults_module.FaultRates(truncated_block=0.25, garbage=0.05),
    }
    with server_module.serve("demo", seed=5, faults=rates) as running:
        bench = _served_bench(running, timeout_s=0.3)
        session = first_opened(lambda _: open_session(bench))  # opening may meet a fault
        assert session is not None
        right = errors = 0
        try:
            for k in range(12):
                want = 1000.0 + 10.0 * k
                try:
                    got = session.generator.set_frequency(want)
                    assert got == pytest.approx(want, rel=1e-9)
                    right += 1
                except InstrumentError:
                    errors += 1
            scope = session.scope
            for _ in range(5):  # power up through the faults, then let the injector settle
                # (captures follow no frequency step: the truth is the settled phasor)
                try:
                    _power_up(session)
                    break
                except InstrumentError:
                    session.recover()
            assert running.simulator.truth().generator_on
            pin = bench.scope.pin
            for _ in range(4):
                try:
                    frequency = session.generator.set_frequency(1000.0)
                    scope.configure_channel(pin.channel, 0.4, 0.0, pin.coupling, None)
                    interval, length = scope.set_timebase(1e-6, 20_000)
                    scope.acquire(length * interval)
                    wave = scope.read_waveform(pin.channel)
                except InstrumentError:
                    errors += 1
                    continue
                truth = running.simulator.truth()
                assert abs(_fit(wave.volts(), wave.sample_interval, frequency)) == pytest.approx(
                    abs(truth.pin_ripple), rel=0.05
                )
                right += 1
        finally:
            session.safe_state()
            session.close()
        assert right >= 8  # retries and recovery carry most calls through the faults
