"""Bench file -> Bench: which instrument plays which role, the scope channels, the
generator's load mode, the injector's component values and the device pin's load.

A bench file describes one lab's wiring; a plan file (benchseq.plan) what to measure.
``load_bench(None)`` or ``load_bench("sim")`` gives the embedded simulated bench.
All values are SI floats (V, A, Hz, F, Ω, s, V/s).
"""

from __future__ import annotations

import hashlib
import math
import os
import re
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from benchseq import plugins
from benchseq.errors import FileKeyError
from benchseq.ranges import BENCH_RANGES
from benchseq.tomlfile import Section, parse_toml_text, read_toml

# ± tolerances an uncalibrated channel ratio carries (the same defaults as
# benchseq.analysis.match, which the simulator must not import): vertical gain accuracy
# 1–2 % per channel and ±1 % for an attenuating probe are common practice
DEFAULT_GAIN_ACCURACY = 0.015
DEFAULT_PROBE_ACCURACY = 0.01
ROLES = ("generator", "supply", "scope", "load")
LOAD_MODES = ("50 ohm", "high-z")
COUPLINGS = ("AC", "DC")
SIM_ADDRESS_PREFIX = "SIM::"
MAX_OUTAGE_PATIENCE_S = 3600.0
_IDENTIFIER = r"[A-Za-z_][A-Za-z0-9_]*"
_DRIVER_CLASS = re.compile(rf"^{_IDENTIFIER}(\.{_IDENTIFIER})*:{_IDENTIFIER}$")


@dataclass(frozen=True)
class InstrumentSpec:
    """How to reach one instrument and which driver speaks to it."""

    role: str
    address: str  # a VISA resource string, or "SIM::<role>" on the embedded simulated bench
    profile: str  # a profile name in benchseq.drivers/profiles, or a path to a profile TOML
    driver_class: str | None = None  # "package.module:Class" for an instrument no profile fits
    channel: int = 1
    timeout_s: float = 5.0


@dataclass(frozen=True)
class GeneratorSetup:
    """The function generator's output as the injector sees it."""

    load_mode: (
        str  # "50 ohm": displayed amplitude is into 50 Ω (EMF = 2x); "high-z": EMF = displayed
    )
    source_resistance: float  # Ω
    max_amplitude_pp: float  # V, largest displayed amplitude
    min_amplitude_pp: float  # V, smallest displayed amplitude
    max_frequency: float  # Hz

    @property
    def emf_per_displayed(self) -> float:
        """Open-circuit EMF per volt of displayed amplitude (2 in 50 Ω mode, 1 in high-Z)."""
        return 2.0 if self.load_mode == "50 ohm" else 1.0


@dataclass(frozen=True)
class SupplySetup:
    """The DC supply that sets the operating point (into the injector's bias filter)."""

    current_limit: float  # A
    overvoltage_protection: float  # V
    safe_level: float  # V, where the supply is left on a safe stop (0 = output off)
    ramp_rate: float  # V/s, largest step rate when moving the DC operating point


@dataclass(frozen=True)
class ScopeChannel:
    """One scope channel: input number, probe attenuation (10 for a 10:1 probe), coupling."""

    channel: int
    probe: float
    coupling: str  # "AC" or "DC"
    probe_accuracy: float = 0.0  # ± relative tolerance of the probe's attenuation


@dataclass(frozen=True)
class ScopeSetup:
    pin: ScopeChannel  # ripple at the device's supply pin
    output: ScopeChannel  # ripple at the device's output
    bandwidth_limit: float | None  # Hz, None = full bandwidth
    calibration: str | None  # path of a channel-match calibration file, if any
    gain_accuracy: float = (
        DEFAULT_GAIN_ACCURACY  # ± relative vertical gain tolerance of each channel
    )

    def tolerances(self) -> Any:
        """The channel-match tolerances an uncalibrated ratio carries (an
        analysis.match.ChannelTolerances)."""
        from benchseq.analysis.match import ChannelTolerances

        return ChannelTolerances(
            gain_pin=self.gain_accuracy,
            gain_output=self.gain_accuracy,
            probe_pin=self.pin.probe_accuracy,
            probe_output=self.output.probe_accuracy,
        )


