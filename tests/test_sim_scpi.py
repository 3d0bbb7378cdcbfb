"""The simulated instruments' SCPI: forms, case, suffixes, compound messages, error numbers
(SCPI-1999 vol. 2 ch. 21: -113 undefined header, -222 data out of range, -224 illegal
parameter value, 0,"No error"), supply protection, the state log and seeded determinism."""

from __future__ import annotations

import pytest

from benchseq.sim.world import SimulatedBench


@pytest.fixture
def sim() -> SimulatedBench:
    return SimulatedBench.from_scenario("demo", seed=3)


def ask(sim: SimulatedBench, role: str, message: str) -> str:
    reply = sim.handler(role).handle(message)
    assert reply is not None, message
    assert reply.endswith(b"\n")
    return reply.decode("latin-1").rstrip("\n")


def error(sim: SimulatedBench, role: str) -> int:
    return int(ask(sim, role, "SYST:ERR?").split(",")[0])


def test_long_short_and_mixed_case_forms_are_one_command(sim: SimulatedBench) -> None:
    gen = sim.handler("generator")
    for message, expected in (
        ("SOUR1:FREQ 1234.5", "1234.5"),
        ("source1:frequency 2000", "2000"),
        (":SoUrCe:FrEq:CW 3e3", "3000"),
        ("FREQ 4kHz", "4000"),
    ):
        assert gen.handle(message) is None
        assert ask(sim, "generator", "SOURce1:FREQuency?") == expected
        assert error(sim, "generator") == 0
    assert ask(sim, "generator", "syst:err?") == '0,"No error"'


def test_profile_commands_all_accepted(sim: SimulatedBench) -> None:
    """Every command template of drivers/profiles/scpi-*.toml is understood."""
    import tomllib
    from importlib import resources

    folder = resources.files("benchseq.drivers") / "profiles"
    for role in ("generator", "supply", "scope", "load"):
        profile = tomllib.loads((folder / f"scpi-{role}.toml").read_text())
        for name, template in profile["commands"].items():
            if not isinstance(template, str):
                continue
            value = {"averages": 4, "record_length": 1000}.get(name, 1.0)
            if "coupling" in name:
                value = "AC"
            message = template.format(ch=1, value=value)
            if "TRAC" in message:  # needs an acquisition first
                sim.handler("scope").handle("INIT:IMM")
            sim.handler(role).handle(message)
            assert error(sim, role) == 0, (role, name, message)


def test_errors_have_standard_numbers(sim: SimulatedBench) -> None:
    gen = sim.handler("generator")
    gen.handle("SOUR1:FROB 3")
    assert error(sim, "generator") == -113
    gen.handle("SOUR1:FREQ 1e12")  # above the generator's 20 MHz
    assert error(sim, "generator") == -222
    gen.handle("OUTP1:LOAD 75")
    assert error(sim, "generator") == -224
    gen.handle("SOUR1:FUNC SQU")
    assert error(sim, "generator") == -224
    gen.handle("SOUR1:FREQ abc")
    assert error(sim, "generator") == -104
    gen.handle("SOUR1:VOLT 50")  # above 10 Vpp into 50 Ω
    assert error(sim, "generator") == -222
    assert error(sim, "generator") == 0
    assert ask(sim, "generator", "*OPC?") == "1"


def test_out_of_range_leaves_the_setting(sim: SimulatedBench) -> None:
    gen = sim.handler("generator")
    gen.handle("SOUR1:VOLT 0.2")
    gen.handle("SOUR1:VOLT 11")
    assert error(sim, "generator") == -222
    assert ask(sim, "generator", "SOUR1:VOLT?") == "0.2"
    gen.handle("OUTP1:LOAD INF")  # high-Z: the display doubles, so 11 Vpp is allowed
    gen.handle("SOUR1:VOLT 11")
    assert error(sim, "generator") == 0
    assert ask(sim, "generator", "OUTP1:LOAD?") == "9.9E+37"


