"""Bench sessions on recorded conversations: opening (identify, clear status, nothing
switched on), the safe state on fresh connections in the order generator, load, supply
(common practice: generator off, then electronic load, then DC supply),
and recovery that keeps the safe state."""

from __future__ import annotations

import dataclasses

import pytest
from fakebench import OK, Connector, FakeClock, first_opened

from benchseq.bench import InstrumentSpec, LoadSetup, load_bench
from benchseq.drivers.errors import ConnectionLost
from benchseq.drivers.replay import CLOSE, RECONNECT, Conversation
from benchseq.drivers.session import MonotonicClock, assemble_session

ROLES = ("generator", "supply", "scope", "load")


def _bench(safe_level: float = 0.0):
    bench = load_bench("sim")
    load = InstrumentSpec("load", "SIM::load", "scpi-load", None, 1, 5.0)
    return dataclasses.replace(
        bench,
        instruments={**bench.instruments, "load": load},
        load=LoadSetup(max_current=1.0),
        supply=dataclasses.replace(bench.supply, safe_level=safe_level),
    )


def _opening(conv: Conversation) -> None:
    for role in ROLES:
        conv.add(
            f"{role}#1",
            [("*IDN?", f"Fernhollow,{role.upper()}-1,0001,1.0"), ("*CLS", None), OK],
        )


def _open(conv: Conversation, fail: set[str] = frozenset(), safe_level: float = 0.0):
    _opening(conv)
    return assemble_session(_bench(safe_level), Connector(conv, fail), FakeClock())


def _switched_off(conv: Conversation, resource: str, off: str, query: str, reads: str = "0"):
    """The safe state on a fresh connection: switch off, read back, ask again, close."""
    conv.add(resource, [(off, None), OK, (query, "0"), (query, reads), (CLOSE, None)])


def _supply_made_safe(conv: Conversation, resource: str, level: str = "0") -> None:
    """The supply's output off (read back twice), then its set-point to the safe level."""
    conv.add(resource, [("OUTP1 OFF", None), OK, ("OUTP1?", "0"), ("OUTP1?", "0")])
    conv.add(resource, [(f"SOUR1:VOLT {level}", None), OK, ("SOUR1:VOLT?", level), (CLOSE, None)])


def _made_safe(conv: Conversation, generator_reads: str = "0") -> None:
    """Generator off, load input off, supply output off and then to its 0 V safe level."""
    _switched_off(conv, "generator#2", "OUTP1 OFF", "OUTP1?", generator_reads)
    _switched_off(conv, "load#2", "INP1 OFF", "INP1?")
    _supply_made_safe(conv, "supply#2")


def test_opening_identifies_and_clears_every_instrument_and_switches_nothing_on():
    conv = Conversation()
    session = _open(conv)
    conv.assert_done()
    assert session.identities["scope"] == "Fernhollow,SCOPE-1,0001,1.0"
    assert set(session.identities) == set(ROLES)
    assert not any("ON" in sent for _, sent in conv.sent)


def test_safe_state_on_fresh_connections_in_order_and_recovery_keeps_it():
    conv = Conversation()
    session = _open(conv)
    conv.add("generator#1", [("OUTP1 ON", None), OK, ("OUTP1?", "1")])
    session.generator.output(True)
    _made_safe(conv)
    steps = session.safe_state()
    assert [s.split(":")[0] for s in steps] == ["generator", "load", "supply"]
    assert all("verified" in s and "fresh connection" in s for s in steps)
    # A later recovery re-applies the OFF state, never the ON it had before.
    conv.add("generator#1", [(RECONNECT, None), ("OUTP1 OFF", None), OK, ("OUTP1?", "0")])
    # (outputs being switched off are restored first, levels after them)
    conv.add("supply#1", [(RECONNECT, None), ("OUTP1 OFF", None), OK, ("OUTP1?", "0")])
    conv.add("supply#1", [("SOUR1:VOLT 0", None), OK, ("SOUR1:VOLT?", "0")])
    conv.add("scope#1", [(RECONNECT, None)])
    conv.add("load#1", [(RECONNECT, None), ("INP1 OFF", None), OK, ("INP1?", "0")])
    session.recover()
    conv.add("generator#1", [(CLOSE, None)]).add("supply#1", [(CLOSE, None)])
    conv.add("scope#1", [(CLOSE, None)]).add("load#1", [(CLOSE, None)])
    session.close()
    conv.assert_done()