@dataclass(frozen=True)
class LoadSetup:
    max_current: float  # A


@dataclass(frozen=True)
class OpAmp:
    """The injector's op-amp: single-pole A(s) = A0 / (1 + s·A0/(2π·GBW))."""

    open_loop_gain: float  # ratio (A0), not dB
    gain_bandwidth: float  # Hz
    slew_rate: float  # V/s
    output_resistance: float  # Ω, open-loop
    current_limit: float  # A
    output_low: float  # V, lowest output it can drive
    output_high: float  # V, highest output it can drive


@dataclass(frozen=True)
class InjectorValues:
    """Component values of the op-amp injector (names as in the contributor guide's injector section)."""

    input_resistor: float  # Ω, Rin
    coupling_capacitor: float  # F, Cc
    feedback_resistor: float  # Ω, Rf
    bias_resistor: float  # Ω, Rb
    bias_capacitor: float  # F, Cb
    opamp: OpAmp


@dataclass(frozen=True)
class PinLoad:
    """What the injector drives: the device's supply pin."""

    capacitance: float  # F, the pin's decoupling capacitance
    capacitor_esr: float = 0.0  # Ω, series resistance of that capacitor
    load_current: float | None = None  # A, DC current the device draws (or:)
    load_resistance: float | None = None  # Ω, DC load as a resistance

    def dc_current(self, dc_level: float) -> float:
        """DC current drawn at ``dc_level`` volts."""
        if self.load_current is not None:
            return self.load_current
        if self.load_resistance is not None:
            return dc_level / self.load_resistance
        return 0.0


@dataclass(frozen=True)
class Bench:
    name: str
    notes: str
    source: str  # where it came from (file path, or "sim:<scenario>")
    text: str  # the file's text, stored in results
    visa_library: str  # "@py" (pyvisa-py) unless the file names another
    instruments: dict[str, InstrumentSpec]
    generator: GeneratorSetup
    supply: SupplySetup
    scope: ScopeSetup
    load: LoadSetup | None
    injector: InjectorValues
    pin: PinLoad
    simulation: str | None = None  # simulated bench: a shipped scenario's name or a scenario file
    # s: how long an unreachable instrument is waited for, to ride through an outage and
    # again to make the bench safe (lab.outage_patience)
    outage_patience: float = 300.0
    extra: dict[str, Any] = field(default_factory=dict)
    # [after_run]: a program started when a run ends, in any state (benchseq.afterrun)
    after_run: tuple[str, ...] | None = None
    after_run_timeout: float = 60.0

    @property
    def is_simulated(self) -> bool:
        return self.simulation is not None

    @property
    def text_hash(self) -> str:
        return hashlib.sha256(self.text.encode("utf-8")).hexdigest()


def _instrument(section: Section, role: str) -> InstrumentSpec:
    address = section.text("address")
    profile = section.text("profile", default=f"scpi-{role}")
    driver_class = section.text("driver_class", default=None)
    if (
        driver_class is not None
        and not _DRIVER_CLASS.match(driver_class)
        and (":" in driver_class or driver_class not in plugins.registered("driver"))
    ):
        registered = ", ".join(plugins.names("driver")) or "none installed"
        raise section.error(
            "driver_class",
            f"'{driver_class}' is neither of the form 'package.module:ClassName' "
            "(an importable module, absolute, and a class name) nor the name of a driver "
            f"a package registers (entry-point group benchseq.drivers: {registered})",
        )
    channel = section.integer("channel", default=1, minimum=1, maximum=64)
    timeout = section.quantity("timeout", "s", default=5.0, within=BENCH_RANGES["timeout"])
    return InstrumentSpec(role, address, profile, driver_class, channel, timeout)


def _scope_channel(section: Section) -> ScopeChannel:
    channel = section.integer("channel", minimum=1, maximum=64)
    probe = section.number("probe", default=1.0, positive=True)
    section.check_range("probe", probe, probe, BENCH_RANGES["scope.probe"])
    coupling = section.text("coupling", default="AC", choices=COUPLINGS)
    # a 1:1 connection (coax) has no attenuation to be off; an attenuating probe ±1 %
    default = DEFAULT_PROBE_ACCURACY if probe != 1.0 else 0.0
    accuracy = _tolerance(section, "probe_accuracy", default)
    section.done()
    return ScopeChannel(channel, probe, coupling, accuracy)


