"""Channel-match calibration: both probes on the device's supply pin, the plan's frequencies
swept, the complex ratio H_cal(f) = V_out-channel / V_pin-channel stored with its
uncertainty and the conditions it was made under (a CAL.h5 file), and divided out of later
runs (benchseq.runner applies the file a bench names as ``scope.calibration``).

The sweep reuses the sequencer (power-up, ranging, capture planning, trims, safe state) with
no calibration applied; a collector turns its stored rows into the calibration table. With
both probes on the pin the output channel sees the whole pin ripple, so it is calibrated on
the pin's range, not on the small ranges a run uses on the device's output: range-dependent
gain of the output channel is NOT covered. The ranges used are recorded per frequency, and
the run's metadata says so (see ``RANGE_NOTE``).

CAL.h5 layout (plain h5py)::

    /              attrs: format="benchseq-calibration", schema_version, calibration_id,
                   created (UTC, ISO 8601), software, bench_name, bench_sha256, plan_sha256,
                   span_low_hz, span_high_hz, point_count, simulated
    /meta/json     every item of the metadata as JSON (authoritative)
    /meta/bench_text, /meta/plan_text   the files the calibration was made from
    /conditions    attrs: the scalar conditions (probes, coupling, bandwidth limit, scope
                   identity, ripple, DC level); json: all conditions as JSON
    /table/<col>   one 1-D dataset per column (attrs units, description: the result file's
                   conventions, benchseq.h5layout); the group's "columns" attr gives the
                   order; ratio is HDF5 complex128

The file is written to a temporary file in the same folder, fsync'd, then renamed into
place (or hard-linked, which refuses an existing file, when overwriting is not allowed);
an existing file is never replaced without ``force``.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
import math
import os
import platform
import time
import uuid
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from benchseq import __version__
from benchseq.analysis import DB_PER_NEPER, AnalysisError, ChannelCalibration
from benchseq.bench import Bench, describe_band, load_bench
from benchseq.cautions import PROBE_CAUTION
from benchseq.coupling import high_pass
from benchseq.errors import BadInput, MeasurementFailure
from benchseq.h5layout import UNITS_ATTR
from benchseq.journal import fsync_directory, fsync_fd
from benchseq.plan import Plan, load_plan, parse_plan
from benchseq.records import SHOWN_COVERAGE_FACTOR
from benchseq.store import OutputExists
from benchseq.tomlfile import parse_toml_text

FORMAT = "benchseq-calibration"
SCHEMA_VERSION = 1
CONDITIONS_FLAG = "calibration_conditions"  # the per-point flag (benchseq.records.FLAG_TEXT)
TARGET_UNCERTAINTY_DB = 0.003  # the sweep aims at this per point (k = 1), tighter than runs
SHOWN_K = SHOWN_COVERAGE_FACTOR  # the table shows U = k·u; the file stores u (k = 1)
MAX_CHANNEL_MISMATCH_DB = 6.0  # more than this between two probes on one node: wiring fault
DEFAULT_PLAN_SOURCE = "benchseq:default-calibration-sweep"
# Without --plan (simulated benches only): the frequencies and levels of plans/demo.toml.
DEFAULT_PLAN_TEXT = """\
title = "Channel-match calibration, default sweep (simulated bench)"
[device]
name = "device of the simulated bench"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }
"""
RANGE_NOTE = (
    "both probes were on the pin, so the output channel was calibrated on the pin ripple's "
    "range; a run uses smaller output ranges: range-dependent gain of the output channel is "
    "not covered by this calibration"
)


class CalibrationExists(OutputExists):
    """The calibration file exists and overwriting was not asked for."""


class ProbeNotOnPin(MeasurementFailure):
    """A calibration point shows the two probes on different nodes: the run stopped there."""


class CalibrationCancelled(BadInput):
    """The operator did not confirm the probes on the pin: nothing was switched on."""


# -- the table -------------------------------------------------------------------------------
@dataclass(frozen=True)
class TableColumn:
    name: str
    unit: str
    description: str


TABLE_COLUMNS: tuple[TableColumn, ...] = (
    TableColumn("frequency", "Hz", "frequency of the calibration point (refined by the fit)"),
    TableColumn("frequency_planned", "Hz", "frequency asked for by the calibration sweep"),
    TableColumn("ratio", "", "H_cal = V_out-channel / V_pin-channel, both probes on the pin"),
    TableColumn("gain_db", "dB", "20*log10(|H_cal|)"),
    TableColumn("phase_deg", "deg", "arg(H_cal), output channel minus pin channel"),
    TableColumn("uncertainty", "", "relative standard uncertainty of |H_cal| (k = 1)"),
    TableColumn("phase_uncertainty_deg", "deg (k=1)", "standard uncertainty of arg(H_cal) (k = 1)"),
    TableColumn(
        "uncertainty_fit",
        "",
        "relative uncertainty of |H_cal| from the sine fits alone (before any Birge scaling)",
    ),
    TableColumn(
        "uncertainty_quantiser",
        "",
        "relative uncertainty of |H_cal| from both channels' quantiser bounds (rectangular)",
    ),
    TableColumn(
        "pin_range", "V (pp)", "pin channel full-scale range at the probe tip, peak to peak"
    ),
    TableColumn(
        "output_range", "V (pp)", "output channel full-scale range at the probe tip, peak to peak"
    ),
    TableColumn("pin_amplitude", "V (peak)", "ripple amplitude at the pin during the point, peak"),
    TableColumn("bench_time", "s", "bench time spent on the point"),
    TableColumn("flags", "", "the sequencer's flags of the point (space-separated)"),
)


def quantiser_bound(amplitude_codes: np.ndarray) -> np.ndarray:
    """Largest relative error of a fitted fundamental that a uniform quantiser without dither
    can cause, for a sine of ``amplitude_codes`` peak (in steps).

    The quantiser's mean transfer is x + Σ_k (−1)^k/(πk)·e^{−2π²k²σ²}·sin(2πkx) (Widrow &
    Kollár, Quantization Noise, 2008, ch. 5); the fundamental of sin(2πk·A·cos θ + b) is
    2·J₁(2πkA)·cos b, and |J₁(z)| ≤ 0.8/√z (the asymptote √(2/(πz)), rounded up), so with
    σ = 0 the error is at most 1.6·ζ(3/2)/(π·√(2π))·A^{−3/2} = 0.531·A^{−3/2} (ζ(3/2) =
    2.612). Noise dither shrinks each term by e^{−2π²k²σ²}, so this is conservative. The
    error is in phase with the sine: it moves the amplitude, not the phase."""
    a = np.maximum(np.asarray(amplitude_codes, dtype=float), 1.0)
    return 0.531 * a**-1.5


def table_from_rows(
    rows: list[Mapping[str, Any]],
    couplings: tuple[str, str] = ("AC", "AC"),
    ac_corner_hz: float = 0.0,
) -> dict[str, np.ndarray]:
    """The calibration table from the sequencer's stored rows (no calibration applied).

    The rows' phasors are referred to the nodes (the sequencer divides the scope's measured
    AC-coupling loss out); ``couplings`` (pin, output) and ``ac_corner_hz`` give the
    amplitudes at the converters back for the quantiser bound. The ratio is the channels'
    own, unaffected by that referral.

    Uncertainty of |H| (relative, k = 1; GUM, JCGM 100 §5.1.2): the sine fits' own,
    √((σ_pin/A_pin)² + (σ_out/A_out)²) — the channels' noise taken as uncorrelated, which is
    conservative since both probes share the pin's own noise — combined with each channel's
    quantiser bound (``quantiser_bound``) taken as a rectangular distribution (bound/√3).
    Uncertainty of arg H: the fits' figure in radians (σ_θ = σ_A/A for a sine fit; Kay,
    Estimation Theory, ch. 3). When the points scatter about their neighbours more than these allow
    (coloured noise, say), each part is multiplied by its Birge ratio (``birge_ratio``).
    """
    rows = sorted(rows, key=lambda r: float(r["frequency_fitted"]))
    bad = [r for r in rows if r["is_bound"] or not np.isfinite(complex(r["ratio"]))]
    if bad:
        where = ", ".join(f"{float(r['frequency_planned']):.6g} Hz" for r in bad)
        raise MeasurementFailure(
            f"calibration: the output channel did not see the pin's ripple at {where}; "
            "is its probe on the pin? Nothing was written."
        )
    ratio = np.array([complex(r["ratio"]) for r in rows])
    gain_db = 20.0 * np.log10(np.abs(ratio))
    wrong = np.abs(gain_db) > MAX_CHANNEL_MISMATCH_DB
    if np.any(wrong):
        worst = int(np.argmax(np.abs(gain_db)))
        raise MeasurementFailure(
            f"calibration: the two channels differ by {gain_db[worst]:+.1f} dB at "
            f"{float(rows[worst]['frequency_planned']):.6g} Hz with both probes on one node "
            f"(more than {MAX_CHANNEL_MISMATCH_DB:g} dB): check that the output probe is on "
            "the pin and that the bench file's probe attenuations are right. Nothing was written."
        )

    def column(name: str) -> np.ndarray:
        return np.array([float(r[name]) for r in rows])

    pin = np.array([abs(complex(r["pin"])) for r in rows])
    out = np.array([abs(complex(r["output"])) for r in rows])
    pin_range, out_range = column("pin_range"), column("output_range")
    u_fit = np.hypot(column("pin_sigma") / pin, column("output_sigma") / out)
    frequency = column("frequency_fitted")
    through = np.array([abs(high_pass(float(f), ac_corner_hz)) for f in frequency])
    pin_codes = pin * (through if couplings[0] == "AC" else 1.0) * 256.0 / pin_range
    out_codes = out * (through if couplings[1] == "AC" else 1.0) * 256.0 / out_range
    u_quant = np.hypot(quantiser_bound(pin_codes), quantiser_bound(out_codes)) / math.sqrt(3.0)
    u_mag = np.hypot(u_fit, u_quant)
    phase = np.unwrap(np.angle(ratio))
    birge_mag = birge_ratio(frequency, np.log(np.abs(ratio)), u_mag)
    birge_phase = birge_ratio(frequency, phase, u_fit)
    return {
        "frequency": frequency,
        "frequency_planned": column("frequency_planned"),
        "ratio": ratio,
        "gain_db": gain_db,
        "phase_deg": np.degrees(np.angle(ratio)),
        "uncertainty": u_mag * max(1.0, birge_mag),
        "phase_uncertainty_deg": np.degrees(u_fit * max(1.0, birge_phase)),
        "uncertainty_fit": u_fit,
        "uncertainty_quantiser": u_quant,
        "pin_range": pin_range,
        "output_range": out_range,
        "pin_amplitude": pin,
        "bench_time": column("bench_time"),
        "flags": np.array([str(r["flags"]) for r in rows], dtype=object),
    }


def birge_ratio(frequency: np.ndarray, values: np.ndarray, u: np.ndarray) -> float:
    """√(χ²/ν) of each interior point against the log-f interpolation of its neighbours.

    A channel match varies smoothly with frequency, so y_i minus the straight line in log f
    through y_{i−1} and y_{i+1} should scatter as the points' uncertainties say:
    var = u_i² + w²·u_{i−1}² + (1−w)²·u_{i+1}², ν = the number of interior points. A ratio
    above 1 says the uncertainties are too small [R. T. Birge, Phys. Rev. 40, 207 (1932),
    cited from memory: the consistency check of least-squares adjustments]. NaN with fewer
    than three points."""
    if frequency.size < 3:
        return float("nan")
    logf = np.log(frequency)
    y = np.asarray(values, dtype=float)
    w = (logf[2:] - logf[1:-1]) / (logf[2:] - logf[:-2])  # weight of the lower neighbour
    residual = y[1:-1] - (w * y[:-2] + (1.0 - w) * y[2:])
    variance = u[1:-1] ** 2 + (w * u[:-2]) ** 2 + ((1.0 - w) * u[2:]) ** 2
    if not np.all(variance > 0):
        return float("nan")
    return math.sqrt(float(np.sum(residual**2 / variance)) / residual.size)


# -- the file --------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class LoadedCalibration:
    """A CAL.h5 read back: the lookup table, the conditions, the metadata and every column."""

    path: Path
    sha256: str  # of the file's bytes
    table: ChannelCalibration
    conditions: dict[str, Any]
    meta: dict[str, Any]
    columns: dict[str, np.ndarray]

    @property
    def id(self) -> str:
        return str(self.meta.get("calibration_id", ""))

    @property
    def created(self) -> str:
        return str(self.meta.get("created", ""))

    @property
    def span(self) -> tuple[float, float]:
        return self.table.span

    def record(self) -> dict[str, Any]:
        """What a run stores about the calibration it applied (JSON-able)."""
        return {
            "path": str(self.path.resolve()),
            "sha256": self.sha256,
            "id": self.id,
            "created": self.created,
            "conditions": self.conditions,
            "span": list(self.span),
        }


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _scalar_attrs(target: Any, items: Mapping[str, Any]) -> None:
    for key, value in items.items():
        if isinstance(value, bool | int | float | str) and not (
            isinstance(value, str) and len(value) > 2048
        ):
            target.attrs[key] = value


def _write_layout(h5: h5py.File, meta: Mapping[str, Any], table: Mapping[str, np.ndarray]) -> None:
    h5.attrs["format"] = FORMAT
    h5.attrs["schema_version"] = SCHEMA_VERSION
    _scalar_attrs(
        h5,
        {
            k: meta[k]
            for k in (
                "calibration_id",
                "created",
                "software",
                "bench_name",
                "bench_sha256",
                "plan_sha256",
                "simulated",
                "point_count",
            )
            if k in meta
        },
    )
    h5.attrs["span_low_hz"] = float(np.min(table["frequency"]))
    h5.attrs["span_high_hz"] = float(np.max(table["frequency"]))
    text = h5py.string_dtype()
    group = h5.create_group("meta")
    group.create_dataset("json", data=json.dumps(meta, allow_nan=True), dtype=text)
    for key in ("bench_text", "plan_text"):
        if key in meta:
            group.create_dataset(key, data=str(meta[key]), dtype=text)
    conditions = dict(meta.get("conditions", {}))
    cgroup = h5.create_group("conditions")
    flat: dict[str, Any] = {}
    for key, value in conditions.items():
        if isinstance(value, Mapping):
            flat.update({f"{key}_{k}": v for k, v in value.items()})
        elif value is not None and not isinstance(value, list | tuple):
            flat[key] = value
    _scalar_attrs(cgroup, flat)
    cgroup.create_dataset("json", data=json.dumps(conditions, allow_nan=True), dtype=text)
    tgroup = h5.create_group("table")
    tgroup.attrs["columns"] = [c.name for c in TABLE_COLUMNS]
    for column in TABLE_COLUMNS:
        values = table[column.name]
        if column.name == "flags":
            ds = tgroup.create_dataset(column.name, data=[str(v) for v in values], dtype=text)
        elif column.name == "ratio":
            ds = tgroup.create_dataset(column.name, data=np.asarray(values, dtype=np.complex128))
        else:
            ds = tgroup.create_dataset(column.name, data=np.asarray(values, dtype=float))
        ds.attrs[UNITS_ATTR] = column.unit
        ds.attrs["description"] = column.description


def write_calibration(
    path: str | Path,
    meta: Mapping[str, Any],
    table: Mapping[str, np.ndarray],
    *,
    force: bool = False,
) -> Path:
    """Write a CAL.h5 atomically: temp file beside it, fsync, rename (link without force)."""
    path = Path(path)
    if path.exists() and not force:
        raise CalibrationExists(f"{path} exists; give --force to replace it")
    if path.exists() and path.is_dir():
        raise BadInput(f"{path} is a folder, not a calibration file")
    path.parent.mkdir(parents=True, exist_ok=True)
    temp = path.parent / f".{path.name}.{uuid.uuid4().hex[:12]}.tmp"
    try:
        with h5py.File(temp, "w", locking=False) as h5:
            _write_layout(h5, meta, table)
        fd = os.open(temp, os.O_RDWR | getattr(os, "O_BINARY", 0))
        try:
            fsync_fd(fd)
        finally:
            os.close(fd)
        if force:
            os.replace(temp, path)
        else:
            try:
                os.link(temp, path)  # refuses an existing name: never replaces a file
            except FileExistsError:
                raise CalibrationExists(f"{path} exists; give --force to replace it") from None
            except OSError:  # no hard links on this file system
                if path.exists():
                    raise CalibrationExists(f"{path} exists; give --force to replace it") from None
                os.replace(temp, path)
        fsync_directory(path.parent)
    finally:
        if temp.exists():
            temp.unlink()
    return path


def load_calibration(path: str | Path) -> LoadedCalibration:
    """Read a CAL.h5; BadInput naming the file when it is missing, unreadable or not one."""
    path = Path(path)
    if not path.is_file():
        raise BadInput(f"{path}: no such calibration file")
    try:
        with h5py.File(path, "r", locking=False) as h5:
            if h5.attrs.get("format") != FORMAT:
                raise BadInput(f"{path}: not a benchseq calibration file")
            version = int(h5.attrs.get("schema_version", 0))
            if not 1 <= version <= SCHEMA_VERSION:
                raise BadInput(
                    f"{path}: calibration schema version {version}; this benchseq reads "
                    f"versions 1 to {SCHEMA_VERSION}"
                )
            meta = json.loads(_text(h5["meta/json"][()]))
            conditions = json.loads(_text(h5["conditions/json"][()]))
            group = h5["table"]
            columns: dict[str, np.ndarray] = {}
            for name in group.attrs["columns"]:
                name = _text(name)
                data = group[name][()]
                if name == "flags":
                    data = np.array([_text(v) for v in data], dtype=object)
                columns[name] = np.asarray(data)
    except BadInput:
        raise
    except (OSError, KeyError, ValueError, TypeError) as exc:
        raise BadInput(f"{path}: unreadable calibration file ({exc})") from None
    try:
        table = ChannelCalibration.from_sweep(
            columns["frequency"], columns["ratio"], columns["uncertainty"]
        )
    except (KeyError, AnalysisError) as exc:
        raise BadInput(f"{path}: the calibration table is not usable ({exc})") from None
    return LoadedCalibration(path, _file_sha256(path), table, conditions, meta, columns)


def _text(value: Any) -> str:
    return value.decode("utf-8") if isinstance(value, bytes) else str(value)


# -- conditions ------------------------------------------------------------------------------
def bench_conditions(bench: Bench) -> dict[str, Any]:
    """The conditions of ``bench`` a channel match depends on (JSON-able)."""
    s = bench.scope
    spec = bench.instruments.get("scope")
    return {
        "pin": {"channel": s.pin.channel, "probe": s.pin.probe, "coupling": s.pin.coupling},
        "output": {
            "channel": s.output.channel,
            "probe": s.output.probe,
            "coupling": s.output.coupling,
        },
        "bandwidth_limit_hz": s.bandwidth_limit,
        "scope_address": spec.address if spec else "",
        "scope_profile": spec.profile if spec else "",
    }


def _identity_key(identity: str) -> tuple[str, ...]:
    """Maker, model and serial of an *IDN? reply (the firmware field is not compared)."""
    return tuple(part.strip().lower() for part in str(identity).split(",")[:3])


def _bandwidth_text(value: float | None) -> str:
    return "off" if value is None else f"{value:.6g} Hz"


def condition_mismatches(
    loaded: LoadedCalibration, bench: Bench, identities: Mapping[str, str] | None = None
) -> list[str]:
    """Where the calibration's conditions differ from ``bench`` (and the scope's identity,
    when ``identities`` is given): one sentence each; empty when they agree."""
    cal = loaded.conditions
    now = bench_conditions(bench)
    found: list[str] = []
    for role in ("pin", "output"):
        was, is_ = cal.get(role, {}), now[role]
        if was.get("channel") != is_["channel"]:
            found.append(
                f"{role} channel: calibrated on CH{was.get('channel')}, "
                f"this bench uses CH{is_['channel']}"
            )
        probe = was.get("probe")
        if probe is None or not math.isclose(float(probe), is_["probe"], rel_tol=1e-9):
            found.append(
                f"{role} probe: calibrated with {probe}:1, this bench has {is_['probe']:g}:1"
            )
        if was.get("coupling") != is_["coupling"]:
            found.append(
                f"{role} coupling: calibrated {was.get('coupling')}, this bench {is_['coupling']}"
            )
    was_bw, is_bw = cal.get("bandwidth_limit_hz"), now["bandwidth_limit_hz"]
    if (was_bw is None) != (is_bw is None) or (
        was_bw is not None and is_bw is not None and not math.isclose(was_bw, is_bw, rel_tol=1e-6)
    ):
        found.append(
            f"bandwidth limit: calibrated {_bandwidth_text(was_bw)}, "
            f"this bench {_bandwidth_text(is_bw)}"
        )
    scope = identities.get("scope") if identities is not None else None
    if (
        scope is not None
        and cal.get("scope_identity")
        and _identity_key(scope) != _identity_key(cal["scope_identity"])
    ):
        found.append(f"scope: calibrated on '{cal['scope_identity']}', this run uses '{scope}'")
    return found


def uncovered_frequencies(loaded: LoadedCalibration, plan: Plan) -> list[float]:
    """The plan's frequencies outside the calibrated span (their points are not corrected)."""
    return [float(f) for f in plan.frequencies if not loaded.table.covers(float(f))]


