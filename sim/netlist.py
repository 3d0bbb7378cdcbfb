"""A device given as a SPICE netlist, solved by ngspice in batch mode at each operating point.

A scenario's ``[device]`` may say ``model = "netlist"``, ``netlist = "FILE.cir"`` (relative to
the scenario file) and ``subcircuit = "NAME"``. The subcircuit's first three ports are, in
this order: the supply pin, the output, and ground (exactly three ports). At an operating
point (pin DC, current drawn from the output, the scenario's temperature) ngspice computes:

* the DC operating point: the current the pin draws and the output's DC level;
* the small-signal transfer V_out/V_pin at each frequency the simulator asks about;
* the admittance of the pin (current into the pin per volt), which loads the injector.

The deck drives the pin with an ideal source (``AC 1``) and the output with a DC current sink
(open for AC, as the simulator's electronic load), so V(out) is the transfer and −I(source)
the pin admittance: for a linear network driven at one port, neither depends on what drives
the pin, so the simulator's nodal solution of the injector with this admittance at the pin is
the same circuit ngspice would solve whole.

Results are cached per (netlist hash, subcircuit, temperature, operating point) and, for the
small-signal part, per frequency. Operating points are resolved to 1 µV and 1 nA: the
simulator's DC iteration then settles on one ngspice run per operating point.

Never imports benchseq.injector or benchseq.analysis.
"""

from __future__ import annotations

import hashlib
import math
import os
import re
import shutil
import subprocess
import tempfile
import threading
from collections import OrderedDict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from benchseq.errors import BadInput, MeasurementFailure
from benchseq.sim.devices import OperatingPoint, PinImpedance
from benchseq.tomlfile import Section

NGSPICE_TIMEOUT_S = 60.0
VOLT_RESOLUTION = 1e-6  # V: operating points are resolved to this
AMPERE_RESOLUTION = 1e-9  # A
CACHE_LIMIT = 200_000  # entries kept (oldest dropped first)
PIN_NODE, OUTPUT_NODE, SOURCE = "bsq_pin", "bsq_out", "vbsq_pin"

_NOT_CONVERGED_SIGNS = ("gmin stepping failed", "source stepping failed")
_NO_CONVERGENCE = re.compile(r"(iteration limit|no convergence|timestep too small)", re.I)


class NgspiceMissing(BadInput):
    """The scenario's device is a netlist, and ngspice cannot be run here."""


class NetlistInvalid(BadInput):
    """The netlist file cannot be used: missing, unreadable, does not parse, wrong subcircuit."""


class NetlistNotConverged(MeasurementFailure):
    """ngspice found no DC operating point (or no small-signal solution) at one point."""


@dataclass(frozen=True)
class NetlistSpec:
    """Which circuit: the file, its text and hash, the subcircuit, the temperature (°C)."""

    path: Path
    subcircuit: str
    text: str
    sha256: str
    temperature: float | None = None  # °C; None = ngspice's default (27 °C)

    @property
    def where(self) -> str:
        temp = "" if self.temperature is None else f" at {self.temperature:g} °C"
        return f"netlist {self.path}, subcircuit {self.subcircuit}{temp}"


@dataclass(frozen=True)
class OperatingSolution:
    """ngspice's DC operating point: what the pin draws (A) and the output level (V)."""

    input_current: float
    output_dc: float


def describe_point(pin_dc: float, output_current: float) -> str:
    return f"pin DC {pin_dc:.6g} V, output current {output_current * 1e3:.6g} mA"


# -- the netlist file -----------------------------------------------------------------------------
def _logical_lines(text: str) -> list[str]:
    """SPICE lines with '+' continuations joined and comments dropped."""
    lines: list[str] = []
    for raw in text.splitlines():
        line = raw.split(";", 1)[0].rstrip()
        stripped = line.lstrip()
        if not stripped or stripped.startswith("*"):
            continue
        if stripped.startswith("+") and lines:
            lines[-1] += " " + stripped[1:].strip()
        else:
            lines.append(stripped)
    return lines


