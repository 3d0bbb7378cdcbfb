"""ngspice as the circuit reference for tests: write a netlist, run `ngspice -b`, read AC results.

``ac_analysis(netlist_text, nodes, freqs)`` runs one small-signal AC analysis per frequency
(``ac lin 1 f f`` in a control block) and reads node voltages written by ``wrdata`` with
16 significant digits, so comparisons are not limited by ngspice's print precision.
``injector_netlist(...)`` builds the op-amp injector's netlist from a bench's values, with
the op-amp as a single-pole macro-model (a transconductance into R = A0 ∥ C = 1/(2π·GBW),
buffered, then the open-loop output resistance).

``ac_reference`` and ``op_reference`` are what the tests call. ngspice's answers are stored
in tests/ngspice_data/ (one JSON file per deck, keyed by the deck's sha256, with the ngspice
version that wrote it), so the comparisons run on every machine:
- ngspice installed: it runs live, and its answer must agree with the stored one (a new
  ngspice release or a changed deck shows up as a failure naming both versions); a deck
  with no stored answer yet gets one written (commit it);
- ngspice missing: the stored answer is used; with the CI environment variable set, a
  missing ngspice is a failure (CI installs it), never a skip;
- no stored answer and no ngspice: a failure that says how to make one.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import shutil
import subprocess
import tempfile
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np

NGSPICE_TIMEOUT_S = 120.0
STORE = Path(__file__).parent / "ngspice_data"
AGREEMENT = 1e-9  # relative: live ngspice against its stored answer


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


# -- stored answers --------------------------------------------------------------------------
def ngspice_version() -> str:
    """ngspice's own version line, e.g. "ngspice-39"."""
    path = ngspice_path()
    if path is None:
        raise NgspiceFailed("ngspice is not on PATH")
    run = subprocess.run([path, "--version"], capture_output=True, text=True, timeout=30)
    found = re.search(r"ngspice-\S+", run.stdout)
    return found.group(0) if found else run.stdout.strip().splitlines()[0]


def _stored(kind: str, deck: str) -> tuple[Path, dict | None]:
    key = hashlib.sha256(f"{kind}\n{deck}".encode()).hexdigest()
    path = STORE / f"{kind}-{key[:20]}.json"
    if path.exists():
        return path, json.loads(path.read_text(encoding="utf-8"))
    return path, None


def _live_or_stored(kind: str, deck: str, live) -> tuple[dict, str]:
    """(answer, version): live when ngspice is here (checked against the stored answer),
    else the stored answer. Fails (never skips) when neither can be had, or in CI without
    ngspice."""
    import pytest

    path, stored = _stored(kind, deck)
    if ngspice_path() is None:
        if os.environ.get("CI"):
            pytest.fail(
                "ngspice is not on PATH; CI is set, so the live circuit reference is required"
            )
        if stored is None:
            pytest.fail(
                f"no stored ngspice answer {path.name} and no ngspice here: install ngspice "
                "(apt-get install -y ngspice) and run the test once to store it"
            )
        return stored, stored["ngspice"]
    answer = live()
    version = ngspice_version()
    if stored is None:
        STORE.mkdir(exist_ok=True)
        path.write_text(
            json.dumps({"ngspice": version, "deck": deck, **answer}, indent=1) + "\n",
            encoding="utf-8",
        )
        return answer, version
    for name, value in answer.items():
        ours, theirs = np.asarray(value, dtype=float), np.asarray(stored[name], dtype=float)
        if ours.shape != theirs.shape or not np.allclose(ours, theirs, rtol=AGREEMENT, atol=0):
            pytest.fail(
                f"{version} disagrees with the answer {stored['ngspice']} stored in "
                f"{path.name} ({name}); delete the file to store the new one if that is right"
            )
    return answer, version


def ac_reference(
    netlist_text: str, nodes: Sequence[str], freqs: Iterable[float]
) -> dict[str, np.ndarray]:
    """``ac_analysis`` through the stored answers (see the module docstring)."""
    # 12 significant digits: a frequency grid from np.logspace differs in its last bit
    # between numpy builds, and the deck (and so the stored answer's key) must not.
    frequencies = [float(f"{float(f):.12g}") for f in freqs]
    deck = f"{netlist_text}\nnodes {' '.join(nodes)}\nfreqs {frequencies!r}"

    def live() -> dict:
        result = ac_analysis(netlist_text, nodes, frequencies)
        return {
            f"{node}_{part}": getattr(result[node], part).tolist()
            for node in nodes
            for part in ("real", "imag")
        }

    answer, _ = _live_or_stored("ac", deck, live)
    return {
        node: np.asarray(answer[f"{node}_real"]) + 1j * np.asarray(answer[f"{node}_imag"])
        for node in nodes
    }


def op_reference(netlist_text: str, node: str) -> float:
    """The DC operating-point voltage of ``node`` from ngspice ``op`` (12 printed digits),
    through the stored answers."""

    def live() -> dict:
        path = ngspice_path()
        assert path is not None
        deck = (
            netlist_text.rstrip()
            + f"\n.control\nset numdgt=12\nop\nprint v({node})\nquit\n.endc\n.end\n"
        )
        with tempfile.TemporaryDirectory(prefix="benchseq-ngspice-") as tmp:
            file = Path(tmp) / "op.cir"
            file.write_text(deck, encoding="ascii")
            run = subprocess.run(
                [path, "-b", str(file)],
                capture_output=True,
                text=True,
                timeout=NGSPICE_TIMEOUT_S,
                check=False,
            )
        line = next(
            (x for x in run.stdout.splitlines() if x.strip().startswith(f"v({node})")), None
        )
        if line is None:
            raise NgspiceFailed(f"ngspice printed no v({node}):\n{run.stdout[-2000:]}")
        return {"value": [float(line.split("=")[1])]}

    answer, _ = _live_or_stored("op", f"{netlist_text}\nnode {node}", live)
    return float(answer["value"][0])