# -- the calibration run -----------------------------------------------------------------------
class _Collector:
    """A writer for the Sequencer that keeps rows in memory (nothing on disk until the end)."""

    def __init__(self) -> None:
        self.rows: dict[int, dict[str, Any]] = {}
        self.meta: dict[str, Any] = {}
        self._last: dict[str, Any] | None = None
        self.status = "running"
        self.reason = ""
        self.wrong_node: str | None = None  # why the run stopped at a point (probe placement)

    @property
    def stored_ids(self) -> set[int]:
        return set(self.rows)

    def last_row(self) -> dict[str, Any] | None:
        return None if self._last is None else dict(self._last)

    def append(
        self,
        point_id: int,
        row: Mapping[str, Any],
        truth: Mapping[str, Any] | None = None,
        waveforms: Any = None,
    ) -> None:
        problem = probe_problem(row, first=not self.rows)
        if problem is not None:  # stop at once: the sequencer ends in the safe state
            self.wrong_node = problem
            raise ProbeNotOnPin(problem)
        self.rows[int(point_id)] = dict(row)
        self._last = dict(row)

    def update_meta(self, **items: Any) -> None:
        self.meta.update(items)

    def finish(
        self, status: str, traceback: str | None = None, reason: str | None = None, **items: Any
    ) -> None:
        self.status, self.reason = status, reason or ""
        self.meta.update(items)