def _tolerance(section: Section, key: str, default: float) -> float:
    """A ± tolerance written as a percentage ("1.5 %"), as a fraction; ``default`` if absent."""
    if not section.has(key):
        return default
    value = section.raw(key)
    text = value.strip() if isinstance(value, str) else ""
    try:
        number = float(text[:-1]) if text.endswith("%") else math.nan
    except ValueError:
        number = math.nan
    if not (math.isfinite(number) and 0 <= number < 100):
        raise section.error(
            key, f"expected a tolerance as a percentage from 0 % to under 100 %, got {value!r}"
        )
    return number / 100.0


def _within(section: Section, key: str) -> dict[str, Any]:
    """The range arguments for ``key`` of ``section`` (its range in BENCH_RANGES); the sign
    is checked first, so a negative value is told so plainly."""
    within = BENCH_RANGES[f"{section.path}.{key}"]
    positive = within.low > 0 or (within.low == 0 and within.low_open)
    return {"within": within, "positive": positive, "nonnegative": within.low == 0}


def parse_bench(
    data: dict[str, Any], source: str, text: str, base_dir: Path | None = None
) -> Bench:
    """Validate a parsed bench TOML table into a Bench."""
    top = Section(data, source)
    lab = top.section("lab")
    assert lab is not None
    name = lab.text("name")
    notes = lab.text("notes", default="")
    visa_library = lab.text("visa_library", default="@py")
    simulation = _scenario_reference(lab.text("simulation", default=None), base_dir)
    outage_patience = lab.quantity("outage_patience", "s", default=300.0, positive=True)
    if outage_patience > MAX_OUTAGE_PATIENCE_S:
        raise lab.error("outage_patience", "at most 1 h: the bench may stay on while it lasts")
    lab.done()

    instruments: dict[str, InstrumentSpec] = {}

    gen = top.section("generator")
    assert gen is not None
    instruments["generator"] = _instrument(gen, "generator")
    load_mode = gen.text("load_mode", choices=LOAD_MODES)
    generator = GeneratorSetup(
        load_mode=load_mode,
        source_resistance=gen.quantity(
            "source_resistance", "ohm", default=50.0, **_within(gen, "source_resistance")
        ),
        max_amplitude_pp=_amplitude_pp(gen, "max_amplitude"),
        min_amplitude_pp=_amplitude_pp(gen, "min_amplitude"),
        max_frequency=gen.quantity("max_frequency", "Hz", **_within(gen, "max_frequency")),
    )
    gen.done()
    if generator.min_amplitude_pp >= generator.max_amplitude_pp:
        raise gen.error("min_amplitude", "must be below max_amplitude")

    sup = top.section("supply")
    assert sup is not None
    instruments["supply"] = _instrument(sup, "supply")
    supply = SupplySetup(
        current_limit=sup.quantity("current_limit", "A", **_within(sup, "current_limit")),
        overvoltage_protection=sup.quantity(
            "overvoltage_protection", "V", **_within(sup, "overvoltage_protection")
        ),
        safe_level=sup.quantity("safe_level", "V", default=0.0, **_within(sup, "safe_level")),
        ramp_rate=sup.quantity("ramp_rate", "V/s", default=5.0, **_within(sup, "ramp_rate")),
    )
    sup.done()

    sco = top.section("scope")
    assert sco is not None
    instruments["scope"] = _instrument(sco, "scope")
    pin_section = sco.section("pin")
    out_section = sco.section("output")
    assert pin_section is not None and out_section is not None
    pin_channel = _scope_channel(pin_section)
    out_channel = _scope_channel(out_section)
    if pin_channel.channel == out_channel.channel:
        raise out_section.error("channel", "the pin and the output need different scope channels")
    bandwidth = sco.raw("bandwidth_limit", default="off")
    bandwidth_limit = (
        None
        if bandwidth == "off"
        else sco.check_range(
            "bandwidth_limit",
            sco.parse_value(bandwidth, "Hz", "bandwidth_limit"),
            bandwidth,
            BENCH_RANGES["scope.bandwidth_limit"],
        )
    )
    calibration = sco.text("calibration", default=None)
    if calibration is not None and base_dir is not None and not Path(calibration).is_absolute():
        calibration = str(base_dir / calibration)
    gain_accuracy = _tolerance(sco, "gain_accuracy", DEFAULT_GAIN_ACCURACY)
    scope = ScopeSetup(pin_channel, out_channel, bandwidth_limit, calibration, gain_accuracy)
    sco.done()

    load: LoadSetup | None = None
    load_section = top.section("load", required=False)
    if load_section is not None:
        instruments["load"] = _instrument(load_section, "load")
        load = LoadSetup(
            max_current=load_section.quantity(
                "max_current", "A", **_within(load_section, "max_current")
            )
        )
        load_section.done()

    inj = top.section("injector")
    assert inj is not None
    amp = inj.section("opamp")
    assert amp is not None
    gain_text = amp.raw("open_loop_gain")
    if isinstance(gain_text, str) and gain_text.strip().endswith("dB"):
        open_loop_gain = 10 ** (amp.parse_value(gain_text, "dB", "open_loop_gain") / 20.0)
    else:
        open_loop_gain = amp.parse_value(gain_text, "", "open_loop_gain")
    if not open_loop_gain > 1:
        raise amp.error("open_loop_gain", "must be greater than 1 (or 0 dB)")
    amp.check_range(
        "open_loop_gain", open_loop_gain, gain_text, BENCH_RANGES["injector.opamp.open_loop_gain"]
    )
    opamp = OpAmp(
        open_loop_gain=open_loop_gain,
        gain_bandwidth=amp.quantity("gain_bandwidth", "Hz", **_within(amp, "gain_bandwidth")),
        slew_rate=amp.quantity("slew_rate", "V/s", **_within(amp, "slew_rate")),
        output_resistance=amp.quantity(
            "output_resistance", "ohm", **_within(amp, "output_resistance")
        ),
        current_limit=amp.quantity("current_limit", "A", **_within(amp, "current_limit")),
        output_low=amp.quantity("output_low", "V", **_within(amp, "output_low")),
        output_high=amp.quantity("output_high", "V", **_within(amp, "output_high")),
    )
    if opamp.output_high <= opamp.output_low:
        raise amp.error("output_high", "must be above output_low")
    amp.done()
    injector = InjectorValues(
        input_resistor=inj.quantity("input_resistor", "ohm", **_within(inj, "input_resistor")),
        coupling_capacitor=inj.quantity(
            "coupling_capacitor", "F", **_within(inj, "coupling_capacitor")
        ),
        feedback_resistor=inj.quantity(
            "feedback_resistor", "ohm", **_within(inj, "feedback_resistor")
        ),
        bias_resistor=inj.quantity("bias_resistor", "ohm", **_within(inj, "bias_resistor")),
        bias_capacitor=inj.quantity("bias_capacitor", "F", **_within(inj, "bias_capacitor")),
        opamp=opamp,
    )
    inj.done()

    pin_load = top.section("pin")
    assert pin_load is not None
    load_current = pin_load.quantity(
        "load_current", "A", default=None, **_within(pin_load, "load_current")
    )
    load_resistance = pin_load.quantity(
        "load_resistance", "ohm", default=None, **_within(pin_load, "load_resistance")
    )
    if load_current is not None and load_resistance is not None:
        raise pin_load.error("load_resistance", "give load_current or load_resistance, not both")
    pin = PinLoad(
        capacitance=pin_load.quantity("capacitance", "F", **_within(pin_load, "capacitance")),
        capacitor_esr=pin_load.quantity(
            "capacitor_esr", "ohm", default=0.0, **_within(pin_load, "capacitor_esr")
        ),
        load_current=load_current,
        load_resistance=load_resistance,
    )
    pin_load.done()
    after_run, after_run_timeout = _after_run(top.section("after_run", required=False))
    top.done()

    for role, spec in instruments.items():
        simulated_address = spec.address.upper().startswith(SIM_ADDRESS_PREFIX)
        if simulated_address and simulation is None:
            raise FileKeyError(
                source, f"{role}.address", "a SIM:: address needs lab.simulation to name a scenario"
            )
    return Bench(
        name=name,
        notes=notes,
        source=source,
        text=text,
        visa_library=visa_library,
        instruments=instruments,
        generator=generator,
        supply=supply,
        scope=scope,
        load=load,
        injector=injector,
        pin=pin,
        simulation=simulation,
        outage_patience=outage_patience,
        after_run=after_run,
        after_run_timeout=after_run_timeout,
    )