def test_safe_state_goes_on_when_one_instrument_fails_and_says_so():
    """The generator refuses a fresh connection and its old one is dead too: the load and
    the supply are still made safe, and the report says the generator FAILED."""
    conv = Conversation()
    session = _open(conv, fail={"generator"}, safe_level=1.0)
    conv.add("generator#1", [(RECONNECT, ConnectionLost("generator#1", "", "refused"))])
    _switched_off(conv, "load#2", "INP1 OFF", "INP1?")
    _supply_made_safe(conv, "supply#2", "1")
    report = session.safe_state(patience_s=0.0)  # one round: no retries to script
    steps = report.steps
    assert report.not_safe and report.not_safe[0].startswith("generator:")
    assert steps[0].startswith("generator: FAILED")
    assert steps[1].startswith("load: input off")
    assert "safe level 1 V" in steps[2]
    conv.assert_done()


def test_safe_state_reports_an_output_that_stays_on():
    conv = Conversation()
    session = _open(conv)
    _made_safe(conv, generator_reads="1")
    steps = session.safe_state(patience_s=0.0)
    assert "FAILED" in steps[0] and "still reads on" in steps[0]
    assert [line.split(":")[0] for line in steps.not_safe] == ["generator"]
    conv.assert_done()


def test_a_failing_identify_closes_what_was_opened():
    conv = Conversation()
    conv.add("generator#1", [("*IDN?", "G"), ("*CLS", None), OK])
    for _ in range(3):
        conv.add(
            "supply#1",
            [("*IDN?", ConnectionLost("supply#1", "*IDN?", "refused")), (RECONNECT, None)],
        )
    for role in ROLES:
        conv.add(f"{role}#1", [(CLOSE, None)])
    with pytest.raises(ConnectionLost):
        assemble_session(_bench(), Connector(conv), FakeClock())
    conv.assert_done()


def test_monotonic_clock_moves_forward():
    clock = MonotonicClock()
    t0 = clock.now()
    clock.sleep(0.01)
    assert clock.now() - t0 >= 0.009


# -- the embedded simulated bench (in-process transports, virtual clock) ---------------------
def test_open_session_on_the_simulated_bench_then_safe_state_in_order():
    pytest.importorskip("benchseq.sim.world")
    from benchseq.drivers.session import open_session

    session = open_session(load_bench("sim"), seed=2)
    try:
        sim = session.simulator
        assert sim is not None and session.clock is sim.clock
        assert set(session.identities) == set(session.bench.instruments)
        assert not any(c.what == "output" and c.value for c in sim.log)  # nothing switched on
        session.supply.set_current_limit(0.1)
        session.supply.set_voltage(5.0)
        session.supply.output(True)
        session.generator.set_sine(1000.0, 0.1)
        session.generator.output(True)
        assert sim.truth().generator_on
        mark = len(sim.log)
        steps = session.safe_state()
        offs = [(c.role, c.value) for c in sim.log[mark:] if c.what == "output"]
        assert offs == [("generator", False), ("supply", False)]  # generator first
        assert all("verified" in s for s in steps)
        assert not sim.truth().generator_on
    finally:
        session.close()


def test_simulated_faults_give_right_answers_or_specific_errors():
    pytest.importorskip("benchseq.sim.faults")
    from benchseq.drivers.errors import InstrumentError
    from benchseq.drivers.session import open_session
    from benchseq.sim.faults import FaultRates

    rates = {"generator": FaultRates(garbage=0.1, disconnect=0.05, no_reply=0.05)}
    session = first_opened(lambda k: open_session(load_bench("sim"), seed=k, faults=rates))
    assert session is not None
    right = 0
    try:
        for k in range(30):
            want = 100.0 * (k + 1)
            try:
                assert session.generator.set_frequency(want) == pytest.approx(want, rel=1e-9)
                right += 1
            except InstrumentError:
                session.recover()
        assert right >= 20
        assert session.simulator.handler("generator").settings.frequency == pytest.approx(3000.0)
    finally:
        session.close()