def test_compound_message_and_relative_headers(sim: SimulatedBench) -> None:
    reply = ask(sim, "generator", "SOUR1:FREQ 500;VOLT 0.3;:OUTP1 ON;:SOUR1:FREQ?;VOLT?;:OUTP1?")
    assert reply == "500;0.3;1"
    assert ask(sim, "generator", "*IDN?").count(",") == 3


def test_error_queue_overflow_and_cls(sim: SimulatedBench) -> None:
    for _ in range(25):
        sim.handler("supply").handle("NOPE")
    assert ask(sim, "supply", "SYST:ERR:COUN?") == "20"
    codes = [error(sim, "supply") for _ in range(20)]
    assert codes[:19] == [-113] * 19 and codes[19] == -350
    sim.handler("supply").handle("NOPE;*CLS")
    assert error(sim, "supply") == -113  # processing stops at the first error
    sim.handler("supply").handle("*CLS")
    assert error(sim, "supply") == 0


def test_supply_current_limit_and_overvoltage(sim: SimulatedBench) -> None:
    """Past the current limit the supply is in CC mode (STAT:QUES:COND? bit value 2,
    SCPI-1999 QUEStionable CURRent); OVP turns the output off and latches."""
    sup = sim.handler("supply")
    sup.handle("SOUR1:VOLT 5;CURR 0.1;:SOUR1:VOLT:PROT 6.5;PROT:STAT ON;:OUTP1 ON")
    assert int(ask(sim, "supply", "STAT:QUES:COND?")) & 2 == 0
    sup.handle("SOUR1:CURR 0.0001")  # the 10 kΩ bleeder wants 0.5 mA
    assert int(ask(sim, "supply", "STAT:QUES:COND?")) & 2 == 2
    assert float(ask(sim, "supply", "MEAS1:VOLT?")) == pytest.approx(1.0, abs=0.01)
    sup.handle("SOUR1:CURR 0.1;VOLT 7")
    assert ask(sim, "supply", "OUTP1?") == "0"
    assert ask(sim, "supply", "SOUR1:VOLT:PROT:TRIP?") == "1"
    sup.handle("OUTP1 ON")
    assert error(sim, "supply") == -221
    sup.handle("SOUR1:VOLT 5;:OUTP1:PROT:CLE;:OUTP1 ON")
    assert ask(sim, "supply", "OUTP1?") == "1"
    events = [(c.role, c.what, c.value) for c in sim.log]
    assert ("supply", "overvoltage_trip", 7.0) in events
    trip = events.index(("supply", "overvoltage_trip", 7.0))
    assert events[trip + 1] == ("supply", "output", False)


def test_log_has_virtual_times(sim: SimulatedBench) -> None:
    sim.handler("generator").handle("OUTP1 ON")
    sim.clock.sleep(2.5)
    sim.handler("generator").handle("OUTP1 OFF")
    changes = [c for c in sim.log if c.what == "output"]
    assert [(c.time, c.value) for c in changes] == [(0.0, True), (2.5, False)]


def _samples(seed: int) -> bytes:
    sim = SimulatedBench.from_scenario("demo", seed=seed)
    sim.handler("supply").handle("SOUR1:VOLT 5;:OUTP1 ON")
    sim.handler("generator").handle("SOUR1:FREQ 1000;VOLT 0.1;:OUTP1 ON")
    sim.handler("supply").handle("MEAS1:VOLT?")  # other instruments' noise is its own stream
    scope = sim.handler("scope")
    scope.handle("SENS:SWE:POIN 2000;:SENS:VOLT2:RANG:PTP 0.008;:INP2:COUP AC;:INIT:IMM")
    reply = scope.handle("TRAC:DATA? CH1;:TRAC:DATA? CH2")
    assert reply is not None
    return reply


def test_same_seed_same_samples() -> None:
    assert _samples(7) == _samples(7)
    assert _samples(7) != _samples(8)
