"""An independent small-signal reference for the injector: modified nodal analysis of its
netlist, written here from the circuit alone (no benchseq code), solved with numpy.

Modified nodal analysis (MNA): KCL at every node plus one equation per voltage source, the
unknowns being node voltages and source currents (Ho, Ruehli and Brennan, "The modified
nodal approach to network analysis", IEEE Trans. Circuits and Systems, CAS-22(6), 1975).
The op-amp is a voltage-controlled voltage source o = A(s)·(v+ − v−) with a single-pole
A(s) = A0/(1 + s·A0/(2π·GBW)) (the usual dominant-pole model: Horowitz & Hill, The Art of
Electronics, 3rd ed., ch. 4; from memory), behind its output resistance Ro.

Netlist (the injector as wired on the board):
    emf --Rs-- a --Cc-- b --Rin-- n (− input) --Rf-- p (pin)
    dc --Rb-- q (+ input), Cb q to ground
    op-amp output o = A·(q − n), Ro from o to p
    pin load p to ground: (Cpin in series with ESR) in parallel with R_load (if any)
"""

from __future__ import annotations

import math

import numpy as np

NODES = ("emf", "a", "b", "n", "p", "o", "q", "dc")


def _solve(
    f: float,
    *,
    rs: float,
    cc: float,
    rin: float,
    rf: float,
    rb: float,
    cb: float,
    a0: float,
    gbw: float,
    ro: float,
    cpin: float,
    esr: float,
    r_load: float | None,
    emf: float,
    dc: float,
) -> float | complex:
    s = 2j * math.pi * f
    index = {name: k for k, name in enumerate(NODES)}
    size = len(NODES) + 3  # three voltage sources: emf, dc, op-amp output
    m = np.zeros((size, size), dtype=complex)
    rhs = np.zeros(size, dtype=complex)

    def admittance(x: str, y: str | None, value: complex) -> None:
        i = index[x]
        m[i, i] += value
        if y is not None:
            j = index[y]
            m[j, j] += value
            m[i, j] -= value
            m[j, i] -= value

    admittance("emf", "b", 1 / (rs + 1 / (s * cc)))  # Rs and Cc in series (a is internal)
    admittance("a", None, 1.0)
    admittance("b", "n", 1 / rin)
    admittance("n", "p", 1 / rf)
    admittance("dc", "q", 1 / rb)
    admittance("q", None, s * cb)
    out = "o"
    if ro > 0:
        admittance("o", "p", 1 / ro)
    else:  # no output resistance: the source drives the pin itself; o is left unused
        out = "p"
        admittance("o", None, 1.0)
    admittance("p", None, 1 / (esr + 1 / (s * cpin)))
    if r_load is not None:
        admittance("p", None, 1 / r_load)
    gain = a0 / (1 + s * a0 / (2 * math.pi * gbw))
    base = len(NODES)
    for k, (node, value) in enumerate((("emf", emf), ("dc", dc))):
        row = base + k
        m[index[node], row] += 1  # the source's current leaves the node's KCL
        m[row, index[node]] = 1
        rhs[row] = value
    row = base + 2  # v_out − A·(v_q − v_n) = 0
    m[index[out], row] += 1
    m[row, index[out]] = 1
    m[row, index["q"]] = -gain
    m[row, index["n"]] = gain
    return complex(np.linalg.solve(m, rhs)[index["p"]])


def injector_gains(values, generator, pin, f: float) -> tuple[complex, complex]:
    """(V_pin/V_emf, V_pin/V_dc) at ``f`` Hz for a bench's injector values, by nodal analysis.

    Takes the bench's value objects only as plain numbers (their fields are read here)."""
    amp = values.opamp
    common = dict(
        rs=generator.source_resistance,
        cc=values.coupling_capacitor,
        rin=values.input_resistor,
        rf=values.feedback_resistor,
        rb=values.bias_resistor,
        cb=values.bias_capacitor,
        a0=amp.open_loop_gain,
        gbw=amp.gain_bandwidth,
        ro=amp.output_resistance,
        cpin=pin.capacitance,
        esr=pin.capacitor_esr,
        r_load=pin.load_resistance,
    )
    return (
        complex(_solve(f, **common, emf=1.0, dc=0.0)),
        complex(_solve(f, **common, emf=0.0, dc=1.0)),
    )