def probe_problem(row: Mapping[str, Any], first: bool = True) -> str | None:
    """Why one calibration point shows the probes on different nodes, or None: the output
    channel did not see the pin's ripple, or the channels differ by more than
    MAX_CHANNEL_MISMATCH_DB (the output probe left on the device's output reads its ripple,
    the rejection lower)."""
    where = f"{float(row.get('frequency_planned', math.nan)):.6g} Hz"
    where = f"its first point ({where})" if first else where
    ratio = complex(row.get("ratio", complex(math.nan, 0)))
    if bool(row.get("is_bound")) or not np.isfinite(ratio) or ratio == 0:
        return (
            f"calibration stopped at {where}: the output channel did not see "
            "the pin's ripple; is its probe on the pin? Nothing was written."
        )
    gain_db = 20.0 * math.log10(abs(ratio))
    if abs(gain_db) > MAX_CHANNEL_MISMATCH_DB:
        return (
            f"calibration stopped at {where}: the two channels differ by {gain_db:+.1f} dB with "
            f"both probes meant to be on one node (more than {MAX_CHANNEL_MISMATCH_DB:g} dB): "
            "check that the output channel's probe is on the supply pin, not the device's "
            "output, and that the bench file's probe attenuations are right. Nothing was written."
        )
    return None


