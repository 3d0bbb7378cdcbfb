"""The injector's transient after the generator changes: state continuity in time.

The netlist of benchseq.sim.circuit written as a descriptor system C·dx/dt + G·x = b·e(t)
(x: node voltages and source currents; the op-amp's dominant pole as a state of its own,
τa·dv_o/dt + v_o = A0·(v_q − v_n), τa = A0/(2π·GBW)). The generator EMF is
e(t) = E·cos(φ(t)), its phase running on through every change (a synthesised source keeps
its phase accumulator when its frequency or amplitude is set). At a change the charges C·x
cannot jump: the state just after it is the old one, and it differs from the new sine's
periodic state by Δx, which decays through the free modes: with K = G⁻¹C = V·Λ·V⁻¹,
Δx(t) = Σ_i V_i·z_i·e^{−t/λ_i}, z = Λ⁻¹·V⁻¹·K·Δx(0) over the modes with λ_i ≠ 0 (the
others are algebraic and carry nothing). Successive changes add up (the system is linear).

Solved here from the netlist alone (never from benchseq.injector), so a run on the simulated
bench checks the sequencer's settling rule. Approximations: the device's own pin admittance
is left out of the modes (the pin capacitor and the injector dominate them), the device
passes each mode as its transfer at the mode's natural frequency |p|/2π, and the scope's
channel response (its own AC-coupling transient included) is not applied to the transient.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from benchseq.sim.circuit import InjectorCircuit

_NODES = ("e", "a", "b", "n", "d", "q", "o", "p", "c")


def _descriptor(circuit: InjectorCircuit) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(G, C, b): the free system and the EMF's input column."""
    index = {name: k for k, name in enumerate(_NODES)}
    branches: list[tuple[str, str]] = []

    def branch(plus: str, minus: str) -> int:
        branches.append((plus, minus))
        return len(_NODES) + len(branches) - 1

    resistors = [
        ("e", "a", circuit.source_resistance),
        ("b", "n", circuit.input_resistor),
        ("p", "n", circuit.feedback_resistor),
        ("d", "q", circuit.bias_resistor),
        ("o", "p", circuit.output_resistance),
        ("c", "0", circuit.pin_capacitor_esr),
    ]
    shorts = [(a, b) for a, b, r in resistors if r <= 0]
    size = len(_NODES) + 3 + len(shorts)
    g = np.zeros((size, size))
    c = np.zeros((size, size))
    rhs = np.zeros(size)

    def stamp(matrix: np.ndarray, a: str, b: str, y: float) -> None:
        ia = index.get(a)
        ib = index.get(b)
        if ia is not None:
            matrix[ia, ia] += y
        if ib is not None:
            matrix[ib, ib] += y
        if ia is not None and ib is not None:
            matrix[ia, ib] -= y
            matrix[ib, ia] -= y

    def source(plus: str, minus: str) -> int:
        k = branch(plus, minus)
        ip, im = index.get(plus), index.get(minus)
        if ip is not None:
            g[ip, k] += 1.0
            g[k, ip] += 1.0
        if im is not None:
            g[im, k] -= 1.0
            g[k, im] -= 1.0
        return k

    for a, b, r in resistors:
        if r > 0:
            stamp(g, a, b, 1.0 / r)
        else:
            source(a, b)
    if circuit.pin_load_resistance is not None:
        stamp(g, "p", "0", 1.0 / circuit.pin_load_resistance)
    stamp(c, "a", "b", circuit.coupling_capacitor)
    stamp(c, "q", "0", circuit.bias_capacitor)
    stamp(c, "p", "c", circuit.pin_capacitance)
    rhs[source("e", "0")] = 1.0  # the generator's EMF
    source("d", "0")  # the set-point: held (its changes are the bias filter's business)
    k = branch("o", "0")  # the op-amp's output: a controlled source with a pole
    o = index["o"]
    g[o, k] += 1.0
    tau = circuit.open_loop_gain / (2.0 * math.pi * circuit.gain_bandwidth)
    g[k, o] = 1.0
    c[k, o] = tau
    g[k, index["q"]] = -circuit.open_loop_gain
    g[k, index["n"]] = circuit.open_loop_gain
    return g, c, rhs


@dataclass
class InjectorTransient:
    """The transient at the pin left by the generator's changes (V, s, virtual time)."""

    circuit: InjectorCircuit
    _phase: float = 0.0  # generator phase (rad) at _phase_time
    _phase_time: float = 0.0
    _frequency: float = 0.0  # Hz, true
    _emf: float = 0.0  # V peak (0: off)
    _amplitudes: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=complex))
    _since: float = 0.0  # virtual time at which _amplitudes hold

    def __post_init__(self) -> None:
        g, c, self._rhs = _descriptor(self.circuit)
        self._g, self._c = g, c
        k = np.linalg.solve(g, c)
        lam, vectors = np.linalg.eig(k)
        scale = float(np.max(np.abs(lam))) if lam.size else 0.0
        keep = np.abs(lam) > 1e-12 * scale
        self._lam = lam
        self._keep = keep
        self._vectors = vectors
        self._inverse = np.linalg.inv(vectors)
        self._k = k
        self.rates = np.where(keep, -1.0 / np.where(keep, lam, 1.0), 0.0)[keep]  # poles, 1/s
        self._pin_row = vectors[_NODES.index("p"), keep]
        self._amplitudes = np.zeros(self.rates.size, dtype=complex)

    def _periodic(self, frequency: float, emf: float, phase: float) -> np.ndarray:
        """The state of the periodic solution at the instant the EMF's phase is ``phase``."""
        if emf == 0.0 or frequency <= 0.0:
            return np.zeros(self._rhs.size)
        s = 2j * math.pi * frequency
        phasor = np.linalg.solve(self._g + s * self._c, self._rhs * emf)
        return np.real(phasor * np.exp(1j * phase))

    def phase_at(self, t: float) -> float:
        return self._phase + 2.0 * math.pi * self._frequency * (t - self._phase_time)

    def change(self, t: float, frequency: float, emf: float) -> None:
        """The generator moves to (frequency, emf peak; 0 when off) at virtual time ``t``."""
        if frequency == self._frequency and emf == self._emf:
            return
        phase = self.phase_at(t)
        delta = self._periodic(self._frequency, self._emf, phase) - self._periodic(
            frequency, emf, phase
        )
        z = (self._inverse @ (self._k @ delta))[self._keep] / self._lam[self._keep]
        self._amplitudes = self.amplitudes_at(t) + z
        self._since = t
        self._phase, self._phase_time = math.fmod(phase, 2.0 * math.pi), t
        self._frequency, self._emf = frequency, emf

    def amplitudes_at(self, t: float) -> np.ndarray:
        """Each mode's complex amplitude at the pin (V) at virtual time ``t``."""
        return self._amplitudes * np.exp(self.rates * max(0.0, t - self._since))

    def pin_modes(self, t: float) -> np.ndarray:
        return self._pin_row * self.amplitudes_at(t)

    def next_trigger(self, t: float) -> float:
        """The first instant at or after ``t`` where the generator's phase is 0 (its sync)."""
        if self._frequency <= 0:
            return t
        turns = self.phase_at(t) / (2.0 * math.pi)
        return t + ((-turns) % 1.0) / self._frequency
