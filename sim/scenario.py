"""Scenario files: the simulated bench's truth (sim/scenarios/<name>.toml, or a user's own
file named by path in a bench file's lab.simulation).

The bench file (<name>.bench.toml) holds what the engineer believes; the scenario holds
what is really there: the device model, the injector as built (tolerances), instrument
imperfections, noise and fault rates. Unknown keys are errors naming file and key.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

from benchseq.bench import Bench, is_scenario_path
from benchseq.errors import FileKeyError
from benchseq.sim.circuit import InjectorCircuit
from benchseq.sim.devices import Device, Regulator, device_from_section
from benchseq.sim.faults import FaultRates, rates_from_section
from benchseq.tomlfile import Section, parse_toml_text, read_toml

ROLE_NAMES = ("generator", "supply", "scope", "load")

# [injector] keys: value dimension, and the field of InjectorCircuit they set
_CIRCUIT_KEYS = {
    "source_resistance": "ohm",
    "input_resistor": "ohm",
    "coupling_capacitor": "F",
    "feedback_resistor": "ohm",
    "bias_resistor": "ohm",
    "bias_capacitor": "F",
    "open_loop_gain": "dB",
    "gain_bandwidth": "Hz",
    "slew_rate": "V/s",
    "output_resistance": "ohm",
    "current_limit": "A",
    "output_low": "V",
    "output_high": "V",
    "pin_capacitance": "F",
    "pin_capacitor_esr": "ohm",
    "pin_load_resistance": "ohm",
}


@dataclass(frozen=True)
class ScopeTruth:
    """The simulated scope's imperfections."""

    ac_corner: float = 10.0  # Hz, AC-coupling high-pass (common practice: near 10 Hz)
    analog_bandwidth: float = 200e6  # Hz, single pole
    noise_per_division: float = 0.03  # front-end noise, rms, as a fraction of a division
    noise_floor: float = 100e-6  # V rms at the input at full bandwidth, on every range
    gain_error: dict[int, float] = field(default_factory=dict)  # channel -> relative error
    phase_error_deg: dict[int, float] = field(default_factory=dict)  # channel -> degrees
    skew: dict[int, float] = field(default_factory=dict)  # channel -> s
    probe_attenuation: dict[int, float] = field(default_factory=dict)  # true, else bench's
    trigger_jitter: float = 20e-12  # s rms
    divisions: int = 8


@dataclass(frozen=True)
class SupplyTruth:
    output_resistance: float = 0.01  # Ω
    bleeder_resistance: float = 10e3  # Ω, the injector board's load on the set-point supply
    voltage_noise: float = 0.3e-3  # V rms of a reading
    current_noise: float = 2e-6  # A rms of a reading
    max_voltage: float = 30.0
    max_current: float = 3.0


@dataclass(frozen=True)
class GeneratorTruth:
    source_resistance: float | None = None  # Ω; None = the bench file's value
    frequency_error_ppm: float = 0.0
    resolution: float = 1e-6  # Hz
    min_frequency: float = 1e-6  # Hz


