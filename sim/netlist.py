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

Large-signal mode (opt-in, ``[device.large_signal]``): at the points its conditions choose,
a transient analysis drives the pin with DC plus the ripple the injector delivers there (its
fundamental and any harmonics, as periodic sources) for a bounded number of cycles, and the
output's last whole cycles give the output's harmonics and mean level: dropout, clipping and
slew of the device then reach the scope as on the board. Cached per operating point,
frequency and pin ripple.

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
from typing import Any

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
    """ngspice found no DC operating point (or no small-signal or transient solution) at one
    point."""


LARGE_SIGNAL_HARMONICS = 63  # output harmonics kept from a transient analysis
RIPPLE_RESOLUTION = 1e-7  # V: pin ripple phasors of a transient analysis are resolved to this


@dataclass(frozen=True)
class LargeSignal:
    """Which points get a transient analysis, and how long it runs (``[device.large_signal]``).

    A point is chosen when every condition holds: pin ripple at or above ``min_ripple`` (V
    peak), generator frequency within [``frequency_from``, ``frequency_to``], pin DC at or below
    ``pin_dc_below``. The analysis runs max(``settle_cycles``, ``settle`` · f) cycles, at most
    ``max_cycles`` − ``analysed_cycles``, then ``analysed_cycles`` whole cycles are kept, with
    a time step of at most one ``steps_per_cycle``-th of a period.
    """

    enabled: bool = True
    min_ripple: float = 0.0  # V peak at the pin
    frequency_from: float = 0.0  # Hz
    frequency_to: float = math.inf  # Hz
    pin_dc_below: float = math.inf  # V
    settle: float = 5e-3  # s simulated before the analysed cycles (bounded by max_cycles)
    settle_cycles: int = 5
    max_cycles: int = 400
    analysed_cycles: int = 2
    steps_per_cycle: int = 256

    def applies(self, frequency: float, pin_peak: float, pin_dc: float) -> bool:
        return (
            self.enabled
            and pin_peak > 0
            and pin_peak >= self.min_ripple
            and self.frequency_from <= frequency <= self.frequency_to
            and pin_dc <= self.pin_dc_below
        )

    def settle_count(self, frequency: float) -> int:
        """Whole cycles simulated before the analysed ones at ``frequency``."""
        wanted = max(self.settle_cycles, math.ceil(self.settle * frequency - 1e-9))
        return max(1, min(wanted, self.max_cycles - self.analysed_cycles))


@dataclass(frozen=True)
class LargeSignalOutput:
    """One transient analysis: output harmonics 1..K (V peak phasors at k·f, phase zero where
    the pin's fundamental peaks) and the output's mean level over the analysed cycles."""

    harmonics: np.ndarray
    mean: float


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


def transient_deck(
    spec: NetlistSpec,
    pin_dc: float,
    output_current: float,
    frequency: float,
    pin_harmonics: Sequence[complex],
    settle_cycles: int,
    analysed_cycles: int,
    steps_per_cycle: int,
) -> str:
    """The transient deck: the pin driven by DC plus one sine source per harmonic of the pin
    ripple (in series; A·cos(kωt + θ) written as SIN with phase θ + 90°), the DC current sink
    on the output, ``tran`` from the operating point with the step at most T/steps_per_cycle,
    kept from ``settle_cycles`` periods on, resampled on that grid (``linearize``) and
    written with 16 digits."""
    period = 1.0 / frequency
    step = period / steps_per_cycle
    start = settle_cycles * period
    stop = (settle_cycles + analysed_cycles) * period
    used = [(k, h) for k, h in enumerate(pin_harmonics, start=1) if abs(h) > 0]
    lines = ["benchseq netlist device, transient", f'.include "{spec.path}"']
    for n, (k, h) in enumerate(used):
        top = PIN_NODE if n == 0 else f"bsq_h{n}"
        bottom = "0" if n == len(used) - 1 else f"bsq_h{n + 1}"
        name = SOURCE if n == 0 else f"vbsq_h{n}"
        offset = _number(pin_dc) if n == 0 else "0"
        dc = f"DC {_number(pin_dc)} " if n == 0 else ""
        phase = math.degrees(math.atan2(h.imag, h.real)) + 90.0
        lines.append(
            f"{name} {top} {bottom} {dc}SIN({offset} {_number(abs(h))} "
            f"{_number(k * frequency)} 0 0 {_number(phase)})"
        )
    lines += [
        f"ibsq_load {OUTPUT_NODE} 0 DC {_number(output_current)}",
        f"xbsq_dut {PIN_NODE} {OUTPUT_NODE} 0 {spec.subcircuit}",
    ]
    if spec.temperature is not None:
        lines.append(f".options temp={_number(spec.temperature)}")
    lines += [
        ".control",
        "set numdgt=16",
        f"tran {_number(step)} {_number(stop)} {_number(start)} {_number(step)}",
        f"linearize v({OUTPUT_NODE})",
        f"wrdata tran.txt v({OUTPUT_NODE})",
        "quit",
        ".endc",
        ".end",
    ]
    return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class _Run:
    stdout: str
    stderr: str
    returncode: int
    ac_rows: np.ndarray | None


