"""Role classes against recorded conversations (the replay transport fails on any message
that is not the next one recorded, and on any recorded step left over).

Command texts are those of the shipped SCPI-1999 profiles (drivers/profiles/scpi-*.toml).
SYST:ERR? replies follow IEEE 488.2 / SCPI-1999: '<code>,"<text>"', code 0 = empty queue,
-222 "Data out of range", -113 "Undefined header" (SCPI-1999 Vol. 2 §21.8, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
from fakebench import OK, RES, done, on_replay

from benchseq.bench import ScopeChannel, ScopeSetup
from benchseq.drivers.errors import (
    ConnectionLost,
    GarbledReply,
    InstrumentReportedError,
    InstrumentTimeout,
    StateNotRestored,
    TruncatedBlock,
)
from benchseq.drivers.generator import Generator
from benchseq.drivers.load import Load
from benchseq.drivers.replay import CLEAR, RECONNECT, ReplayMismatch
from benchseq.drivers.scope import Scope
from benchseq.drivers.supply import Supply


# -- generator ------------------------------------------------------------------------------
def test_generator_set_sine_sends_function_unit_frequency_amplitude_offset_in_order():
    gen, t, _ = on_replay(
        Generator,
        [
            ("SOUR1:FUNC SIN", None), OK, ("SOUR1:FUNC?", "SIN"),
            ("SOUR1:VOLT:UNIT VPP", None), OK,
            ("SOUR1:FREQ 1000", None), OK, ("SOUR1:FREQ?", "+1.000000E+03"),
            ("SOUR1:VOLT 0.2", None), OK, ("SOUR1:VOLT?", "0.2"),
            ("SOUR1:VOLT:OFFS 0", None), OK, ("SOUR1:VOLT:OFFS?", "0"),
        ],
    )  # fmt: skip
    gen.set_sine(1000.0, 0.2, 0.0)
    done(t)


def test_generator_returns_the_frequency_it_reads_back_not_the_one_asked():
    gen, t, _ = on_replay(
        Generator,
        [("SOUR2:FREQ 1234.5", None), OK, ("SOUR2:FREQ?", "1234.4999")],
        channel=2,
    )
    assert gen.set_frequency(1234.5) == pytest.approx(1234.4999)
    done(t)


def test_generator_load_mode_and_output():
    gen, t, _ = on_replay(
        Generator,
        [
            ("OUTP1:LOAD INF", None), OK,
            ("OUTP1:LOAD 50", None), OK,
            ("OUTP1 ON", None), OK, ("OUTP1?", "1"),
            ("OUTP1?", "0"),
        ],
    )  # fmt: skip
    gen.set_load_mode("high-z")
    gen.set_load_mode("50 ohm")
    gen.output(True)
    assert gen.output_is_on() is False
    with pytest.raises(ValueError, match="load mode"):
        gen.set_load_mode("75 ohm")
    done(t)


def test_an_error_queue_entry_names_instrument_command_and_error_and_is_not_remembered():
    gen, t, _ = on_replay(
        Generator,
        [
            ("SOUR1:FREQ 1000000000", None),
            ("SYST:ERR?", '-222,"Data out of range"'),
            ("SYST:ERR?", '-221,"Settings conflict"'),
            OK,
        ],
    )
    with pytest.raises(InstrumentReportedError) as info:
        gen.set_frequency(1e9)
    err = info.value
    assert err.code == -222 and "Data out of range" in str(err)
    assert err.resource == RES and err.command == "SOUR1:FREQ 1000000000"
    assert gen.known_state == []
    done(t)


def test_replay_fails_on_an_unexpected_command():
    gen, _t, _ = on_replay(Generator, [("SOUR1:FREQ 10", None), OK])
    with pytest.raises(ReplayMismatch, match="SOUR1:VOLT"):
        gen.set_amplitude_pp(1.0)


def test_replay_fails_when_a_recorded_step_is_left_unused():
    gen, t, _ = on_replay(Generator, [("OUTP1 OFF", None), OK, ("OUTP1?", "0"), ("OUTP1?", "0")])
    gen.output(False)
    with pytest.raises(ReplayMismatch, match="never happened"):
        done(t)


# -- recovery ---------------------------------------------------------------------------------
def test_an_ambiguous_setting_failure_reconnects_and_reapplies_the_whole_state_verified():
    """A setting is never blindly re-sent: reconnect, apply everything known, read back."""
    gen, t, _ = on_replay(
        Generator,
        [
            ("OUTP1 OFF", None), OK, ("OUTP1?", "0"),
            ("SOUR1:VOLT 0.1", None), OK, ("SOUR1:VOLT?", "0.1"),
            ("SOUR1:FREQ 500", None), ("SYST:ERR?", InstrumentTimeout(RES, "SYST:ERR?", "no reply")),
            (RECONNECT, None),
            ("OUTP1 OFF", None), OK, ("OUTP1?", "0"),
            ("SOUR1:VOLT 0.1", None), OK, ("SOUR1:VOLT?", "0.1"),
            ("SOUR1:FREQ 500", None), OK, ("SOUR1:FREQ?", "500"),
        ],
    )  # fmt: skip
    gen.output(False)
    gen.set_amplitude_pp(0.1)
    assert gen.set_frequency(500.0) == 500.0
    assert [s.command for s in gen.known_state] == ["OUTP1 OFF", "SOUR1:VOLT 0.1", "SOUR1:FREQ 500"]
    done(t)


def test_a_restore_that_reads_back_something_else_is_an_error():
    gen, t, _ = on_replay(
        Generator,
        [
            ("SOUR1:VOLT 0.1", None), OK, ("SOUR1:VOLT?", "0.1"),
            ("SOUR1:FREQ 500", ConnectionLost(RES, "SOUR1:FREQ 500", "closed")),
            (RECONNECT, None),
            ("SOUR1:VOLT 0.1", None), OK, ("SOUR1:VOLT?", "0.25"),
        ],
    )  # fmt: skip
    gen.set_amplitude_pp(0.1)
    with pytest.raises(StateNotRestored, match="reads back"):
        gen.set_frequency(500.0)
    done(t)


def test_a_read_only_query_is_retried_after_a_timeout_and_a_garbled_reply():
    sup, t, pauses = on_replay(
        Supply,
        [
            ("MEAS1:VOLT?", InstrumentTimeout(RES, "MEAS1:VOLT?", "no reply")),
            (CLEAR, None),
            ("MEAS1:VOLT?", "3.3x"),
            (CLEAR, None),
            ("MEAS1:VOLT?", "3.301"),
        ],
    )
    assert sup.measure_voltage() == pytest.approx(3.301)
    assert pauses and all(p > 0 for p in pauses)
    done(t)


def test_query_retries_are_bounded():
    lost = InstrumentTimeout(RES, "OUTP1?", "no reply")
    gen, t, pauses = on_replay(Generator, [("OUTP1?", lost), (CLEAR, None)] * 3)
    with pytest.raises(InstrumentTimeout):
        gen.output_is_on()
    assert pauses == sorted(pauses) and len(pauses) == 3  # growing back-off
    done(t)


def test_a_lost_connection_during_a_query_restores_state_before_asking_again():
    gen, t, _ = on_replay(
        Generator,
        [
            ("OUTP1 ON", None), OK, ("OUTP1?", "1"),
            ("OUTP1?", ConnectionLost(RES, "OUTP1?", "reset by peer")),
            (RECONNECT, None),
            ("OUTP1 ON", None), OK, ("OUTP1?", "1"),
            ("OUTP1?", "1"),
        ],
    )  # fmt: skip
    gen.output(True)
    assert gen.output_is_on() is True
    done(t)


# -- supply ---------------------------------------------------------------------------------
def test_supply_limits_output_and_readings():
    """QUEStionable condition bit 1 (value 2) is CURRent (SCPI-1999 Vol. 1, status
    reporting, from memory): 6 has it set, 4 does not."""
    sup, t, _ = on_replay(
        Supply,
        [
            ("SOUR1:CURR 0.1", None), OK, ("SOUR1:CURR?", "0.1"),
            ("SOUR1:VOLT:PROT 6.5", None), OK, ("SOUR1:VOLT:PROT?", "6.5"),
            ("SOUR1:VOLT:PROT:STAT ON", None), OK,
            ("SOUR1:VOLT 5", None), OK, ("SOUR1:VOLT?", "5.000"),
            ("OUTP1 ON", None), OK, ("OUTP1?", "ON"),
            ("MEAS1:CURR?", "0.0421"),
            ("STAT:QUES:COND?", "6"),
            ("STAT:QUES:COND?", "+4"),
            ("SOUR1:VOLT:PROT:TRIP?", "0"),
        ],
    )  # fmt: skip
    sup.set_current_limit(0.1)
    sup.set_overvoltage_protection(6.5)
    sup.set_voltage(5.0)
    sup.output(True)
    assert sup.measure_current() == pytest.approx(0.0421)
    assert sup.is_current_limited() is True
    assert sup.is_current_limited() is False
    assert sup.overvoltage_tripped() is False
    done(t)


# -- load -----------------------------------------------------------------------------------
def test_load_sets_constant_current_mode_once():
    load, t, _ = on_replay(
        Load,
        [
            ("SOUR1:FUNC CURR", None), OK,
            ("SOUR1:CURR 0.05", None), OK, ("SOUR1:CURR?", "0.05"),
            ("SOUR1:CURR 0.1", None), OK, ("SOUR1:CURR?", "0.1"),
            ("INP1 ON", None), OK, ("INP1?", "1"),
            ("INP1?", "1"),
            ("MEAS1:CURR?", "0.0999"),
            ("MEAS1:VOLT?", "3.29"),
        ],
    )  # fmt: skip
    load.set_current(0.05)
    load.set_current(0.1)
    load.input(True)
    assert load.input_is_on()
    assert load.measure_current() == pytest.approx(0.0999)
    assert load.measure_voltage() == pytest.approx(3.29)
    done(t)


# -- scope ----------------------------------------------------------------------------------
def _scope(pairs, timeout_s: float = 5.0):
    setup = ScopeSetup(ScopeChannel(1, 10.0, "AC"), ScopeChannel(2, 1.0, "AC"), 20e6, None)
    scope, transport, _ = on_replay(Scope, pairs, timeout_s=timeout_s, setup=setup)
    return scope, transport


def test_scope_channel_ranges_are_given_at_the_probe_tip():
    """2 Vpp at the tip of a 10:1 probe is 0.2 Vpp at the input; the scope's 0.4 V range
    read back is 4 V at the tip."""
    scope, t = _scope(
        [
            ('SENS:FUNC:ON "VOLT1"', None), OK,
            ("SENS:VOLT1:RANG:PTP 0.2", None), OK, ("SENS:VOLT1:RANG:PTP?", "0.4"),
            ("SENS:VOLT1:RANG:OFFS 0.05", None), OK, ("SENS:VOLT1:RANG:OFFS?", "0.05"),
            ("INP1:COUP AC", None), OK, ("INP1:COUP?", "AC"),
            ("INP1:FILT:LPAS:FREQ 2e+07", None), OK,
            ("INP1:FILT:LPAS:STAT ON", None), OK,
            ('SENS:FUNC:ON "VOLT2"', None), OK,
            ("SENS:VOLT2:RANG:PTP 0.016", None), OK, ("SENS:VOLT2:RANG:PTP?", "0.016"),
            ("SENS:VOLT2:RANG:OFFS 0", None), OK, ("SENS:VOLT2:RANG:OFFS?", "0"),
            ("INP2:COUP DC", None), OK, ("INP2:COUP?", "DC"),
            ("INP2:FILT:LPAS:STAT OFF", None), OK,
        ]
    )  # fmt: skip
    assert scope.configure_channel(1, 2.0, 0.5, "AC", 20e6) == pytest.approx(4.0)
    assert scope.configure_channel(2, 0.016, 0.0, "dc", None) == pytest.approx(0.016)
    done(t)


def test_scope_timebase_averaging_and_acquire_with_a_scaled_timeout():
    scope, t = _scope(
        [
            ("SENS:SWE:OINT 1e-06", None), OK, ("SENS:SWE:OINT?", "1e-6"),
            ("SENS:SWE:POIN 100000", None), OK, ("SENS:SWE:POIN?", "100000"),
            ("SENS:AVER:COUN 16", None), OK, ("SENS:AVER:COUN?", "16"),
            ("SENS:AVER:STAT ON", None), OK,
            ("FORM:DATA INT,16", None), OK,
            ("FORM:BORD SWAP", None), OK,
            ("TRIG:SOUR EXT", None), OK,
            ("INIT:IMM", None), ("*OPC?", "1"), OK,
        ],
        timeout_s=2.0,
    )  # fmt: skip
    assert scope.set_timebase(1e-6, 100_000) == (1e-6, 100_000)
    scope.set_averages(16)
    scope.trigger_external()
    scope.acquire(16 * 0.1)
    # *OPC? waited the base timeout plus 1.5x the expected 1.6 s; the others the base.
    assert t.timeouts[-2] == pytest.approx(2.0 + 1.5 * 1.6)
    assert t.timeout_s == 1.0  # restored afterwards
    with pytest.raises(ValueError, match="averages"):
        scope.set_averages(257)
    done(t)


def test_scope_reads_the_ieee_block_of_measurement_md():
    """Bytes 23 31 35 80 FF 00 7F 81 (+ 0A) are '#15' and int8 [-128, -1, 0, 127, -127]
    (IEEE 488.2 §8.7.9; an example built by hand); volts = code·0.01 V·probe 10."""
    scope, t = _scope(
        [
            ("TRAC:PRE? CH1", "0.01,0,0,1e-6,5,INT8"),
            ("TRAC:DATA? CH1", bytes.fromhex("80FF007F81")),
        ]
    )
    wave = scope.read_waveform(1)
    assert wave.codes.tolist() == [-128, -1, 0, 127, -127]
    np.testing.assert_allclose(wave.volts(), [-12.8, -0.1, 0.0, 12.7, -12.7])
    assert (wave.code_min, wave.code_max) == (-128, 127)
    assert wave.sample_interval == 1e-6 and wave.probe == 10.0
    done(t)


def test_scope_int16_little_endian_and_scaling_with_offset_code():
    """volts = (code - code offset)·volts per code + volts at zero (profile's scaling reply)."""
    scope, t = _scope(
        [
            ("SENS:AVER:COUN 4", None), OK, ("SENS:AVER:COUN?", "4"),
            ("SENS:AVER:STAT ON", None), OK,
            ("FORM:DATA INT,16", None), OK,
            ("FORM:BORD SWAP", None), OK,
            ("TRAC:PRE? CH2", "0.5,1.0,2,1e-3,3,INT16"),
            ("TRAC:DATA? CH2", np.array([2, 258, -2], "<i2").tobytes()),
        ]
    )  # fmt: skip
    scope.set_averages(4)
    wave = scope.read_waveform(2)
    assert wave.codes.tolist() == [2, 258, -2]
    np.testing.assert_allclose(wave.volts(), [1.0, 129.0, -1.0])  # probe 1 on channel 2
    done(t)


def test_scope_block_shorter_than_the_scaling_reply_says_is_refused_after_retries():
    pairs = [("TRAC:PRE? CH1", "0.01,0,0,1e-6,4,INT8")]
    for _ in range(3):
        pairs += [("TRAC:DATA? CH1", TruncatedBlock(RES, "TRAC:DATA? CH1", "cut")), (CLEAR, None)]
    scope, t = _scope(pairs)
    with pytest.raises(TruncatedBlock):
        scope.read_waveform(1)
    done(t)
    scope, t = _scope([("TRAC:PRE? CH1", "0.01,0,0,1e-6,4,INT8"), ("TRAC:DATA? CH1", b"\x01\x02")])
    with pytest.raises(GarbledReply, match="2 samples"):
        scope.read_waveform(1)
    done(t)


def test_scope_waveform_timeout_grows_with_the_record():
    n = 2_000_000
    scope, t = _scope(
        [("TRAC:PRE? CH1", f"0.01,0,0,1e-6,{n},INT8"), ("TRAC:DATA? CH1", bytes(n))], timeout_s=1.0
    )
    assert len(scope.read_waveform(1).codes) == n
    assert t.timeouts[-1] >= 1.0 + n / 1e6
    done(t)


def test_recovery_itself_is_retried_when_it_meets_a_passing_fault():
    """Garbage during the restore retries that setting after a clear; a lost connection
    during the restore starts it over (the instrument may have reset)."""
    gen, t, pauses = on_replay(
        Generator,
        [
            ("SOUR1:FREQ 10", None), OK, ("SOUR1:FREQ?", "10"),
            ("OUTP1 OFF", None), OK, ("OUTP1?", "0"),
            (RECONNECT, None),
            ("OUTP1 OFF", None), ("SYST:ERR?", GarbledReply(RES, "SYST:ERR?", "noise", b"\xff")),
            (CLEAR, None),
            ("OUTP1 OFF", None), OK, ("OUTP1?", "0"),
            ("SOUR1:FREQ 10", ConnectionLost(RES, "SOUR1:FREQ 10", "reset by peer")),
            (RECONNECT, None),
            ("OUTP1 OFF", None), OK, ("OUTP1?", "0"),
            ("SOUR1:FREQ 10", None), OK, ("SOUR1:FREQ?", "10"),
        ],
    )  # fmt: skip
    gen.set_frequency(10.0)
    gen.output(False)
    gen.recover()
    assert len(pauses) == 2
    done(t)


def test_a_restore_gives_up_after_its_fault_budget():
    lost = InstrumentTimeout(RES, "SYST:ERR?", "no reply")
    pairs = [("OUTP1 OFF", None), OK, ("OUTP1?", "0")]
    for _ in range(2):  # two recovery attempts, each meeting 7 faults (a budget of 6)
        pairs.append((RECONNECT, None))
        for k in range(7):
            pairs += [("OUTP1 OFF", None), ("SYST:ERR?", lost)] + ([(CLEAR, None)] if k < 6 else [])
    gen, t, _ = on_replay(Generator, pairs)
    gen.output(False)
    with pytest.raises(InstrumentTimeout):
        gen.recover()
    done(t)


def test_restore_puts_limits_and_levels_before_any_output_turns_on():
    """Common practice: set limits before any output turns on. The supply was switched on
    and then moved to 5 V; after a lost connection the 5 V level (and the limit) go back
    before OUTP ON, and the generator's OFF goes first."""
    sup, t, _ = on_replay(
        Supply,
        [
            ("SOUR1:CURR 0.1", None), OK, ("SOUR1:CURR?", "0.1"),
            ("SOUR1:VOLT 1", None), OK, ("SOUR1:VOLT?", "1"),
            ("OUTP1 ON", None), OK, ("OUTP1?", "1"),
            ("SOUR1:VOLT 5", ConnectionLost(RES, "SOUR1:VOLT 5", "reset by peer")),
            (RECONNECT, None),
            ("SOUR1:CURR 0.1", None), OK, ("SOUR1:CURR?", "0.1"),
            ("SOUR1:VOLT 5", None), OK, ("SOUR1:VOLT?", "5"),
            ("OUTP1 ON", None), OK, ("OUTP1?", "1"),
        ],
    )  # fmt: skip
    sup.set_current_limit(0.1)
    sup.set_voltage(1.0)
    sup.output(True)
    sup.set_voltage(5.0)
    done(t)
    gen, t, _ = on_replay(
        Generator,
        [
            ("SOUR1:FREQ 10", None), OK, ("SOUR1:FREQ?", "10"),
            ("OUTP1 OFF", None), OK, ("OUTP1?", "0"),
            (RECONNECT, None),
            ("OUTP1 OFF", None), OK, ("OUTP1?", "0"),
            ("SOUR1:FREQ 10", None), OK, ("SOUR1:FREQ?", "10"),
        ],
    )  # fmt: skip
    gen.set_frequency(10.0)
    gen.output(False)
    gen.recover()
    done(t)