@dataclass(frozen=True)
class Scenario:
    name: str
    description: str
    device: Device
    circuit_overrides: dict[str, float]
    pin_noise: float = 30e-9  # V/√Hz at the pin (injector noise), white
    pin_noise_bandwidth: float = 1e6  # Hz
    mains_pickup: float = 0.0  # V peak on the output node
    mains_frequency: float = 50.0
    scope: ScopeTruth = ScopeTruth()
    supply: SupplyTruth = SupplyTruth()
    generator: GeneratorTruth = GeneratorTruth()
    load_max_current: float = 5.0  # A, the electronic load's own range
    faults: dict[str, FaultRates] = field(default_factory=dict)
    bias_settling: bool = False  # the pin DC follows a set-point change through Rb·Cb
    injector_transients: bool = False  # generator changes ring through the injector's modes

    def circuit(self, bench: Bench) -> InjectorCircuit:
        """The injector as built: the bench's nominal values with this scenario's overrides."""
        inj, amp, pin = bench.injector, bench.injector.opamp, bench.pin
        values: dict[str, float | None] = {
            "source_resistance": bench.generator.source_resistance,
            "input_resistor": inj.input_resistor,
            "coupling_capacitor": inj.coupling_capacitor,
            "feedback_resistor": inj.feedback_resistor,
            "bias_resistor": inj.bias_resistor,
            "bias_capacitor": inj.bias_capacitor,
            "open_loop_gain": amp.open_loop_gain,
            "gain_bandwidth": amp.gain_bandwidth,
            "slew_rate": amp.slew_rate,
            "output_resistance": amp.output_resistance,
            "current_limit": amp.current_limit,
            "output_low": amp.output_low,
            "output_high": amp.output_high,
            "pin_capacitance": pin.capacitance,
            "pin_capacitor_esr": pin.capacitor_esr,
            "pin_load_resistance": None,
        }
        if self.generator.source_resistance is not None:
            values["source_resistance"] = self.generator.source_resistance
        values.update(self.circuit_overrides)
        return InjectorCircuit(**values)  # type: ignore[arg-type]


def _channel_table(section: Section, key: str, dimension: str | None) -> dict[int, float]:
    table = section.section(key, required=False)
    if table is None:
        return {}
    out: dict[int, float] = {}
    for name in list(table.keys()):
        if not name.isdigit() or not 1 <= int(name) <= 64:
            raise table.error(name, 'channel keys are channel numbers, e.g. "2" = ...')
        if dimension is None:
            out[int(name)] = table.number(name)
        else:
            out[int(name)] = table.quantity(name, dimension)
    table.done()
    return out