def guard_factor(plan: Plan) -> float:
    """How far beyond the plan's ends the sweep goes, so that a run's frequency stays inside
    the span: a run moves it by at most the plan's frequency_tolerance
    (benchseq.analysis.capture); the guard keeps a wider margin of 1/(2·min_cycles) + 1 %,
    which also holds the frequency the fit refines on the pin."""
    rules = plan.capture
    return 1.0 + max(rules.frequency_tolerance, 1.0 / (2.0 * max(rules.min_cycles, 1))) + 0.01


def calibration_plan(plan: Plan, frequencies: np.ndarray | None = None) -> Plan:
    """The sweep a calibration makes for ``plan``: its frequencies (or ``frequencies``) at
    its first ripple, first DC level and first load, to a tighter target uncertainty; no
    mask, linearity or floor checks."""
    freqs = np.unique(np.asarray(plan.frequencies if frequencies is None else frequencies))
    capture = dataclasses.replace(
        plan.capture,
        target_uncertainty_db=min(plan.capture.target_uncertainty_db, TARGET_UNCERTAINTY_DB),
    )
    return dataclasses.replace(
        plan,
        frequencies=freqs.astype(float),
        ripples=plan.ripples[:1],
        dc_levels=np.asarray(plan.dc_levels[:1], dtype=float),
        load_currents=None if plan.load_currents is None else plan.load_currents[:1],
        capture=capture,
        mask=None,
        linearity=None,
        floor=None,
    )


