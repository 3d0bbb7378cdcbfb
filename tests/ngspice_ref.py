"""ngspice as the circuit reference for tests: write a netlist, run `ngspice -b`, read AC results.

``ac_analysis(netlist_text, nodes, freqs)`` runs one small-signal AC analysis per frequency
(``ac lin 1 f f`` in a control block) and reads node voltages written by ``wrdata`` with
16 significant digits, so comparisons are not limited by ngspice's print precision.
``injector_netlist(...)`` builds the op-amp injector's netlist from a bench's values, with
the op-amp as a single-pole macro-model (a transconductance into R = A0 ∥ C = 1/(2π·GBW),
buffered, then the open-loop output resistance). ``require_ngspice()`` skips a test when
ngspice is missing, or fails it when the CI environment variable is set.
"""

from __future__ import annotations

import math
import os
import shutil
import subprocess
import tempfile
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np

NGSPICE_TIMEOUT_S = 120.0


class NgspiceFailed(RuntimeError):
    """ngspice did not produce the expected results (its output is in the message)."""


def ngspice_path() -> str | None:
    return shutil.which("ngspice")


def require_ngspice() -> str:
    """Path of ngspice; pytest.skip without it, or pytest.fail when CI is set."""
    import pytest

    path = ngspice_path()
    if path is None:
        reason = "ngspice is not on PATH (install it: apt-get install -y ngspice)"
        if os.environ.get("CI"):
            pytest.fail(f"{reason}; CI is set, so the circuit reference is required")
        pytest.skip(reason)
    return path


def _number(text: str) -> str:
    return f"{float(text):.17g}"


def ac_analysis(
    netlist_text: str, nodes: Sequence[str], freqs: Iterable[float]
) -> dict[str, np.ndarray]:
    """Complex node voltages {node: array over freqs} from ngspice AC analyses.

    ``netlist_text`` is a complete netlist without ``.end`` and without a control block
    (title line first); sources meant to drive the analysis carry ``AC 1``."""
    path = ngspice_path()
    if path is None:
        raise NgspiceFailed("ngspice is not on PATH")
    frequencies = [float(f) for f in freqs]
    if not frequencies or any(not (f > 0 and math.isfinite(f)) for f in frequencies):
        raise ValueError("frequencies must be positive and finite")
    vectors = " ".join(f"v({node})" for node in nodes)
    control = [".control", "set wr_vecnames", "set numdgt=16"]
    for k, f in enumerate(frequencies):
        control.append(f"ac lin 1 {_number(f)} {_number(f)}")
        control.append(f"wrdata result.txt {vectors}")
        if k == 0:
            control.append("set appendwrite")
    control += ["quit", ".endc", ".end"]
    text = netlist_text.rstrip() + "\n" + "\n".join(control) + "\n"
    with tempfile.TemporaryDirectory(prefix="benchseq-ngspice-") as tmp:
        deck = Path(tmp) / "deck.cir"
        deck.write_text(text, encoding="ascii")
        run = subprocess.run(
            [path, "-b", str(deck)],
            cwd=tmp,
            capture_output=True,
            text=True,
            timeout=NGSPICE_TIMEOUT_S,
            check=False,
        )
        out = Path(tmp) / "result.txt"
        if not out.exists():
            raise NgspiceFailed(
                f"ngspice wrote no results:\n{run.stdout[-2000:]}\n{run.stderr[-2000:]}"
            )
        rows = []
        for line in out.read_text().splitlines():
            fields = line.split()
            if not fields:
                continue
            try:
                rows.append([float(x) for x in fields])
            except ValueError:
                continue  # a header line (repeated by appendwrite)
    data = np.array(rows)
    if data.shape != (len(frequencies), 3 * len(nodes)):
        raise NgspiceFailed(
            f"expected {len(frequencies)} rows of {3 * len(nodes)} numbers, got {data.shape}"
        )
    if not np.allclose(data[:, 0], frequencies, rtol=1e-12, atol=0):
        raise NgspiceFailed("ngspice analysed other frequencies than asked")
    return {node: data[:, 3 * k + 1] + 1j * data[:, 3 * k + 2] for k, node in enumerate(nodes)}


def injector_netlist(values, generator, pin, *, emf_ac: float = 1.0, dc_ac: float = 0.0) -> str:
    """The injector of benchseq's DESIGN (Rf from the pin node) as an ngspice netlist.

    ``values`` an InjectorValues, ``generator`` a GeneratorSetup, ``pin`` a PinLoad.
    Nodes: e (EMF), a, b, n (− input), d (DC supply), q (+ input), x (op-amp pole), o
    (op-amp output before Ro), p (the pin), c (inside the pin capacitor's ESR). A DC current
    load is an ideal current source: open for AC, so it is left out."""
    amp = values.opamp
    lines = [
        "benchseq injector reference",
        f"Vemf e 0 DC 0 AC {emf_ac!r}",
        f"Vdc d 0 DC 0 AC {dc_ac!r}",
    ]
    if generator.source_resistance > 0:
        lines.append(f"Rs e a {generator.source_resistance!r}")
    else:
        lines.append("Vrs e a DC 0")
    lines += [
        f"Cc a b {values.coupling_capacitor!r}",
        f"Rin b n {values.input_resistor!r}",
        f"Rf p n {values.feedback_resistor!r}",
        f"Rb d q {values.bias_resistor!r}",
        f"Cb q 0 {values.bias_capacitor!r}",
        "Gamp 0 x q n 1",
        f"Rpole x 0 {amp.open_loop_gain!r}",
        f"Cpole x 0 {1.0 / (2.0 * math.pi * amp.gain_bandwidth)!r}",
        "Ebuf o 0 x 0 1",
    ]
    if amp.output_resistance > 0:
        lines.append(f"Ro o p {amp.output_resistance!r}")
    else:
        lines.append("Vro o p DC 0")
    if pin.capacitor_esr > 0:
        lines += [f"Cpin p c {pin.capacitance!r}", f"Resr c 0 {pin.capacitor_esr!r}"]
    else:
        lines.append(f"Cpin p 0 {pin.capacitance!r}")
    if pin.load_resistance is not None:
        lines.append(f"Rload p 0 {pin.load_resistance!r}")
    return "\n".join(lines) + "\n"