def _after_run(section: Section | None) -> tuple[tuple[str, ...] | None, float]:
    """[after_run]: ``command``, a program and its arguments as a list of text (started
    as it is, no shell), and ``timeout``, how long it may take (default 60 s, 1 s to 10 min)."""
    from benchseq.afterrun import DEFAULT_TIMEOUT_S

    if section is None:
        return None, DEFAULT_TIMEOUT_S
    command = section.raw("command", default=None)
    timeout = section.quantity(
        "timeout", "s", default=DEFAULT_TIMEOUT_S, **_within(section, "timeout")
    )
    section.done()  # a misspelt key is named before a missing command
    if command is None:
        raise section.error("command", "missing (required)")
    if not (
        isinstance(command, list)
        and command
        and all(isinstance(part, str) and part and "\x00" not in part for part in command)
    ):
        raise section.error(
            "command",
            "expected a list of text: the program, then its arguments, "
            'e.g. ["/usr/local/bin/lab-notify", "--room", "bay 2"] (no shell is used)',
        )
    return tuple(command), timeout


def _amplitude_pp(section: Section, key: str) -> float:
    """A displayed amplitude (peak to peak, V), within its range."""
    written = section.raw(key)
    peak_to_peak = section.amplitude(key).peak_to_peak
    return section.check_range(key, peak_to_peak, written, BENCH_RANGES[f"{section.path}.{key}"])


