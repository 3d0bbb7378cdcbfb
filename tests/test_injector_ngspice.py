"""The injector's closed form against an ngspice AC analysis of the same netlist.

Reference: ngspice (Berkeley SPICE lineage), batch mode, op-amp as a single-pole
macro-model with A0, the GBW pole and the open-loop output resistance (tests/ngspice_ref.py);
its answers are stored in tests/ngspice_data/ with the ngspice version (ngspice-39 wrote
them) and re-checked against live ngspice wherever it is installed.
Agreement required: 0.001 dB in magnitude and 0.01° in phase from 1 Hz to 100 MHz.
"""

from __future__ import annotations

import numpy as np
import pytest
from ngspice_ref import ac_reference, injector_netlist
from test_injector_cases import CASES

from benchseq.injector import InjectorModel

FREQS = np.logspace(0, 8, 8 * 12 + 1)  # 1 Hz .. 100 MHz, 12 per decade


def _compare(model_h: np.ndarray, spice_h: np.ndarray) -> tuple[float, float]:
    db = np.max(np.abs(20 * np.log10(np.abs(model_h) / np.abs(spice_h))))
    deg = np.max(np.abs(np.degrees(np.angle(model_h / spice_h))))
    return float(db), float(deg)


@pytest.mark.parametrize("name", sorted(CASES))
def test_ac_gain_matches_ngspice(name: str) -> None:
    """V_pin/V_emf from the closed form = ngspice AC (EMF source AC 1), 1 Hz-100 MHz."""
    values, gen, pin = CASES[name]
    netlist = injector_netlist(values, gen, pin, emf_ac=1.0, dc_ac=0.0)
    spice = ac_reference(netlist, ["p", "o"], FREQS)
    model = InjectorModel(values, gen, pin)
    db, deg = _compare(model.ac_gain(FREQS), spice["p"])
    assert db < 1e-3 and deg < 1e-2, (name, db, deg)
    # the op-amp's own output node (slew and swing are checked there)
    opamp_out = model.ac_gain(FREQS) * model.opamp_output_per_pin(FREQS)
    db, deg = _compare(opamp_out, spice["o"])
    assert db < 1e-3 and deg < 1e-2, (name, db, deg)


@pytest.mark.parametrize("name", sorted(CASES))
def test_dc_gain_matches_ngspice(name: str) -> None:
    """V_pin/V_dc from the closed form = ngspice AC (set-point source AC 1), 1 Hz-100 MHz."""
    values, gen, pin = CASES[name]
    netlist = injector_netlist(values, gen, pin, emf_ac=0.0, dc_ac=1.0)
    spice = ac_reference(netlist, ["p"], FREQS)
    db, deg = _compare(InjectorModel(values, gen, pin).dc_gain(FREQS), spice["p"])
    assert db < 1e-3 and deg < 1e-2, (name, db, deg)


@pytest.mark.parametrize("name", ["demo-like", "high-gain-resistive"])
def test_output_impedance_matches_ngspice(name: str) -> None:
    """Zout: drive the pin with 1 A AC (sources zeroed, pin load removed); V_pin = Zout."""
    values, gen, pin = CASES[name]
    netlist = injector_netlist(values, gen, pin, emf_ac=0.0, dc_ac=0.0)
    kept = [line for line in netlist.splitlines() if not line.startswith(("Cpin", "Resr", "Rload"))]
    kept.append("Itest 0 p DC 0 AC 1")
    spice = ac_reference("\n".join(kept) + "\n", ["p"], FREQS)
    db, deg = _compare(InjectorModel(values, gen, pin).output_impedance(FREQS), spice["p"])
    assert db < 1e-3 and deg < 1e-2, (name, db, deg)