def _read_rows(path: Path) -> np.ndarray | None:
    """The numeric rows of a ``wrdata`` file (header lines skipped), or None without one."""
    if not path.exists():
        return None
    parsed = []
    for line in path.read_text(encoding="ascii", errors="replace").splitlines():
        try:
            parsed.append([float(x) for x in line.split()])
        except ValueError:
            continue  # a header line (repeated by appendwrite)
    return np.array([r for r in parsed if r])


def _run(spec: NetlistSpec, deck: str, output: str = "ac.txt") -> _Run:
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
        rows = _read_rows(Path(tmp) / output)
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


def _transient_reason(run: _Run, limit: int = 3) -> str:
    """ngspice's own words on why a transient analysis stopped (distinct lines), else its
    error lines."""
    picked: list[str] = []
    for line in (run.stderr + "\n" + run.stdout).splitlines():
        text = line.strip()
        if (
            text
            and text not in picked
            and (_NO_CONVERGENCE.search(text) or "singular matrix" in text.lower())
        ):
            picked.append(text)
    return "; ".join(picked[:limit]) or _error_lines(run.stderr + run.stdout)


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
        self.tran: OrderedDict[tuple, LargeSignalOutput] = OrderedDict()
        self.runs = 0  # ngspice runs made (for benchmarks and tests)
        self.transient_runs = 0  # of which transient analyses

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

    def large_signal(
        self,
        pin_dc: float,
        output_current: float,
        frequency: float,
        pin_harmonics: Sequence[complex] | np.ndarray,
        settings: LargeSignal,
    ) -> LargeSignalOutput:
        """The output's harmonics and mean level from a transient analysis with the pin at
        DC plus ``pin_harmonics`` (V peak phasors at k·``frequency``, phase zero at t = 0)."""
        if not (frequency > 0 and math.isfinite(frequency)):
            raise ValueError("the frequency must be positive and finite")
        v, i = _resolve(pin_dc, output_current)
        harmonics = np.asarray(pin_harmonics, dtype=complex)
        if harmonics.size == 0 or abs(harmonics[0]) == 0:
            raise ValueError("a transient analysis needs a pin ripple")
        # time invariance: solve with the fundamental as sin(ωt) (the pin starts at its DC
        # level, no step at t = 0), turn the answer back
        turn = 1j * harmonics[0] / abs(harmonics[0])
        order = np.arange(1, harmonics.size + 1)
        aligned = harmonics * turn.conjugate() ** order
        resolved = tuple(
            complex(round(h.real / RIPPLE_RESOLUTION), round(h.imag / RIPPLE_RESOLUTION))
            for h in aligned
        )
        while len(resolved) > 1 and resolved[-1] == 0:
            resolved = resolved[:-1]
        settle = settings.settle_count(frequency)
        grid = (settle, settings.analysed_cycles, settings.steps_per_cycle)
        key = (*self._base, v, i, float(frequency), resolved, grid)
        with CACHE.lock:
            found = CACHE.tran.get(key)
        if found is None:
            drive = [complex(h.real, h.imag) * RIPPLE_RESOLUTION for h in resolved]
            found = self._transient(v, i, float(frequency), drive, settings, settle)
            with CACHE.lock:
                CACHE.keep(CACHE.tran, key, found)
        count = found.harmonics.size
        return LargeSignalOutput(
            harmonics=found.harmonics * turn ** np.arange(1, count + 1), mean=found.mean
        )

    def _transient(
        self,
        v: float,
        i: float,
        frequency: float,
        drive: list[complex],
        settings: LargeSignal,
        settle: int,
    ) -> LargeSignalOutput:
        cycles, per_cycle = settings.analysed_cycles, settings.steps_per_cycle
        deck = transient_deck(self.spec, v, i, frequency, drive, settle, cycles, per_cycle)
        run = _run(self.spec, deck, output="tran.txt")
        with CACHE.lock:
            CACHE.runs += 1
            CACHE.transient_runs += 1
        point = (
            f"{describe_point(v, i)}, {frequency:.6g} Hz, pin ripple "
            f"{2.0 * abs(drive[0]) * 1e3:.6g} mVpp"
        )
        if _parse_failed(run):
            raise NetlistInvalid(
                f"{self.spec.where}: ngspice cannot use it: {_error_lines(run.stderr)}"
            )
        wanted = cycles * per_cycle
        rows = run.ac_rows
        if (
            _not_converged(run)
            or rows is None
            or rows.ndim != 2
            or rows.shape[0] < wanted
            or rows.shape[1] < 2
            or not np.all(np.isfinite(rows[:wanted, 1]))
        ):
            raise NetlistNotConverged(
                f"{self.spec.where}: the transient analysis at {point} did not complete "
                f"(ngspice: {_transient_reason(run)}). Check the circuit's "
                "behaviour over the ripple's swing there (a node without a DC path, a "
                "discontinuous model, a supply below the circuit's range), or narrow the "
                "points [device.large_signal] chooses."
            )
        wave = rows[:wanted, 1]
        spectrum = np.fft.rfft(wave) / wanted
        count = min(LARGE_SIGNAL_HARMONICS, per_cycle // 2 - 1)
        harmonics = 2.0 * spectrum[cycles : (count + 1) * cycles : cycles]
        return LargeSignalOutput(harmonics=harmonics, mean=float(spectrum[0].real))


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
    large_signal_settings: LargeSignal | None = None  # None: small-signal everywhere
    last_point: OperatingPoint = field(default_factory=lambda: OperatingPoint(0.0, 0.0))

    def __post_init__(self) -> None:
        self.solver = NetlistSolver(self.spec)

    @property
    def pin(self) -> PinImpedance:
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

    def large_signal(
        self, frequency: float, pin_harmonics: np.ndarray, op: OperatingPoint
    ) -> LargeSignalOutput | None:
        """The output from a transient analysis, where ``[device.large_signal]`` chooses this
        point (pin ripple ``pin_harmonics`` at k·``frequency``); None elsewhere (the
        small-signal answer stands)."""
        settings = self.large_signal_settings
        if settings is None or op.pin_dc <= 0 or len(pin_harmonics) == 0:
            return None
        if not settings.applies(frequency, abs(complex(pin_harmonics[0])), op.pin_dc):
            return None
        return self.solver.large_signal(
            op.pin_dc, self._current(op), frequency, pin_harmonics, settings
        )


def large_signal_from_section(section: Section) -> LargeSignal:
    """``[device.large_signal]``: see LargeSignal (ripple as an amplitude, e.g. "500 mVpp")."""
    values: dict[str, object] = {"enabled": section.flag("enabled", default=True)}
    if section.has("ripple_above"):
        values["min_ripple"] = section.amplitude("ripple_above").peak
    for key in ("frequency_from", "frequency_to"):
        if section.has(key):
            values[key] = section.quantity(key, "Hz", positive=True)
    if section.has("pin_dc_below"):
        values["pin_dc_below"] = section.quantity("pin_dc_below", "V", positive=True)
    if section.has("settle"):
        values["settle"] = section.quantity("settle", "s", nonnegative=True)
    values["settle_cycles"] = section.integer("settle_cycles", default=5, minimum=1, maximum=10_000)
    values["analysed_cycles"] = section.integer(
        "analysed_cycles", default=2, minimum=1, maximum=100
    )
    values["max_cycles"] = section.integer("max_cycles", default=400, minimum=2, maximum=100_000)
    values["steps_per_cycle"] = section.integer(
        "steps_per_cycle", default=256, minimum=32, maximum=4096
    )
    section.done()
    settings = LargeSignal(**values)  # type: ignore[arg-type]
    if settings.frequency_from > settings.frequency_to:
        raise section.error(
            "frequency_from",
            f"{settings.frequency_from:g} Hz is above frequency_to ({settings.frequency_to:g} Hz)",
        )
    if settings.max_cycles <= settings.analysed_cycles:
        raise section.error(
            "max_cycles",
            f"{settings.max_cycles} leaves no settling cycles before the "
            f"{settings.analysed_cycles} analysed ones",
        )
    return settings


def netlist_device_from_section(section: Section, folder: Path) -> NetlistDevice:
    """A NetlistDevice from a scenario's [device] table (model = "netlist"); the netlist is
    read relative to ``folder`` (the scenario file's folder) and run once to check it."""
    name = section.text("netlist")
    subcircuit = section.text("subcircuit")
    temperature = section.number("temperature_c", default=None)
    values: dict[str, Any] = {}  # keyword arguments of NetlistDevice
    if section.has("board_load_current"):
        values["board_load_current"] = section.quantity("board_load_current", "A", nonnegative=True)
    if section.has("white_noise_nv_per_root_hz"):
        values["white_noise"] = section.number("white_noise_nv_per_root_hz", positive=True) * 1e-9
    for key in ("flicker_corner", "noise_bandwidth"):
        if section.has(key):
            values[key] = section.quantity(key, "Hz", nonnegative=True)
    large = section.section("large_signal", required=False)
    settings = large_signal_from_section(large) if large is not None else None
    section.done()
    spec = read_netlist(folder / name, subcircuit, section.source, temperature)
    device = NetlistDevice(spec, large_signal_settings=settings, **values)
    device.check()
    return device