def _guarded_plan(plan: Plan, bench: Bench) -> tuple[Plan, Any, list[float], list[float]]:
    """The calibration plan with a guard point beyond each end where the feasibility check
    allows one; returns (plan, check report, guards kept, guards dropped)."""
    from benchseq.check import check_plan
    from benchseq.runner import RefusedPlan

    g = guard_factor(plan)
    base = np.asarray(plan.frequencies, dtype=float)
    guards = [float(base.min() / g), float(base.max() * g)]
    guards = [f for f in guards if f <= bench.generator.max_frequency]
    cal = calibration_plan(plan, np.concatenate([base, guards]))
    report = check_plan(cal, bench)
    refused = {float(f) for f in cal.expand().frequency[report.feasibility.refused]}
    dropped = [f for f in guards if f in refused]
    kept = [f for f in guards if f not in refused]
    if dropped:
        cal = calibration_plan(plan, np.concatenate([base, kept]))
        report = check_plan(cal, bench)
    if report.refused_count:
        raise RefusedPlan(
            f"{report.refused_count} of {report.point_count} calibration points are refused by "
            f"the feasibility check; nothing was switched on. Run `benchseq check {plan.source}` "
            "for the reasons."
        )
    return cal, report, kept, dropped


def probe_message(bench: Bench) -> str:
    """What the operator is asked to do before a calibration on a real bench."""
    s = bench.scope
    return (
        "Channel-match calibration: both probes on ONE node, the device's supply pin.\n"
        f"{PROBE_CAUTION}\n"
        f"Clip the output channel's probe (CH{s.output.channel}, {s.output.probe:g}:1, "
        f"{s.output.coupling}) to the supply pin beside the pin channel's probe "
        f"(CH{s.pin.channel}, {s.pin.probe:g}:1, {s.pin.coupling}), both ground leads to the "
        "same ground point close to the pin. Keep probes, coupling and bandwidth limit "
        f"({_bandwidth_text(s.bandwidth_limit)}) as the run will use them.\n"
        "Are both probes on the pin and the bench ready to be switched on?"
    )