def is_scenario_path(name: str) -> bool:
    """True when lab.simulation names a scenario FILE (a path) rather than a shipped scenario."""
    return name.endswith(".toml") or "/" in name or "\\" in name


def _scenario_reference(name: str | None, base_dir: Path | None) -> str | None:
    """lab.simulation as given, with a scenario file's relative path taken from the bench
    file's folder (so the result file records where it was)."""
    if name is None or not is_scenario_path(name) or base_dir is None:
        return name
    path = Path(name)
    return os.path.normpath(path if path.is_absolute() else (base_dir / path).absolute())


def embedded_bench_text(scenario: str = "demo") -> str:
    """The bench file of one of the simulated bench's scenarios (shipped in benchseq.sim)."""
    folder = resources.files("benchseq.sim") / "scenarios"
    resource = folder / f"{scenario}.bench.toml"
    if not resource.is_file():
        available = sorted(
            p.name.removesuffix(".bench.toml")
            for p in folder.iterdir()
            if p.name.endswith(".bench.toml")
        )
        raise FileKeyError(
            f"sim:{scenario}", "", f"no such simulated scenario; available: {', '.join(available)}"
        )
    return resource.read_text(encoding="utf-8")


def load_bench(path: str | Path | None) -> Bench:
    """Load a bench file; None, "sim" or "sim:<scenario>" give the embedded simulated bench."""
    if path is None or str(path) == "sim" or str(path).startswith("sim:"):
        scenario = "demo" if path is None or str(path) == "sim" else str(path)[4:]
        source = f"sim:{scenario}"
        text, data = parse_toml_text(embedded_bench_text(scenario), source)
        return parse_bench(data, source, text)
    text, data = read_toml(path)
    return parse_bench(data, str(path), text, base_dir=Path(path).parent)


def describe_band(low: float, high: float) -> str:
    """'15.2 Hz – 2.3 MHz' style text for a frequency band (used by reports and the CLI)."""
    from benchseq.units import format_si

    if not math.isfinite(high):
        return f"from {format_si(low, 'Hz', 3)}"
    return f"{format_si(low, 'Hz', 3)} – {format_si(high, 'Hz', 3)}"