def subcircuit_ports(text: str) -> dict[str, list[str]]:
    """{lower-case name: ports} of every ``.subckt`` in ``text`` (parameters left out)."""
    found: dict[str, list[str]] = {}
    for line in _logical_lines(text):
        fields = line.split()
        if fields[0].lower() != ".subckt" or len(fields) < 2:
            continue
        ports = []
        for word in fields[2:]:
            if "=" in word or word.lower() in ("params:", "param:"):
                break
            ports.append(word)
        found[fields[1].lower()] = ports
    return found


def read_netlist(
    path: Path,
    subcircuit: str,
    source: str,
    temperature: float | None = None,
    keys: tuple[str, str] = ("device.netlist", "device.subcircuit"),
) -> NetlistSpec:
    """The netlist file, checked without ngspice: readable, holds ``subcircuit`` with three
    ports. ``source`` and ``keys`` (of the file name, of the subcircuit) name where they
    were given, for messages."""
    where = f"{source}: {keys[0]}"
    named = f"{source}: {keys[1]}"
    if not path.is_file():
        raise NetlistInvalid(f"{where}: no such netlist file {path}")
    try:
        raw = path.read_bytes()
        text = raw.decode("utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise NetlistInvalid(f"{where}: cannot read {path}: {exc}") from None
    subcircuits = subcircuit_ports(text)
    ports = subcircuits.get(subcircuit.lower())
    if ports is None:
        names = ", ".join(sorted(subcircuits)) or "none"
        raise NetlistInvalid(
            f"{named}: no subcircuit {subcircuit!r} in {path} (subcircuits there: {names})"
        )
    if len(ports) != 3:
        raise NetlistInvalid(
            f"{named}: {subcircuit} in {path} has {len(ports)} ports "
            f"({' '.join(ports)}); benchseq connects exactly three, in this order: supply pin, "
            "output, ground. Wrap it in a three-port subcircuit that ties the others."
        )
    return NetlistSpec(
        path=path.resolve(),
        subcircuit=subcircuit,
        text=text,
        sha256=hashlib.sha256(raw).hexdigest(),
        temperature=temperature,
    )


# -- running ngspice ------------------------------------------------------------------------------
def ngspice_executable() -> str:
    """Path of ngspice, or NgspiceMissing (BENCHSEQ_NGSPICE names another program)."""
    named = os.environ.get("BENCHSEQ_NGSPICE", "ngspice")
    path = shutil.which(named)
    if path is None:
        raise NgspiceMissing(
            f"ngspice ({named}) is not on PATH, and the scenario's device is a netlist: install "
            "ngspice (Debian/Ubuntu: apt-get install ngspice) or set BENCHSEQ_NGSPICE to it"
        )
    return path


def _number(value: float) -> str:
    return f"{float(value):.17g}"


def deck_text(
    spec: NetlistSpec, pin_dc: float, output_current: float, frequencies: Sequence[float]
) -> str:
    """The deck: the subcircuit between an ideal pin source (AC 1) and a DC current sink,
    ``op`` then one ``ac`` per frequency, results written with 16 digits."""
    lines = [
        "benchseq netlist device",
        f'.include "{spec.path}"',
        f"{SOURCE} {PIN_NODE} 0 DC {_number(pin_dc)} AC 1",
        f"ibsq_load {OUTPUT_NODE} 0 DC {_number(output_current)}",
        f"xbsq_dut {PIN_NODE} {OUTPUT_NODE} 0 {spec.subcircuit}",
    ]
    if spec.temperature is not None:
        lines.append(f".options temp={_number(spec.temperature)}")
    vectors = f"v({OUTPUT_NODE}) i({SOURCE})"
    lines += [".control", "set numdgt=16", "set wr_vecnames", "op", f"print {vectors}"]
    for k, f in enumerate(frequencies):
        lines.append(f"ac lin 1 {_number(f)} {_number(f)}")
        lines.append(f"wrdata ac.txt {vectors}")
        if k == 0:
            lines.append("set appendwrite")
    lines += ["quit", ".endc", ".end"]
    return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class _Run:
    stdout: str
    stderr: str
    returncode: int
    ac_rows: np.ndarray | None


def _run(spec: NetlistSpec, deck: str) -> _Run:
    executable = ngspice_executable()
    with tempfile.TemporaryDirectory(prefix="benchseq-netlist-") as tmp:
        file = Path(tmp) / "deck.cir"
        file.write_text(deck, encoding="utf-8")
        try:
            run = subprocess.run(
                [executable, "-b", str(file)],
                cwd=tmp,
                capture_output=True,
                text=True,
                timeout=NGSPICE_TIMEOUT_S,
                check=False,
                env={**os.environ, "SPICE_ASCIIRAWFILE": "1"},
            )
        except subprocess.TimeoutExpired:
            raise NetlistNotConverged(
                f"{spec.where}: ngspice took more than {NGSPICE_TIMEOUT_S:g} s and was stopped"
            ) from None
        except OSError as exc:
            raise NgspiceMissing(f"ngspice ({executable}) could not be started: {exc}") from None
        rows = None
        out = Path(tmp) / "ac.txt"
        if out.exists():
            parsed = []
            for line in out.read_text(encoding="ascii", errors="replace").splitlines():
                try:
                    parsed.append([float(x) for x in line.split()])
                except ValueError:
                    continue  # a header line (repeated by appendwrite)
            rows = np.array([r for r in parsed if r])
    return _Run(run.stdout, run.stderr, run.returncode, rows)


def _printed(stdout: str, name: str) -> float | None:
    for line in stdout.splitlines():
        head, _, value = line.partition("=")
        if head.strip().lower() == name:
            try:
                return float(value.split()[0])
            except (ValueError, IndexError):
                return None
    return None


def _error_lines(text: str, limit: int = 6) -> str:
    picked = [
        line.strip()
        for line in text.splitlines()
        if line.strip() and ("error" in line.lower() or "could not" in line.lower())
    ]
    return "; ".join(picked[:limit]) or text.strip()[-400:]


def _parse_failed(run: _Run) -> bool:
    text = run.stderr.lower()
    return "error" in text and (
        "simulation interrupted due to error" in text
        or "could not find include file" in text
        or "error on line" in text
        or "unknown subckt" in text
    )


def _not_converged(run: _Run) -> bool:
    text = run.stderr.lower()
    return all(sign in text for sign in _NOT_CONVERGED_SIGNS) or bool(_NO_CONVERGENCE.search(text))


# -- cache -----------------------------------------------------------------------------------------
class _Cache:
    """Operating points and small-signal answers, keyed by netlist and operating point."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.ops: OrderedDict[tuple, OperatingSolution] = OrderedDict()
        self.ac: OrderedDict[tuple, tuple[complex, complex]] = OrderedDict()
        self.runs = 0  # ngspice runs made (for benchmarks and tests)

    def keep(self, table: OrderedDict, key: tuple, value: object) -> None:
        table[key] = value
        while len(table) > CACHE_LIMIT:
            table.popitem(last=False)


CACHE = _Cache()


def _resolve(pin_dc: float, output_current: float) -> tuple[float, float]:
    v = round(pin_dc / VOLT_RESOLUTION) * VOLT_RESOLUTION
    i = round(output_current / AMPERE_RESOLUTION) * AMPERE_RESOLUTION
    return float(f"{v:.12g}"), float(f"{i:.12g}")


class NetlistSolver:
    """ngspice answers for one netlist, cached."""

    def __init__(self, spec: NetlistSpec) -> None:
        self.spec = spec
        self._base = (spec.sha256, spec.subcircuit.lower(), spec.temperature)

    def check(self) -> None:
        """Run the netlist once with the pin at 0 V: it must parse and the subcircuit load
        (NetlistInvalid otherwise, quoting ngspice's error lines)."""
        run = _run(self.spec, deck_text(self.spec, 0.0, 0.0, ()))
        if _parse_failed(run) or (
            _printed(run.stdout, f"v({OUTPUT_NODE})") is None and not _not_converged(run)
        ):
            raise NetlistInvalid(
                f"{self.spec.where}: ngspice cannot use it: {_error_lines(run.stderr + run.stdout)}"
            )

    def operating_point(self, pin_dc: float, output_current: float) -> OperatingSolution:
        v, i = _resolve(pin_dc, output_current)
        key = (*self._base, v, i)
        with CACHE.lock:
            found = CACHE.ops.get(key)
        if found is not None:
            return found
        self.small_signal(v, i, ())
        with CACHE.lock:
            return CACHE.ops[key]

    def small_signal(
        self, pin_dc: float, output_current: float, frequencies: Iterable[float]
    ) -> tuple[np.ndarray, np.ndarray]:
        """(V_out/V_pin, pin admittance) at each frequency (Hz > 0)."""
        v, i = _resolve(pin_dc, output_current)
        freqs = [float(f) for f in frequencies]
        op_key = (*self._base, v, i)
        with CACHE.lock:
            missing = sorted({f for f in freqs if (*op_key, f) not in CACHE.ac})
            have_op = op_key in CACHE.ops
        if missing or not have_op:
            self._solve(v, i, missing)
        with CACHE.lock:
            pairs = [CACHE.ac[(*op_key, f)] for f in freqs]
        transfer = np.array([p[0] for p in pairs], dtype=complex)
        admittance = np.array([p[1] for p in pairs], dtype=complex)
        return transfer, admittance

    def _solve(self, v: float, i: float, freqs: list[float]) -> None:
        if any(not (f > 0 and math.isfinite(f)) for f in freqs):
            raise ValueError("frequencies must be positive and finite")
        run = _run(self.spec, deck_text(self.spec, v, i, freqs))
        with CACHE.lock:
            CACHE.runs += 1
        point = describe_point(v, i)
        if _parse_failed(run):
            raise NetlistInvalid(
                f"{self.spec.where}: ngspice cannot use it: {_error_lines(run.stderr)}"
            )
        out = _printed(run.stdout, f"v({OUTPUT_NODE})")
        current = _printed(run.stdout, f"i({SOURCE})")
        if (
            out is None
            or current is None
            or not (math.isfinite(out) and math.isfinite(current))
            or _not_converged(run)
        ):
            raise NetlistNotConverged(
                f"{self.spec.where}: no DC operating point at {point} (ngspice: "
                f"{_error_lines(run.stderr + run.stdout)}). Check the circuit there: a node "
                "without a DC path, a source without a solution, a supply below the circuit's "
                "range."
            )
        solution = OperatingSolution(input_current=-current, output_dc=out)
        answers: dict[float, tuple[complex, complex]] = {}
        if freqs:
            rows = run.ac_rows
            if rows is None or rows.shape != (len(freqs), 6):
                raise NetlistNotConverged(
                    f"{self.spec.where}: no small-signal solution at {point} "
                    f"(ngspice: {_error_lines(run.stderr + run.stdout)})"
                )
            for f, row in zip(freqs, rows, strict=True):
                if not math.isclose(row[0], f, rel_tol=1e-12):
                    raise NetlistNotConverged(
                        f"{self.spec.where}: ngspice analysed {row[0]!r} Hz, not {f!r} Hz"
                    )
                answers[f] = (complex(row[1], row[2]), -complex(row[4], row[5]))
        key = (*self._base, v, i)
        with CACHE.lock:
            CACHE.keep(CACHE.ops, key, solution)
            for f, answer in answers.items():
                CACHE.keep(CACHE.ac, (*key, f), answer)


# -- the device ------------------------------------------------------------------------------------
class _OperatingPin:
    """The pin impedance seen by code that asks without an operating point (the last one
    solved; before any, the pin at 0 V). The simulator's physics asks with the point."""

    def __init__(self, device: NetlistDevice) -> None:
        self.device = device

    def admittance(self, f: np.ndarray) -> np.ndarray:
        return self.device.pin_admittance(f, self.device.last_point)


@dataclass(eq=False)
class NetlistDevice:
    """A device-under-test model solved by ngspice (see the module docstring)."""

    spec: NetlistSpec
    board_load_current: float = 0.0  # A drawn from the output by the board itself (DC sink)
    white_noise: float = 40e-9  # V/√Hz at the output
    flicker_corner: float = 0.0  # Hz
    noise_bandwidth: float = 100e3  # Hz
    kind: str = "netlist"
    last_point: OperatingPoint = field(default_factory=lambda: OperatingPoint(0.0, 0.0))

    def __post_init__(self) -> None:
        self.solver = NetlistSolver(self.spec)

    @property
    def pin(self) -> PinImpedance:  # type: ignore[override]
        return _OperatingPin(self)  # type: ignore[return-value]

    def check(self) -> None:
        self.solver.check()

    def preflight(self, points: Iterable[OperatingPoint]) -> None:
        """Solve the DC operating point at each of ``points`` (NetlistNotConverged names the
        first that fails)."""
        for op in points:
            if op.pin_dc > 0:
                self.solver.operating_point(op.pin_dc, op.output_current)

    def _current(self, op: OperatingPoint) -> float:
        return max(op.output_current, 0.0)

    def transfer(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        f = np.atleast_1d(np.asarray(f, dtype=float))
        if op.pin_dc <= 0:
            return np.zeros(f.shape, dtype=complex)
        self.last_point = op
        transfer, _ = self.solver.small_signal(op.pin_dc, self._current(op), f)
        return transfer

    def pin_admittance(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        """Current into the pin per volt (S) at each frequency, at ``op``."""
        f = np.atleast_1d(np.asarray(f, dtype=float))
        if op.pin_dc <= 0:
            op = OperatingPoint(0.0, 0.0)
        self.last_point = op
        _, admittance = self.solver.small_signal(op.pin_dc, self._current(op), f)
        return admittance

    def output_dc(self, op: OperatingPoint) -> float:
        if op.pin_dc <= 0:
            return 0.0
        return self.solver.operating_point(op.pin_dc, self._current(op)).output_dc

    def input_current(self, op: OperatingPoint) -> float:
        if op.pin_dc <= 0:
            return 0.0
        return self.solver.operating_point(op.pin_dc, self._current(op)).input_current

    def noise_density(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        f = np.maximum(np.asarray(f, dtype=float), 1e-3)
        return self.white_noise * np.sqrt(1.0 + self.flicker_corner / f)


def netlist_device_from_section(section: Section, folder: Path) -> NetlistDevice:
    """A NetlistDevice from a scenario's [device] table (model = "netlist"); the netlist is
    read relative to ``folder`` (the scenario file's folder) and run once to check it."""
    name = section.text("netlist")
    subcircuit = section.text("subcircuit")
    temperature = section.number("temperature_c", default=None)
    values: dict[str, float] = {}
    if section.has("board_load_current"):
        values["board_load_current"] = section.quantity("board_load_current", "A", nonnegative=True)
    if section.has("white_noise_nv_per_root_hz"):
        values["white_noise"] = section.number("white_noise_nv_per_root_hz", positive=True) * 1e-9
    for key in ("flicker_corner", "noise_bandwidth"):
        if section.has(key):
            values[key] = section.quantity(key, "Hz", nonnegative=True)
    section.done()
    spec = read_netlist(folder / name, subcircuit, section.source, temperature)
    device = NetlistDevice(spec, **values)
    device.check()
    return device