@dataclass
class CalibrationResult:
    """A finished calibration: the file written and read back, with the sweep's figures."""

    path: Path
    loaded: LoadedCalibration
    outcome: Any  # benchseq.sequencer.RunOutcome of the sweep
    wall_time_s: float
    guards: list[float] = field(default_factory=list)
    dropped_guards: list[float] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def run_calibration(
    plan_path: str | Path | None,
    bench_path: str | Path | None,
    out: str | Path | None,
    *,
    force: bool = False,
    seed: int = 0,
    confirm: Callable[[str], bool] | None = None,
    emit: Any = None,
    stop: Any = None,
    session_factory: Any = None,
) -> CalibrationResult:
    """Calibrate the channel match of ``bench`` over ``plan``'s frequencies into ``out``.

    ``plan_path`` None is allowed on a simulated bench only (the default sweep: 10 Hz to
    1 MHz, 3 per decade, 100 mVpp at 5 V, as plans/demo.toml). ``out`` None uses the file
    the bench names as ``scope.calibration``. On a simulated bench the output probe is moved
    to the pin in the simulator; on a real bench ``confirm(message)`` must return True after
    the operator has clipped both probes to the pin (nothing is switched on before).
    ``session_factory(bench, seed=, faults=)`` replaces open_session (tests)."""
    from benchseq.drivers.session import open_session
    from benchseq.sequencer import Sequencer

    started = time.perf_counter()
    bench = load_bench(bench_path)
    if plan_path is None:
        if not bench.is_simulated:
            raise BadInput(
                "calibrate: give the plan the calibration is for (--plan): its frequencies, "
                "ripple and DC level are used; only a simulated bench has a default sweep"
            )
        text, data = parse_toml_text(DEFAULT_PLAN_TEXT, DEFAULT_PLAN_SOURCE)
        plan = parse_plan(data, DEFAULT_PLAN_SOURCE, text)
    else:
        plan = load_plan(plan_path)
    if out is None:
        if bench.scope.calibration is None:
            raise BadInput(
                "calibrate: give --out CAL.h5 (the bench file names no scope.calibration)"
            )
        out = bench.scope.calibration
    out = Path(out)
    if out.exists() and not force:
        raise CalibrationExists(f"{out} exists; give --force to replace it")
    cal_plan, report, guards, dropped = _guarded_plan(plan, bench)
    if not bench.is_simulated:
        if confirm is None:
            raise BadInput(
                "calibrating a real bench needs the operator to confirm both probes on the pin"
            )
        if not confirm(probe_message(bench)):
            raise CalibrationCancelled(
                "calibration cancelled: the probes were not confirmed on the pin; "
                "nothing was switched on"
            )

    opener = session_factory or open_session
    collector = _Collector()
    session = opener(bench, seed=seed, faults=None)
    try:
        simulator = getattr(session, "simulator", None)
        if simulator is not None:
            simulator.connect_probe(bench.scope.output.channel, "pin")
        identities = dict(session.identities)
        outcome = Sequencer(
            cal_plan,
            bench,
            session,
            collector,
            emit=emit,
            stop=stop,
            seed=seed,
            planned_bench_time=report.estimated_time_s,
            calibration=None,
            match_tolerance=False,  # the sweep measures the channel match itself
        ).run()
        if simulator is not None:
            simulator.connect_probe(bench.scope.output.channel, "output")
    finally:
        session.close()
    if collector.wrong_node is not None:
        steps = "; ".join(outcome.safe_state)
        raise ProbeNotOnPin(collector.wrong_node + (f" Safe state: {steps}." if steps else ""))
    if outcome.status != "complete" or outcome.not_safe:  # the reason names what is not safe
        raise MeasurementFailure(
            f"calibration {outcome.status} after {len(collector.rows)} of "
            f"{cal_plan.point_count} points: {outcome.reason}; nothing was written"
        )
    ac_corner = float(collector.meta.get("scope_ac_corner_hz", 0.0) or 0.0)
    table = table_from_rows(
        list(collector.rows.values()),
        (bench.scope.pin.coupling, bench.scope.output.coupling),
        ac_corner,
    )
    created = dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
    ripple = cal_plan.ripples[0]
    conditions = {
        **bench_conditions(bench),
        "scope_identity": identities.get("scope", ""),
        "ripple_peak_v": float(ripple.peak),
        "ripple_as_written": ripple.as_written(),
        "dc_level_v": float(cal_plan.dc_levels[0]),
        "pin_ranges_v": sorted({float(r) for r in table["pin_range"]}),
        "output_ranges_v": sorted({float(r) for r in table["output_range"]}),
        "both_probes_on": "pin",
        "created": created,
    }
    notes = [RANGE_NOTE]
    if dropped:
        notes.append(
            "guard point(s) at "
            + ", ".join(f"{f:.6g} Hz" for f in dropped)
            + " refused by the feasibility check: a run point at the plan's end may fall "
            "just outside the span and stay uncorrected"
        )
    notes.append(
        "move the output channel's probe back to the device's output before the next run"
        + (
            " (the simulated bench has moved it back itself)"
            if bench.is_simulated
            else "; de-energise the bench before moving it"
        )
    )
    meta = {
        "format": FORMAT,
        "schema_version": SCHEMA_VERSION,
        "calibration_id": str(uuid.uuid4()),
        "created": created,
        "software": f"benchseq {__version__}",
        "python": platform.python_version(),
        "bench_source": bench.source,
        "bench_name": bench.name,
        "bench_text": bench.text,
        "bench_sha256": bench.text_hash,
        "plan_source": plan.source,
        "plan_title": plan.title,
        "plan_text": plan.text,
        "plan_sha256": plan.text_hash,
        "simulated": bench.is_simulated,
        "simulation": bench.simulation or "",
        "seed": seed,
        "identities": identities,
        "conditions": conditions,
        "point_count": int(table["frequency"].size),
        "guard_frequencies_hz": guards,
        "dropped_guard_frequencies_hz": dropped,
        "target_uncertainty_db": cal_plan.capture.target_uncertainty_db,
        "scope_ac_corner_hz": ac_corner,
        "birge_ratio_magnitude": birge_ratio(
            table["frequency"],
            np.log(np.abs(table["ratio"])),
            np.hypot(table["uncertainty_fit"], table["uncertainty_quantiser"]),
        ),
        "birge_ratio_phase": birge_ratio(
            table["frequency"], np.unwrap(np.angle(table["ratio"])), table["uncertainty_fit"]
        ),
        "bench_time_s": outcome.bench_time,
        "safe_state": outcome.safe_state,
        "method": (
            "both probes on the pin; per frequency the sequencer's three-parameter sine fits "
            "of both channels on one time axis, ratio = output channel / pin channel; lookup "
            "interpolates log-magnitude and unwrapped phase linearly in log frequency, no "
            "extrapolation"
        ),
        "notes": notes,
    }
    path = write_calibration(out, meta, table, force=force)
    loaded = load_calibration(path)
    return CalibrationResult(
        path=path,
        loaded=loaded,
        outcome=outcome,
        wall_time_s=time.perf_counter() - started,
        guards=guards,
        dropped_guards=dropped,
        notes=notes,
    )


