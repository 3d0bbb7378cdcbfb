"""SimulatedBench: the four simulated instruments wired to one physical bench.

The bench file says what the engineer believes (benchseq.bench.Bench); the scenario what is
really there (benchseq.sim.scenario). The instruments' settings drive the physics
(benchseq.sim.physics); scope acquisitions are synthesised from it (benchseq.sim.synth) and
advance a virtual clock. Every change of an output or a level is logged with its virtual
time; ``truth()`` gives the true ripple, rejection and DC at the present state.
"""

from __future__ import annotations

import math
import threading
import tomllib
from dataclasses import dataclass
from importlib import resources
from typing import TYPE_CHECKING, Any

import numpy as np

from benchseq.bench import Bench, load_bench
from benchseq.sim.devices import OperatingPoint
from benchseq.sim.faults import FaultInjector, FaultRates
from benchseq.sim.instruments import Generator, Load, Scope, Supply
from benchseq.sim.physics import PointPhysics, SupplyOutput, solve_point
from benchseq.sim.scenario import ROLE_NAMES, Scenario, load_scenario
from benchseq.sim.scpi import ScpiInstrument
from benchseq.sim.synth import NodeSignal, Record
from benchseq.sim.transient import InjectorTransient

if TYPE_CHECKING:
    from benchseq.drivers.transport import Transport

NODES = ("pin", "output", "ground")


class VirtualClock:
    """Bench time in seconds; ``sleep`` advances it at once (no real waiting)."""

    real_time = False  # bench time runs ahead of the wall

    def __init__(self, start: float = 0.0) -> None:
        self._now = start
        self._lock = threading.Lock()

    def now(self) -> float:
        with self._lock:
            return self._now

    def sleep(self, seconds: float) -> None:
        if not seconds >= 0:
            raise ValueError(f"cannot sleep a negative or undefined time ({seconds!r} s)")
        with self._lock:
            self._now += float(seconds)

    advance = sleep


@dataclass(frozen=True)
class StateChange:
    """One logged change: virtual time (s), instrument role, what changed, the new value."""

    time: float
    role: str
    what: str
    value: Any


@dataclass(frozen=True)
class Truth:
    """The bench's true state at one moment (SI units, peak phasors, phase 0 at the trigger)."""

    time: float
    frequency: float  # Hz, the generator's true frequency
    generator_on: bool
    emf_peak: float  # V
    pin_ripple: complex  # V pk, fundamental at the device pin
    output_ripple: complex  # V pk, fundamental at the device output
    rejection_db: float  # the device alone: 20·log10(|pin| / |out|)
    transfer: complex  # V_out / V_pin of the device at f
    pin_dc: float
    output_dc: float
    opamp_output_dc: float
    supply_voltage: float
    supply_current: float
    supply_current_limited: bool
    output_current: float  # A, what the device's output supplies (board load + e-load)
    noise_density: float  # V/√Hz, device output noise at f
    pin_harmonics: tuple[complex, ...]  # V pk at k·f, k = 1..K
    slew_limited: bool
    current_limited: bool
    swing_limited: bool

    def record(self) -> dict[str, Any]:
        """The per-point truth a run stores (benchseq.records.TRUTH_COLUMNS without the id)."""
        return {
            "pin": self.pin_ripple,
            "output": self.output_ripple,
            "rejection_db": self.rejection_db,
            "pin_dc": self.pin_dc,
        }


def scope_capabilities(profile: str = "scpi-scope") -> dict[str, Any]:
    """The [capabilities] table of a scope profile shipped in benchseq.drivers/profiles."""
    text = (resources.files("benchseq.drivers") / "profiles" / f"{profile}.toml").read_text(
        encoding="utf-8"
    )
    return tomllib.loads(text)["capabilities"]


