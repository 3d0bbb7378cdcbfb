"""The simulated instruments as SCPI handlers: exactly the commands of
drivers/profiles/scpi-*.toml (long and short forms, any case, numeric suffixes), plus the
IEEE 488.2 common commands and SYST:ERR? of benchseq.sim.scpi.

Each instrument keeps its own settings; the physics behind them lives in the bench
(benchseq.sim.world), which every instrument reaches through ``self.bench``.
"""

from __future__ import annotations

import math
from bisect import bisect_left
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Literal

import numpy as np

from benchseq.drivers.blocks import format_block
from benchseq.sim.scpi import ScpiError, ScpiInstrument, boolean, choice, integer, no_args, number
from benchseq.sim.synth import ChannelSetup, Record, acquire_channel, format_codes

if TYPE_CHECKING:
    from benchseq.sim.world import SimulatedBench

HIGH_Z = 9.9e37  # SCPI's representation of infinity (SCPI-1999 vol. 1, 7.2.1.5)


def _g(value: float) -> str:
    return f"{value:.12g}"


def _check_channel(suffixes: list[int], count: int) -> int:
    channel = suffixes[0] if suffixes else 1
    if not 1 <= channel <= count:
        raise ScpiError(-114, f"channel {channel}; this instrument has {count}")
    return channel


# -- function generator ------------------------------------------------------------------------
@dataclass
class GeneratorSettings:
    function: str = "SIN"
    frequency: float = 1e3  # Hz
    amplitude_pp: float = 0.1  # V, displayed
    offset: float = 0.0  # V, displayed
    load_50_ohm: bool = True
    output: bool = False