def parse_scenario(data: dict, source: str, folder: Path | None = None) -> Scenario:
    """A scenario from its TOML data; ``folder`` is where files it names (a device netlist)
    are looked for (default: the folder of ``source``)."""
    top = Section(data, source)
    head = top.section("scenario")
    assert head is not None
    name = head.text("name")
    description = head.text("description", default="")
    bias_settling = head.flag("bias_settling", default=False)
    transients = head.flag("injector_transients", default=False)
    head.done()

    device_section = top.section("device", required=False)
    device: Device = (
        Regulator()
        if device_section is None
        else device_from_section(device_section, folder or Path(source).parent)
    )

    overrides: dict[str, float] = {}
    inj = top.section("injector", required=False)
    if inj is not None:
        for key, dimension in _CIRCUIT_KEYS.items():
            if inj.has(key):
                value = inj.quantity(key, dimension)
                overrides[key] = 10 ** (value / 20.0) if dimension == "dB" else value
        inj.done()

    noise = top.section("noise", required=False)
    extras: dict[str, float] = {}
    if noise is not None:
        if noise.has("pin_nv_per_root_hz"):
            extras["pin_noise"] = noise.number("pin_nv_per_root_hz") * 1e-9
        if noise.has("pin_bandwidth"):
            extras["pin_noise_bandwidth"] = noise.quantity("pin_bandwidth", "Hz", positive=True)
        if noise.has("mains_pickup"):
            extras["mains_pickup"] = noise.quantity("mains_pickup", "V", nonnegative=True)
        if noise.has("mains_frequency"):
            extras["mains_frequency"] = noise.quantity("mains_frequency", "Hz", positive=True)
        noise.done()

    scope = ScopeTruth()
    sco = top.section("scope", required=False)
    if sco is not None:
        scope = ScopeTruth(
            ac_corner=sco.quantity("ac_corner", "Hz", default=scope.ac_corner, positive=True),
            analog_bandwidth=sco.quantity(
                "analog_bandwidth", "Hz", default=scope.analog_bandwidth, positive=True
            ),
            noise_per_division=sco.number("noise_per_division", default=scope.noise_per_division),
            noise_floor=sco.quantity(
                "noise_floor", "V", default=scope.noise_floor, nonnegative=True
            ),
            gain_error=_channel_table(sco, "gain_error", None),
            phase_error_deg=_channel_table(sco, "phase_error_deg", None),
            skew=_channel_table(sco, "skew", "s"),
            probe_attenuation=_channel_table(sco, "probe_attenuation", None),
            trigger_jitter=sco.quantity(
                "trigger_jitter", "s", default=scope.trigger_jitter, nonnegative=True
            ),
        )
        sco.done()

    supply = SupplyTruth()
    sup = top.section("supply", required=False)
    if sup is not None:
        bleeder = sup.raw("bleeder_resistance", default=None)
        supply = SupplyTruth(
            output_resistance=sup.quantity(
                "output_resistance", "ohm", default=supply.output_resistance, nonnegative=True
            ),
            bleeder_resistance=supply.bleeder_resistance
            if bleeder is None
            else math.inf
            if bleeder == "none"
            else sup.parse_value(bleeder, "ohm", "bleeder_resistance"),
            voltage_noise=sup.quantity(
                "voltage_noise", "V", default=supply.voltage_noise, nonnegative=True
            ),
            current_noise=sup.quantity(
                "current_noise", "A", default=supply.current_noise, nonnegative=True
            ),
            max_voltage=sup.quantity("max_voltage", "V", default=supply.max_voltage, positive=True),
            max_current=sup.quantity("max_current", "A", default=supply.max_current, positive=True),
        )
        sup.done()

    generator = GeneratorTruth()
    gen = top.section("generator", required=False)
    if gen is not None:
        generator = GeneratorTruth(
            source_resistance=gen.quantity(
                "source_resistance", "ohm", default=None, nonnegative=True
            ),
            frequency_error_ppm=gen.number("frequency_error_ppm", default=0.0),
            resolution=gen.quantity(
                "resolution", "Hz", default=generator.resolution, positive=True
            ),
            min_frequency=gen.quantity(
                "min_frequency", "Hz", default=generator.min_frequency, positive=True
            ),
        )
        gen.done()

    load_max = 5.0
    lo = top.section("load", required=False)
    if lo is not None:
        load_max = lo.quantity("max_current", "A", default=load_max, positive=True)
        lo.done()

    faults: dict[str, FaultRates] = {}
    fa = top.section("faults", required=False)
    if fa is not None:
        for role in list(fa.keys()):
            if role not in ROLE_NAMES:
                raise fa.error(role, f"not an instrument role; roles: {', '.join(ROLE_NAMES)}")
            table = fa.section(role)
            assert table is not None
            faults[role] = rates_from_section(table)
        fa.done()
    top.done()
    return Scenario(
        name=name,
        description=description,
        device=device,
        circuit_overrides=overrides,
        scope=scope,
        supply=supply,
        generator=generator,
        load_max_current=load_max,
        faults=faults,
        bias_settling=bias_settling,
        injector_transients=transients,
        **extras,
    )


def scenario_text(name: str) -> str:
    """The text of sim/scenarios/<name>.toml."""
    folder = resources.files("benchseq.sim") / "scenarios"
    resource = folder / f"{name}.toml"
    if not resource.is_file():
        available = sorted(
            p.name.removesuffix(".toml")
            for p in folder.iterdir()
            if p.name.endswith(".toml") and not p.name.endswith(".bench.toml")
        )
        raise FileKeyError(
            f"sim:{name}", "", f"no such simulated scenario; available: {', '.join(available)}"
        )
    return resource.read_text(encoding="utf-8")


def load_scenario(name: str) -> Scenario:
    """A shipped scenario by name ("demo"), or a user's scenario file by path ("my.toml")."""
    if is_scenario_path(name):
        _, data = read_toml(name)
        return parse_scenario(data, name)
    source = f"sim/scenarios/{name}.toml"
    _, data = parse_toml_text(scenario_text(name), source)
    folder = resources.files("benchseq.sim") / "scenarios"
    return parse_scenario(data, source, Path(str(folder)))