def calibration_summary(result: CalibrationResult | LoadedCalibration) -> dict[str, Any]:
    """The calibration as plain JSON types (for ``--json``)."""
    loaded = result.loaded if isinstance(result, CalibrationResult) else result
    c = loaded.columns
    summary: dict[str, Any] = {
        "file": str(loaded.path),
        "id": loaded.id,
        "created": loaded.created,
        "sha256": loaded.sha256,
        "span_hz": list(loaded.span),
        "conditions": loaded.conditions,
        "notes": list(loaded.meta.get("notes", [])),
        "points": [
            {
                "frequency_hz": float(c["frequency"][i]),
                "gain_db": float(c["gain_db"][i]),
                "phase_deg": float(c["phase_deg"][i]),
                "uncertainty_db": float(DB_PER_NEPER * c["uncertainty"][i]),
                "phase_uncertainty_deg": float(c["phase_uncertainty_deg"][i]),
                "pin_range_v": float(c["pin_range"][i]),
                "output_range_v": float(c["output_range"][i]),
                "flags": str(c["flags"][i]),
            }
            for i in range(c["frequency"].size)
        ],
    }
    if isinstance(result, CalibrationResult):
        summary["bench_time_s"] = float(result.outcome.bench_time)
        summary["wall_time_s"] = float(result.wall_time_s)
    return summary