class Generator(ScpiInstrument):
    """A one-channel function generator. Displayed amplitude in Vpp; in 50 Ω mode the
    display assumes a 50 Ω load, so the open-circuit EMF is twice it (practice)."""

    identity = "benchseq,SIM-GENERATOR,SG0001,0.1"

    def __init__(self, bench: SimulatedBench) -> None:
        super().__init__()
        self.bench = bench
        self.settings = GeneratorSettings()
        g = "[SOURce#]"
        self.add(f"{g}:FUNCtion[:SHAPe]", False, self._function)
        self.add(f"{g}:FUNCtion[:SHAPe]", True, lambda s, a: self._on(s) and self.settings.function)
        self.add(f"{g}:FREQuency[:CW]", False, self._frequency)
        self.add(
            f"{g}:FREQuency[:CW]", True, lambda s, a: self._on(s) and _g(self.settings.frequency)
        )
        self.add(f"{g}:VOLTage:UNIT", False, self._unit)
        self.add(f"{g}:VOLTage:UNIT", True, lambda s, a: self._on(s) and "VPP")
        self.add(f"{g}:VOLTage[:LEVel][:IMMediate][:AMPLitude]", False, self._amplitude)
        self.add(
            f"{g}:VOLTage[:LEVel][:IMMediate][:AMPLitude]",
            True,
            lambda s, a: self._on(s) and _g(self.settings.amplitude_pp),
        )
        self.add(f"{g}:VOLTage[:LEVel][:IMMediate]:OFFSet", False, self._offset)
        self.add(
            f"{g}:VOLTage[:LEVel][:IMMediate]:OFFSet",
            True,
            lambda s, a: self._on(s) and _g(self.settings.offset),
        )
        self.add("OUTPut#:LOAD", False, self._load)
        self.add("OUTPut#:LOAD", True, lambda s, a: self._on(s) and self._load_text())
        self.add("OUTPut#[:STATe]", False, self._output)
        self.add(
            "OUTPut#[:STATe]", True, lambda s, a: self._on(s) and str(int(self.settings.output))
        )

    def _on(self, suffixes: list[int]) -> Literal[True]:
        _check_channel(suffixes, 1)
        return True

    def reset(self) -> None:
        was_on = self.settings.output
        self.settings = GeneratorSettings()
        if was_on:
            self.bench.record("generator", "output", False)

    @property
    def amplitude_limits(self) -> tuple[float, float]:
        """Displayed Vpp limits: the bench's figures into 50 Ω, twice them in high-Z."""
        setup = self.bench.bench.generator
        factor = 1.0 if self.settings.load_50_ohm else 2.0
        return setup.min_amplitude_pp * factor, setup.max_amplitude_pp * factor

    @property
    def emf_peak(self) -> float:
        """Open-circuit EMF, V peak, when the output is on."""
        if not self.settings.output:
            return 0.0
        factor = 2.0 if self.settings.load_50_ohm else 1.0
        return factor * self.settings.amplitude_pp / 2.0

    def _function(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        self.settings.function = choice(args, {"SIN": "SIN", "SINUSOID": "SIN"})

    def _frequency(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        truth = self.bench.scenario.generator
        value = number(args, truth.min_frequency, self.bench.bench.generator.max_frequency)
        value = round(value / truth.resolution) * truth.resolution
        self.settings.frequency = max(value, truth.min_frequency)
        self.bench.record("generator", "frequency", self.settings.frequency)

    def _unit(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        choice(args, {"VPP": "VPP"})

    def _amplitude(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        low, high = self.amplitude_limits
        value = number(args, low, high)
        if abs(self.settings.offset) + value / 2.0 > high / 2.0 + 1e-12:
            raise ScpiError(-221, "amplitude and offset together exceed the output range")
        self.settings.amplitude_pp = value
        self.bench.record("generator", "amplitude_pp", value)

    def _offset(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        _, high = self.amplitude_limits
        value = number(args, -high / 2.0, high / 2.0)
        if abs(value) + self.settings.amplitude_pp / 2.0 > high / 2.0 + 1e-12:
            raise ScpiError(-221, "amplitude and offset together exceed the output range")
        self.settings.offset = value
        self.bench.record("generator", "offset", value)

    def _load(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        if args and args[0].strip().upper() in ("INF", "INFINITY"):
            fifty = False
        else:
            value = number(args, 1.0, HIGH_Z)
            if value == 50.0:
                fifty = True
            elif value >= 1e6:
                fifty = False
            else:
                raise ScpiError(-224, "load is 50 (ohm) or INF")
        self.settings.load_50_ohm = fifty
        self.bench.record("generator", "load", "50 ohm" if fifty else "high-z")

    def _load_text(self) -> str:
        return "50" if self.settings.load_50_ohm else "9.9E+37"

    def _output(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        state = boolean(args)
        if state != self.settings.output:
            self.settings.output = state
            self.bench.record("generator", "output", state)


# -- DC supply ------------------------------------------------------------------------------------
@dataclass
class SupplySettings:
    voltage: float = 0.0
    current_limit: float = 0.1
    ovp_level: float = 33.0
    ovp_enabled: bool = True
    output: bool = False
    tripped: bool = False


class Supply(ScpiInstrument):
    """A one-channel DC supply with current limit (CC mode) and over-voltage protection."""

    identity = "benchseq,SIM-SUPPLY,PS0001,0.1"

    def __init__(self, bench: SimulatedBench) -> None:
        super().__init__()
        self.bench = bench
        self.rng = bench.streams["supply"]
        self.settings = SupplySettings(ovp_level=bench.scenario.supply.max_voltage * 1.1)
        s = "[SOURce#]"
        self.add(f"{s}:VOLTage[:LEVel][:IMMediate][:AMPLitude]", False, self._voltage)
        self.add(
            f"{s}:VOLTage[:LEVel][:IMMediate][:AMPLitude]",
            True,
            lambda x, a: self._on(x) and _g(self.settings.voltage),
        )
        self.add(f"{s}:CURRent[:LEVel][:IMMediate][:AMPLitude]", False, self._current)
        self.add(
            f"{s}:CURRent[:LEVel][:IMMediate][:AMPLitude]",
            True,
            lambda x, a: self._on(x) and _g(self.settings.current_limit),
        )
        self.add(f"{s}:VOLTage:PROTection[:LEVel]", False, self._ovp_level)
        self.add(
            f"{s}:VOLTage:PROTection[:LEVel]",
            True,
            lambda x, a: self._on(x) and _g(self.settings.ovp_level),
        )
        self.add(f"{s}:VOLTage:PROTection:STATe", False, self._ovp_state)
        self.add(
            f"{s}:VOLTage:PROTection:STATe",
            True,
            lambda x, a: self._on(x) and str(int(self.settings.ovp_enabled)),
        )
        self.add(
            f"{s}:VOLTage:PROTection:TRIPped",
            True,
            lambda x, a: self._on(x) and str(int(self.settings.tripped)),
        )
        self.add("OUTPut#:PROTection:CLEar", False, self._clear_protection)
        self.add("OUTPut#[:STATe]", False, self._output)
        self.add(
            "OUTPut#[:STATe]", True, lambda x, a: self._on(x) and str(int(self.settings.output))
        )
        self.add("MEASure#[:SCALar]:VOLTage[:DC]", True, self._measure_voltage)
        self.add("MEASure#[:SCALar]:CURRent[:DC]", True, self._measure_current)
        self.add("STATus:QUEStionable:CONDition", True, lambda x, a: str(self.questionable()))

    def _on(self, suffixes: list[int]) -> Literal[True]:
        _check_channel(suffixes, 1)
        return True

    def reset(self) -> None:
        if self.settings.output:
            self.bench.record("supply", "output", False)
        self.settings = SupplySettings(ovp_level=self.bench.scenario.supply.max_voltage * 1.1)

    def questionable(self) -> int:
        """STAT:QUES:COND? bits: 1 voltage (OVP tripped), 2 current (SCPI-1999 vol. 2, 20.1)."""
        bits = 1 if self.settings.tripped else 0
        if self.bench.supply_output().current_limited:
            bits |= 2
        return bits

    def _check_protection(self) -> None:
        s = self.settings
        if s.output and s.ovp_enabled and s.voltage > s.ovp_level:
            s.output, s.tripped = False, True
            self.bench.record("supply", "overvoltage_trip", s.voltage)
            self.bench.record("supply", "output", False)

    def _voltage(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        self.settings.voltage = number(args, 0.0, self.bench.scenario.supply.max_voltage)
        self.bench.record("supply", "voltage", self.settings.voltage)
        self._check_protection()

    def _current(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        self.settings.current_limit = number(args, 0.0, self.bench.scenario.supply.max_current)
        self.bench.record("supply", "current_limit", self.settings.current_limit)

    def _ovp_level(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        self.settings.ovp_level = number(args, 0.0, self.bench.scenario.supply.max_voltage * 1.1)
        self.bench.record("supply", "overvoltage_level", self.settings.ovp_level)
        self._check_protection()

    def _ovp_state(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        self.settings.ovp_enabled = boolean(args)
        self.bench.record("supply", "overvoltage_enabled", self.settings.ovp_enabled)
        self._check_protection()

    def _clear_protection(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        no_args(args)
        if self.settings.tripped:
            self.settings.tripped = False
            self.bench.record("supply", "protection_cleared", True)

    def _output(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        state = boolean(args)
        if state and self.settings.tripped:
            raise ScpiError(-221, "over-voltage protection tripped: clear it first")
        if state != self.settings.output:
            self.settings.output = state
            self.bench.record("supply", "output", state)
        self._check_protection()

    def _measure_voltage(self, suffixes: list[int], args: list[str]) -> str:
        self._on(suffixes)
        out = self.bench.supply_output()
        return _g(out.voltage + self.rng.normal(0.0, self.bench.scenario.supply.voltage_noise))

    def _measure_current(self, suffixes: list[int], args: list[str]) -> str:
        self._on(suffixes)
        out = self.bench.supply_output()
        return _g(out.current + self.rng.normal(0.0, self.bench.scenario.supply.current_noise))


# -- electronic load ------------------------------------------------------------------------------
@dataclass
class LoadSettings:
    current: float = 0.0
    input: bool = False


class Load(ScpiInstrument):
    """A constant-current electronic load on the device's output."""

    identity = "benchseq,SIM-LOAD,EL0001,0.1"

    def __init__(self, bench: SimulatedBench) -> None:
        super().__init__()
        self.bench = bench
        self.rng = bench.streams["load"]
        self.settings = LoadSettings()
        s = "[SOURce#]"
        self.add(f"{s}:FUNCtion[:MODE]", False, self._mode)
        self.add(f"{s}:FUNCtion[:MODE]", True, lambda x, a: self._on(x) and "CURR")
        self.add(f"{s}:CURRent[:LEVel][:IMMediate][:AMPLitude]", False, self._current)
        self.add(
            f"{s}:CURRent[:LEVel][:IMMediate][:AMPLitude]",
            True,
            lambda x, a: self._on(x) and _g(self.settings.current),
        )
        self.add("INPut#[:STATe]", False, self._input)
        self.add("INPut#[:STATe]", True, lambda x, a: self._on(x) and str(int(self.settings.input)))
        self.add("MEASure#[:SCALar]:CURRent[:DC]", True, self._measure_current)
        self.add("MEASure#[:SCALar]:VOLTage[:DC]", True, self._measure_voltage)

    def _on(self, suffixes: list[int]) -> Literal[True]:
        _check_channel(suffixes, 1)
        return True

    def reset(self) -> None:
        if self.settings.input:
            self.bench.record("load", "input", False)
        self.settings = LoadSettings()

    @property
    def drawn(self) -> float:
        return self.settings.current if self.settings.input else 0.0

    def _mode(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        choice(args, {"CURR": "CURR", "CURRENT": "CURR"})

    def _current(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        self.settings.current = number(args, 0.0, self.bench.scenario.load_max_current)
        self.bench.record("load", "current", self.settings.current)

    def _input(self, suffixes: list[int], args: list[str]) -> None:
        self._on(suffixes)
        state = boolean(args)
        if state != self.settings.input:
            self.settings.input = state
            self.bench.record("load", "input", state)

    def _measure_current(self, suffixes: list[int], args: list[str]) -> str:
        self._on(suffixes)
        drawn = self.drawn if self.bench.physics().output_dc > 0 else 0.0
        return _g(drawn + self.rng.normal(0.0, 1e-5))

    def _measure_voltage(self, suffixes: list[int], args: list[str]) -> str:
        self._on(suffixes)
        return _g(self.bench.physics().output_dc + self.rng.normal(0.0, 1e-4))


# -- oscilloscope -----------------------------------------------------------------------------------
@dataclass
class ChannelSettings:
    enabled: bool = True
    full_scale: float = 8.0  # V pp at the input
    offset: float = 0.0
    coupling: str = "DC"
    bandwidth_limit_on: bool = False
    bandwidth_limit: float = 20e6


@dataclass
class ScopeSettings:
    channels: dict[int, ChannelSettings] = field(
        default_factory=lambda: {k: ChannelSettings(enabled=k <= 2) for k in range(1, 5)}
    )
    sample_interval: float = 1e-6
    points: int = 10000
    averages: int = 16
    averaging: bool = False
    trigger: str = "IMM"
    sixteen_bit: bool = False
    little_endian: bool = False


class Scope(ScpiInstrument):
    """A four-channel 8-bit digitiser; its capabilities are the profile's [capabilities]."""

    identity = "benchseq,SIM-SCOPE,SC0001,0.1"
    channel_count = 4

    def __init__(self, bench: SimulatedBench, capabilities: dict) -> None:
        super().__init__()
        self.bench = bench
        self.rng = bench.streams["scope"]
        self.ranges = sorted(float(r) for r in capabilities["ranges"])
        self.intervals = sorted(float(r) for r in capabilities["sample_intervals"])
        self.lengths = sorted(int(r) for r in capabilities["record_lengths"])
        self.max_averages = int(capabilities["max_averages"])
        self.rearm_time = float(capabilities["rearm_time"])
        self.max_offset = float(capabilities["max_offset"])
        self.bandwidth_limits = sorted(float(r) for r in capabilities["bandwidth_limits"])
        self.settings = ScopeSettings()
        self.records: dict[int, Record] = {}
        ch = "INPut#"
        self.add("[SENSe]:FUNCtion[:ON]", False, self._function_on)
        self.add("[SENSe]:FUNCtion:OFF", False, self._function_off)
        self.add("[SENSe]:VOLTage#[:DC]:RANGe:PTPeak", False, self._range)
        self.add(
            "[SENSe]:VOLTage#[:DC]:RANGe:PTPeak", True, lambda s, a: _g(self._ch(s).full_scale)
        )
        self.add("[SENSe]:VOLTage#[:DC]:RANGe:OFFSet", False, self._offset)
        self.add("[SENSe]:VOLTage#[:DC]:RANGe:OFFSet", True, lambda s, a: _g(self._ch(s).offset))
        self.add(f"{ch}:COUPling", False, self._coupling)
        self.add(f"{ch}:COUPling", True, lambda s, a: self._ch(s).coupling)
        self.add(f"{ch}:FILTer[:LPASs]:FREQuency", False, self._bandwidth)
        self.add(
            f"{ch}:FILTer[:LPASs]:FREQuency", True, lambda s, a: _g(self._ch(s).bandwidth_limit)
        )
        self.add(f"{ch}:FILTer[:LPASs][:STATe]", False, self._bandwidth_state)
        self.add(
            f"{ch}:FILTer[:LPASs][:STATe]",
            True,
            lambda s, a: str(int(self._ch(s).bandwidth_limit_on)),
        )
        self.add("[SENSe]:SWEep:OINTerval", False, self._interval)
        self.add("[SENSe]:SWEep:OINTerval", True, lambda s, a: _g(self.settings.sample_interval))
        self.add("[SENSe]:SWEep:POINts", False, self._points)
        self.add("[SENSe]:SWEep:POINts", True, lambda s, a: str(self.settings.points))
        self.add("[SENSe]:AVERage:COUNt", False, self._average_count)
        self.add("[SENSe]:AVERage:COUNt", True, lambda s, a: str(self.settings.averages))
        self.add("[SENSe]:AVERage[:STATe]", False, self._average_state)
        self.add("[SENSe]:AVERage[:STATe]", True, lambda s, a: str(int(self.settings.averaging)))
        self.add("TRIGger[:SEQuence]:SOURce", False, self._trigger)
        self.add("TRIGger[:SEQuence]:SOURce", True, lambda s, a: self.settings.trigger)
        self.add("INITiate[:IMMediate]", False, self._initiate)
        self.add("FORMat[:DATA]", False, self._format)
        self.add(
            "FORMat[:DATA]", True, lambda s, a: "INT,16" if self.settings.sixteen_bit else "INT,8"
        )
        self.add("FORMat:BORDer", False, self._byte_order)
        self.add(
            "FORMat:BORDer", True, lambda s, a: "SWAP" if self.settings.little_endian else "NORM"
        )
        self.add("TRACe[:DATA]", True, self._data)
        self.add("TRACe:PREamble", True, self._preamble)

    def reset(self) -> None:
        self.settings = ScopeSettings()
        self.records = {}

    # -- settings ---------------------------------------------------------------------------
    def _ch(self, suffixes: list[int]) -> ChannelSettings:
        return self.settings.channels[_check_channel(suffixes, self.channel_count)]

    def _channel_word(self, args: list[str]) -> int:
        if not args:
            raise ScpiError(-109)
        word = args[0].strip().strip("\"'").upper()
        for prefix in ("VOLTAGE", "VOLT", "CHANNEL", "CHAN", "CH"):
            if word.startswith(prefix) and word[len(prefix) :].isdigit():
                channel = int(word[len(prefix) :])
                if 1 <= channel <= self.channel_count:
                    return channel
        raise ScpiError(-224, f"'{args[0].strip()}' names no channel")

    def _function_on(self, suffixes: list[int], args: list[str]) -> None:
        self.settings.channels[self._channel_word(args)].enabled = True

    def _function_off(self, suffixes: list[int], args: list[str]) -> None:
        self.settings.channels[self._channel_word(args)].enabled = False

    def _range(self, suffixes: list[int], args: list[str]) -> None:
        channel = self._ch(suffixes)
        value = number(args, 0.0, self.ranges[-1] * (1 + 1e-9))
        index = bisect_left(self.ranges, value * (1 - 1e-9))
        channel.full_scale = self.ranges[min(index, len(self.ranges) - 1)]

    def _offset(self, suffixes: list[int], args: list[str]) -> None:
        self._ch(suffixes).offset = number(args, -self.max_offset, self.max_offset)

    def _coupling(self, suffixes: list[int], args: list[str]) -> None:
        self._ch(suffixes).coupling = choice(args, {"AC": "AC", "DC": "DC"})

    def _bandwidth(self, suffixes: list[int], args: list[str]) -> None:
        channel = self._ch(suffixes)
        value = number(args, 0.0, math.inf)
        channel.bandwidth_limit = min(
            self.bandwidth_limits, key=lambda b: abs(math.log(b / max(value, 1.0)))
        )

    def _bandwidth_state(self, suffixes: list[int], args: list[str]) -> None:
        self._ch(suffixes).bandwidth_limit_on = boolean(args)

    def _interval(self, suffixes: list[int], args: list[str]) -> None:
        value = number(args, 0.0, math.inf)
        if value <= 0:
            raise ScpiError(-222, "the sample interval must be positive")
        self.settings.sample_interval = min(self.intervals, key=lambda i: abs(math.log(i / value)))

    def _points(self, suffixes: list[int], args: list[str]) -> None:
        value = integer(args, 1, self.lengths[-1])
        self.settings.points = self.lengths[bisect_left(self.lengths, value)]

    def _average_count(self, suffixes: list[int], args: list[str]) -> None:
        self.settings.averages = integer(args, 1, self.max_averages)

    def _average_state(self, suffixes: list[int], args: list[str]) -> None:
        self.settings.averaging = boolean(args)

    def _trigger(self, suffixes: list[int], args: list[str]) -> None:
        self.settings.trigger = choice(
            args, {"EXT": "EXT", "EXTERNAL": "EXT", "IMM": "IMM", "IMMEDIATE": "IMM", "INT": "IMM"}
        )

    def _format(self, suffixes: list[int], args: list[str]) -> None:
        kind = choice(args, {"INT": "INT", "INTEGER": "INT"})
        assert kind == "INT"
        bits = integer(args, 8, 16, index=1) if len(args) > 1 else 8
        if bits not in (8, 16):
            raise ScpiError(-224, "INT,8 or INT,16")
        self.settings.sixteen_bit = bits == 16

    def _byte_order(self, suffixes: list[int], args: list[str]) -> None:
        self.settings.little_endian = (
            choice(args, {"SWAP": "SWAP", "NORM": "NORM", "NORMAL": "NORM"}) == "SWAP"
        )

    # -- acquisition ------------------------------------------------------------------------------
    @property
    def record_averages(self) -> int:
        return self.settings.averages if self.settings.averaging else 1

    def acquisition_time(self) -> float:
        """Bench time of one acquisition: records × (length × interval + re-arm)."""
        s = self.settings
        return self.record_averages * (s.points * s.sample_interval + self.rearm_time)

    def _initiate(self, suffixes: list[int], args: list[str]) -> None:
        no_args(args)
        self.records = self.bench.acquire()

    def channel_setup(self, channel: int) -> ChannelSetup:
        c = self.settings.channels[channel]
        truth = self.bench.scenario.scope
        bandwidth = c.bandwidth_limit if c.bandwidth_limit_on else None
        division = c.full_scale / truth.divisions
        noise = math.hypot(truth.noise_per_division * division, truth.noise_floor)
        if bandwidth is not None:
            noise *= math.sqrt(min(1.0, bandwidth / truth.analog_bandwidth))
        return ChannelSetup(
            full_scale=c.full_scale,
            offset=c.offset,
            coupling=c.coupling,
            bandwidth_limit=bandwidth,
            ac_corner=truth.ac_corner,
            analog_bandwidth=truth.analog_bandwidth,
            gain_error=truth.gain_error.get(channel, 0.0),
            phase_error_deg=truth.phase_error_deg.get(channel, 0.0),
            skew=truth.skew.get(channel, 0.0),
            noise_rms=noise,
        )

    def capture(self, channel: int) -> Record:
        s = self.settings
        return acquire_channel(
            self.rng,
            self.bench.node_signal(self.bench.probe_nodes.get(channel, "ground")),
            self.channel_setup(channel),
            self.bench.probe_attenuation(channel),
            s.points,
            s.sample_interval,
            self.record_averages,
            s.trigger == "EXT",
            self.bench.scenario.scope.trigger_jitter,
        )

    def _record(self, args: list[str]) -> Record:
        channel = self._channel_word(args)
        if channel not in self.records:
            raise ScpiError(-230, f"no acquired data on channel {channel}: send INIT:IMM first")
        return self.records[channel]

    def _data(self, suffixes: list[int], args: list[str]) -> str:
        record = self._record(args)
        payload = format_codes(record, self.settings.sixteen_bit, self.settings.little_endian)
        return format_block(payload).decode("latin-1")

    def _preamble(self, suffixes: list[int], args: list[str]) -> str:
        record = self._record(args)
        levels = 65536.0 if self.settings.sixteen_bit else 256.0
        return ",".join(
            [
                _g(record.full_scale / levels),
                _g(record.offset),
                "0",
                _g(record.sample_interval),
                str(record.points),
                "INT16" if self.settings.sixteen_bit else "INT8",
            ]
        )


def preamble_volts(codes: np.ndarray, preamble: str) -> np.ndarray:
    """Volts at the scope input from codes and a TRAC:PRE? reply (for tests and tools)."""
    fields = preamble.split(",")
    per_code, at_zero, code_offset = float(fields[0]), float(fields[1]), float(fields[2])
    return (codes.astype(float) - code_offset) * per_code + at_zero
