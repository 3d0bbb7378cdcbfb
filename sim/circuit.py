"""The injector and the device's supply pin, solved by modified nodal analysis (MNA).

Solved on its own (never through benchseq.injector) so that a sweep on the simulated
bench checks the injector model. Netlist, node names as in the ngspice reference:

    e ─Rs─ a ─Cc─ b ─Rin─ n (− input) ─Rf─ p (pin)
    d (set-point) ─Rb─ q (+ input) ─Cb─ ground
    o = A(s)·(q − n),  A(s) = A0 / (1 + s·A0/(2π·GBW));   o ─(ammeter)─ m ─Ro─ p
    p ─Cpin─ c ─ESR─ ground;  p ─ device pin admittance ─ ground (a DC current load is AC-open)

Everything is vectorised over frequency: one (F, N, N) stack solved by np.linalg.solve with
two right-hand sides (generator EMF = 1 V, set-point = 1 V). SI units throughout.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

Admittance = Callable[[np.ndarray], np.ndarray]  # complex S over frequency (Hz)

_NODES = ("e", "a", "b", "n", "d", "q", "o", "m", "p", "c")


@dataclass(frozen=True)
class InjectorCircuit:
    """True component values of the injector and the pin's capacitor (Ω, F, Hz, V/s, A, V)."""

    source_resistance: float
    input_resistor: float
    coupling_capacitor: float
    feedback_resistor: float
    bias_resistor: float
    bias_capacitor: float
    open_loop_gain: float  # ratio
    gain_bandwidth: float
    output_resistance: float
    slew_rate: float
    current_limit: float
    output_low: float
    output_high: float
    pin_capacitance: float
    pin_capacitor_esr: float = 0.0
    pin_load_resistance: float | None = None  # a resistive DC load on the pin, if any

    def open_loop(self, f: np.ndarray) -> np.ndarray:
        """A(j2πf) of the single-pole op-amp."""
        s = 2j * math.pi * np.asarray(f, dtype=float)
        a0 = self.open_loop_gain
        return a0 / (1.0 + s * a0 / (2.0 * math.pi * self.gain_bandwidth))


@dataclass(frozen=True)
class AcSolution:
    """Complex transfers over ``frequency`` (Hz), per volt of EMF or of set-point."""

    frequency: np.ndarray
    pin_per_emf: np.ndarray
    pin_per_setpoint: np.ndarray
    opamp_per_emf: np.ndarray  # op-amp output node (before Ro)
    opamp_per_setpoint: np.ndarray
    current_per_emf: np.ndarray  # op-amp output current, A per V of EMF

    @property
    def pin_per_opamp(self) -> np.ndarray:
        """Pin voltage per volt at the op-amp output (the passive path through Ro)."""
        return self.pin_per_emf / self.opamp_per_emf

    @property
    def current_per_opamp(self) -> np.ndarray:
        return self.current_per_emf / self.opamp_per_emf


class _Mna:
    """A small MNA assembler for a stack of frequencies."""

    def __init__(self, nodes: tuple[str, ...], n_freq: int, n_branches: int) -> None:
        self.index = {name: k for k, name in enumerate(nodes)}
        self.n_nodes = len(nodes)
        size = self.n_nodes + n_branches
        self.matrix = np.zeros((n_freq, size, size), dtype=complex)
        self.rhs = np.zeros((n_freq, size, 2), dtype=complex)
        self.next_branch = self.n_nodes

    def _i(self, node: str) -> int | None:
        return None if node == "0" else self.index[node]

    def admittance(self, a: str, b: str, y: np.ndarray | complex) -> None:
        ia, ib = self._i(a), self._i(b)
        if ia is not None:
            self.matrix[:, ia, ia] += y
        if ib is not None:
            self.matrix[:, ib, ib] += y
        if ia is not None and ib is not None:
            self.matrix[:, ia, ib] -= y
            self.matrix[:, ib, ia] -= y

    def voltage_source(
        self, plus: str, minus: str, excitation: int | None = None, gain=None, control=None
    ) -> int:
        """V(plus) − V(minus) = 1 on RHS column ``excitation`` (or 0), or, with ``gain`` and
        ``control`` = (cp, cm), = gain·(V(cp) − V(cm)) (a VCVS). Returns the branch row."""
        k = self.next_branch
        self.next_branch += 1
        ip, im = self._i(plus), self._i(minus)
        if ip is not None:
            self.matrix[:, ip, k] += 1.0
            self.matrix[:, k, ip] += 1.0
        if im is not None:
            self.matrix[:, im, k] -= 1.0
            self.matrix[:, k, im] -= 1.0
        if gain is not None and control is not None:
            cp, cm = self._i(control[0]), self._i(control[1])
            if cp is not None:
                self.matrix[:, k, cp] -= gain
            if cm is not None:
                self.matrix[:, k, cm] += gain
        if excitation is not None:
            self.rhs[:, k, excitation] = 1.0
        return k

    def resistor(self, a: str, b: str, ohms: float) -> None:
        if ohms > 0:
            self.admittance(a, b, 1.0 / ohms)
        else:
            self.voltage_source(a, b)