# -- display ---------------------------------------------------------------------------------
def render_calibration(result: CalibrationResult | LoadedCalibration) -> Any:
    """A rich renderable: where, when, under which conditions, and the table."""
    from rich.console import Group
    from rich.markup import escape
    from rich.table import Table
    from rich.text import Text

    from benchseq.units import format_si

    loaded = result.loaded if isinstance(result, CalibrationResult) else result
    meta, cond, cols = loaded.meta, loaded.conditions, loaded.columns
    head = Text()
    head.append(f"channel-match calibration {loaded.path}\n", style="bold")
    head.append(f"id {loaded.id}, made {loaded.created} on {meta.get('bench_name', '')}\n")
    pin, outc = cond.get("pin", {}), cond.get("output", {})
    head.append(
        f"pin CH{pin.get('channel')} {pin.get('probe', 0):g}:1 {pin.get('coupling')}, "
        f"output CH{outc.get('channel')} {outc.get('probe', 0):g}:1 {outc.get('coupling')}, "
        f"bandwidth limit {_bandwidth_text(cond.get('bandwidth_limit_hz'))}; "
        f"scope {cond.get('scope_identity', '')}\n"
    )
    gain, phase = cols["gain_db"], cols["phase_deg"]
    head.append(
        f"{cols['frequency'].size} points over {describe_band(*loaded.span)} at "
        f"{cond.get('ripple_as_written', '')} and {cond.get('dc_level_v', float('nan')):g} V; "
        f"gain {gain.min():+.4f} to {gain.max():+.4f} dB, phase {phase.min():+.3f} to "
        f"{phase.max():+.3f}°"
    )
    if isinstance(result, CalibrationResult):
        head.append(
            f"\nbench time {result.outcome.bench_time:.1f} s, wall time {result.wall_time_s:.1f} s"
        )
    table = Table(title="H_cal = output channel / pin channel", title_justify="left")
    for name in (
        "frequency",
        "gain dB",
        f"± dB (k={SHOWN_K:g})",
        "phase °",
        f"± ° (k={SHOWN_K:g})",
        "pin range",
        "out range",
        "flags",
    ):
        table.add_column(name, justify="left" if name == "flags" else "right")
    for i in range(cols["frequency"].size):
        table.add_row(
            format_si(float(cols["frequency"][i]), "Hz", 4),
            f"{gain[i]:+.4f}",
            f"{SHOWN_K * DB_PER_NEPER * float(cols['uncertainty'][i]):.4f}",
            f"{phase[i]:+.3f}",
            f"{SHOWN_K * float(cols['phase_uncertainty_deg'][i]):.3f}",
            format_si(float(cols["pin_range"][i]), "Vpp", 3),
            format_si(float(cols["output_range"][i]), "Vpp", 3),
            escape(str(cols["flags"][i])),
        )
    parts: list[Any] = [head, table]
    parts += [Text(f"note: {note}", style="yellow") for note in meta.get("notes", [])]
    return Group(*parts)