class SimulatedBench:
    """A simulated bench: generator, supply, scope and electronic load on one circuit."""

    def __init__(
        self,
        bench: Bench,
        scenario: Scenario,
        seed: int = 0,
        faults: dict[str, FaultRates] | None = None,
    ) -> None:
        self.bench = bench
        self.scenario = scenario
        self.seed = seed
        self.circuit = scenario.circuit(bench)
        self.device = scenario.device
        self.clock = VirtualClock()
        self.log: list[StateChange] = []
        self.lock = threading.RLock()  # one command at a time, whatever the connection
        sequence = np.random.SeedSequence(seed)
        physics_seeds = sequence.spawn(len(ROLE_NAMES))
        fault_seeds = sequence.spawn(len(ROLE_NAMES))
        self.streams = {
            role: np.random.default_rng(s)
            for role, s in zip(ROLE_NAMES, physics_seeds, strict=True)
        }
        rates = dict(scenario.faults)
        rates.update(faults or {})
        self.faults = {
            role: FaultInjector(rates.get(role, FaultRates()), np.random.default_rng(s))
            for role, s in zip(ROLE_NAMES, fault_seeds, strict=True)
        }
        self.probe_nodes: dict[int, str] = {
            bench.scope.pin.channel: "pin",
            bench.scope.output.channel: "output",
        }
        self._nominal_probe = {
            bench.scope.pin.channel: bench.scope.pin.probe,
            bench.scope.output.channel: bench.scope.output.probe,
        }
        self.generator = Generator(self)
        self.supply = Supply(self)
        self.scope = Scope(self, scope_capabilities())
        self.load = Load(self)
        self._instruments: dict[str, ScpiInstrument] = {
            "generator": self.generator,
            "supply": self.supply,
            "scope": self.scope,
            "load": self.load,
        }
        self._cache: tuple[tuple, PointPhysics] | None = None
        # the bias filter Rb·Cb: the + input follows the supply with this time constant
        self._bias_tau = self.circuit.bias_resistor * self.circuit.bias_capacitor
        self._setpoint_from = self._setpoint_to = 0.0
        self._setpoint_since = 0.0
        # what each change of the generator leaves ringing in the injector (sim/transient.py)
        self.transient = InjectorTransient(self.circuit) if scenario.injector_transients else None

    @classmethod
    def from_scenario(
        cls,
        scenario: str,
        bench: Bench | None = None,
        seed: int = 0,
        faults: dict[str, FaultRates] | None = None,
    ) -> SimulatedBench:
        """The scenario's bench (or ``bench``, e.g. the same bench read from a user's file)."""
        if bench is None:
            bench = load_bench(f"sim:{scenario}")
        return cls(bench, load_scenario(scenario), seed=seed, faults=faults)

    def reseed(self, key: int) -> None:
        """Restart every random stream from (seed, key), in place.

        A run calls this at the start of each point with the point's id, so a point's noise
        depends only on the seed and the point, not on what came before: a resumed run then
        measures exactly what an uninterrupted one would have.
        """
        with self.lock:
            sequence = np.random.SeedSequence([self.seed, int(key)])
            physics_seeds = sequence.spawn(len(ROLE_NAMES))
            fault_seeds = sequence.spawn(len(ROLE_NAMES))
            for role, s in zip(ROLE_NAMES, physics_seeds, strict=True):
                self.streams[role].bit_generator.state = np.random.default_rng(
                    s
                ).bit_generator.state
            for role, s in zip(ROLE_NAMES, fault_seeds, strict=True):
                self.faults[role].rng.bit_generator.state = np.random.default_rng(
                    s
                ).bit_generator.state

    # -- instruments ---------------------------------------------------------------------------
    def handler(self, role: str) -> ScpiInstrument:
        """The SCPI handler of one role: ``.handle(message) -> bytes | None``."""
        if role not in self._instruments:
            raise KeyError(f"no simulated instrument plays the role {role!r}")
        return self._instruments[role]

    def transport(self, role: str, timeout_s: float | None = None) -> Transport:
        """An in-process transport to one role (drivers.transport.Transport)."""
        from benchseq.sim.server import InProcessTransport

        spec = self.bench.instruments.get(role)
        timeout = timeout_s if timeout_s is not None else (spec.timeout_s if spec else 5.0)
        return InProcessTransport(self, role, timeout)

    def record(self, role: str, what: str, value: Any) -> None:
        """Log a state change at the present virtual time."""
        self.log.append(StateChange(self.clock.now(), role, what, value))
        if role == "supply":
            self._track_setpoint()
        if role == "generator" and self.transient is not None:
            self.transient.change(self.clock.now(), self.true_frequency(), self.generator.emf_peak)

    def _track_setpoint(self) -> None:
        target = self.supply_output().voltage
        if target != self._setpoint_to:
            now = self.clock.now()
            self._setpoint_from = self.setpoint(now)
            self._setpoint_to = target
            self._setpoint_since = now

    def setpoint(self, at: float | None = None) -> float:
        """Voltage on the op-amp's + input (V): the supply's level seen through the bias
        filter, settling as exp(−t/(Rb·Cb)) after each change (first-order settling)."""
        if not self.scenario.bias_settling:
            return self.supply_output().voltage
        at = self.clock.now() if at is None else at
        decay = math.exp(-max(0.0, at - self._setpoint_since) / self._bias_tau)
        if decay < 1e-9:
            return self._setpoint_to
        return self._setpoint_to + (self._setpoint_from - self._setpoint_to) * decay

    def connect_probe(self, channel: int, node: str) -> None:
        """Move a scope probe: "pin", "output" or "ground" (e.g. both on the pin to calibrate)."""
        if node not in NODES:
            raise ValueError(f"node must be one of {', '.join(NODES)}, not {node!r}")
        self.probe_nodes[channel] = node

    def probe_attenuation(self, channel: int) -> float:
        """The probe's true attenuation (the scenario's figure, else the bench file's)."""
        true = self.scenario.scope.probe_attenuation
        return true.get(channel, self._nominal_probe.get(channel, 1.0))

    # -- physics ----------------------------------------------------------------------------------
    def supply_output(self) -> SupplyOutput:
        """The set-point supply's terminal voltage and current (CC mode past its limit)."""
        s = self.supply.settings
        truth = self.scenario.supply
        if not s.output or s.tripped:
            return SupplyOutput(0.0, 0.0, False)
        load = truth.bleeder_resistance
        if not math.isfinite(load):
            return SupplyOutput(s.voltage, 0.0, False)
        current = s.voltage / (load + truth.output_resistance)
        if current > s.current_limit:
            return SupplyOutput(s.current_limit * load, s.current_limit, True)
        return SupplyOutput(s.voltage - current * truth.output_resistance, current, False)

    def output_current(self) -> float:
        return self.device.board_load_current + self.load.drawn

    def true_frequency(self) -> float:
        """The generator's true frequency (Hz): its setting off by the scenario's error."""
        g = self.generator.settings
        return g.frequency * (1.0 + self.scenario.generator.frequency_error_ppm * 1e-6)

    def physics(self) -> PointPhysics:
        """The physics at the present instrument settings (cached until one changes)."""
        supply = self.supply_output()
        frequency = self.true_frequency()
        self._track_setpoint()
        setpoint = self.setpoint()
        key = (frequency, self.generator.emf_peak, supply, self.output_current(), setpoint)
        if self._cache is not None and self._cache[0] == key:
            return self._cache[1]
        result = solve_point(
            self.circuit, self.device, supply, frequency, self.generator.emf_peak, key[3], setpoint
        )
        self._cache = (key, result)
        return result

    def node_signal(self, node: str) -> NodeSignal:
        """What a probe on ``node`` sees (V at the tip)."""
        p = self.physics()
        rates, pin_modes = self._transient_modes()
        if node == "pin":
            return NodeSignal(
                p.dc.pin,
                p.harmonic_frequencies,
                p.pin_harmonics,
                self.scenario.pin_noise,
                0.0,
                self.scenario.pin_noise_bandwidth,
                mode_rates=rates,
                mode_amplitudes=pin_modes,
            )
        if node == "output":
            device = self.device
            white = float(device.noise_density(np.array([1e12]), p.op)[0])
            corner = getattr(device, "flicker_corner", 0.0)
            if getattr(device, "noise_at_test_frequency", False):
                # a device whose noise is known only near each test frequency (a learned
                # device, sim/learned.py): white at its density at the generator frequency
                white = float(device.noise_density(np.array([p.frequency]), p.op)[0])
                corner = 0.0
            if p.output_dc <= 0:
                white, corner = 0.0, 0.0
            if rates.size:  # each mode through the device at its natural frequency
                pin_modes = pin_modes * device.transfer(np.abs(rates) / (2 * math.pi), p.op)
            return NodeSignal(
                p.output_dc,
                p.harmonic_frequencies,
                p.output_harmonics,
                white,
                corner,
                device.noise_bandwidth,
                self.scenario.mains_frequency,
                self.scenario.mains_pickup,
                mode_rates=rates,
                mode_amplitudes=pin_modes,
            )
        return NodeSignal(0.0, np.zeros(0), np.zeros(0, dtype=complex), 0.0, 0.0, 1.0)

    def _transient_modes(self) -> tuple[np.ndarray, np.ndarray]:
        """The injector's ringing modes (rates 1/s, pin amplitudes V at the first sample of
        the acquisition starting now, averaged over its records); empty when none is left."""
        empty = (np.zeros(0, dtype=complex), np.zeros(0, dtype=complex))
        if self.transient is None or not self.generator.settings.output:
            return empty
        start = self.transient.next_trigger(self.clock.now())
        modes = self.transient.pin_modes(start)
        if not np.any(np.abs(modes) > 1e-12):
            return empty
        averages = self.scope.record_averages
        rates = self.transient.rates
        if averages > 1:  # records follow one another one record and a re-arm apart
            step = self.scope.settings.points * self.scope.settings.sample_interval
            step += self.scope.rearm_time
            k = np.arange(averages)[:, None]
            modes = modes * np.mean(np.exp(rates[None, :] * k * step), axis=0)
        return rates, modes

    def acquire(self) -> dict[int, Record]:
        """One acquisition of every enabled channel; advances the clock by its duration."""
        records = {
            channel: self.scope.capture(channel)
            for channel, settings in self.scope.settings.channels.items()
            if settings.enabled
        }
        self.clock.sleep(self.scope.acquisition_time())
        return records

    def truth(self) -> Truth:
        """The true state now: ripple phasors, device rejection, DC levels, limits."""
        with self.lock:
            p = self.physics()
            f = np.array([p.frequency])
            return Truth(
                time=self.clock.now(),
                frequency=p.frequency,
                generator_on=self.generator.settings.output,
                emf_peak=abs(p.emf),
                pin_ripple=complex(p.pin_harmonics[0]),
                output_ripple=complex(p.output_harmonics[0]),
                rejection_db=float(-20.0 * math.log10(abs(p.transfer))),
                transfer=p.transfer,
                pin_dc=p.dc.pin,
                output_dc=p.output_dc,
                opamp_output_dc=p.dc.opamp_output,
                supply_voltage=p.supply.voltage,
                supply_current=p.supply.current,
                supply_current_limited=p.supply.current_limited,
                output_current=p.op.output_current,
                noise_density=float(self.device.noise_density(f, p.op)[0]),
                pin_harmonics=tuple(complex(x) for x in p.pin_harmonics),
                slew_limited=p.slew_limited,
                current_limited=p.current_limited,
                swing_limited=p.swing_limited,
            )

    def operating_point(self) -> OperatingPoint:
        return self.physics().op