def solve_ac(
    circuit: InjectorCircuit, frequency: np.ndarray, device_admittance: Admittance | None = None
) -> AcSolution:
    """The injector's small-signal solution at each frequency (Hz > 0)."""
    f = np.atleast_1d(np.asarray(frequency, dtype=float))
    s = 2j * math.pi * f
    zero_r = sum(
        1
        for r in (circuit.source_resistance, circuit.output_resistance, circuit.pin_capacitor_esr)
        if r <= 0
    )
    mna = _Mna(_NODES, f.size, 4 + zero_r)
    mna.voltage_source("e", "0", excitation=0)
    mna.voltage_source("d", "0", excitation=1)
    mna.resistor("e", "a", circuit.source_resistance)
    mna.admittance("a", "b", s * circuit.coupling_capacitor)
    mna.resistor("b", "n", circuit.input_resistor)
    mna.resistor("p", "n", circuit.feedback_resistor)
    mna.resistor("d", "q", circuit.bias_resistor)
    mna.admittance("q", "0", s * circuit.bias_capacitor)
    mna.voltage_source("o", "0", gain=circuit.open_loop(f), control=("q", "n"))
    ammeter = mna.voltage_source("o", "m")
    mna.resistor("m", "p", circuit.output_resistance)
    mna.admittance("p", "c", s * circuit.pin_capacitance)
    mna.resistor("c", "0", circuit.pin_capacitor_esr)
    if circuit.pin_load_resistance is not None:
        mna.admittance("p", "0", 1.0 / circuit.pin_load_resistance)
    if device_admittance is not None:
        mna.admittance("p", "0", np.asarray(device_admittance(f), dtype=complex))
    x = np.linalg.solve(mna.matrix, mna.rhs)
    p, o = mna.index["p"], mna.index["o"]
    return AcSolution(
        frequency=f,
        pin_per_emf=x[:, p, 0],
        pin_per_setpoint=x[:, p, 1],
        opamp_per_emf=x[:, o, 0],
        opamp_per_setpoint=x[:, o, 1],
        current_per_emf=x[:, ammeter, 0],
    )


@dataclass(frozen=True)
class DcSolution:
    """The injector's DC operating point (V, A)."""

    setpoint: float
    pin: float
    opamp_output: float
    current: float  # op-amp output current into the pin
    swing_limited: bool
    current_limited: bool


def solve_dc(
    circuit: InjectorCircuit, setpoint: float, load_current: Callable[[float], float]
) -> DcSolution:
    """Pin DC = set-point × A0/(1+A0) − I·Ro/(1+A0) (Cc blocks the input branch, so β = 1),
    with the op-amp's output swing and current limit applied. ``load_current(v_pin)`` is the
    device's DC draw (A) at pin voltage v_pin, plus any resistive load on the pin."""
    a0 = circuit.open_loop_gain
    ro = circuit.output_resistance
    pin = setpoint
    current = 0.0
    swing = limited = False
    for _ in range(4):  # the load's voltage dependence is weak: a few passes converge
        current = load_current(max(pin, 0.0))
        if circuit.pin_load_resistance is not None:
            current += max(pin, 0.0) / circuit.pin_load_resistance
        pin = (setpoint * a0 - current * ro) / (1.0 + a0)
        opamp = pin + current * ro
        swing = False
        if opamp > circuit.output_high:
            opamp, swing = circuit.output_high, True
        elif opamp < circuit.output_low:
            opamp, swing = circuit.output_low, True
        pin = opamp - current * ro
    limited = current > circuit.current_limit
    if limited:
        # the op-amp holds its limit and the pin sags until the device draws no more
        pin = pin * circuit.current_limit / current
        current = circuit.current_limit
    return DcSolution(setpoint, pin, pin + current * ro, current, swing, limited)
