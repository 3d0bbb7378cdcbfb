"""What a report shows, gathered from result files: runs, curves per operating point,
mask verdicts, conditions, flags in use and the safety cautions. No rendering here."""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchseq.cautions import SAFETY_CAUTIONS as SAFETY_CAUTIONS  # the renderers import it here
from benchseq.errors import BadInput, BenchseqError
from benchseq.records import SHOWN_COVERAGE_FACTOR
from benchseq.units import format_si
from benchseq.verdict import MaskVerdict, mask_verdict

# uncertainty bars and the table's U are expanded uncertainties U = k·u, k = 2 (the file
# stores the standard uncertainty u, k = 1: benchseq.records)
COVERAGE_FACTOR = SHOWN_COVERAGE_FACTOR


@dataclass(frozen=True)
class OperatingPoint:
    """DC level (V), load current (A, nan without a load axis), ripple target (V peak)."""

    dc_level: float
    load_current: float
    ripple_peak: float
    convention: str = "pp"

    def label(self) -> str:
        parts = [format_si(self.dc_level, "V", 4) + " DC"]
        if math.isfinite(self.load_current):
            parts.append(format_si(self.load_current, "A", 3) + " load")
        parts.append(ripple_text(self.ripple_peak, self.convention))
        return ", ".join(parts)


def ripple_text(peak: float, convention: str) -> str:
    """A peak amplitude (V) written in the plan's convention: '100 mVpp', '50 mVpk', ..."""
    if convention == "rms":
        return format_si(peak / math.sqrt(2.0), "Vrms", 3)
    if convention in ("pk", "p"):
        return format_si(peak, "Vpk", 3)
    return format_si(2.0 * peak, "Vpp", 3)


@dataclass
class Curve:
    """Points of one run at one operating point, in frequency order."""

    source_index: int
    index: int  # position among all curves of the report (colours)
    operating_point: OperatingPoint
    frame: pd.DataFrame
    repeats: bool = False  # linearity repeats (drawn as loose markers)

    def label(self, with_source: str | None = None) -> str:
        text = self.operating_point.label()
        if self.repeats:
            text = "repeat at " + text
        return f"{with_source}: {text}" if with_source else text


@dataclass
class Source:
    """One result file and everything the report derives from it."""

    index: int
    path: Path
    meta: dict[str, Any]
    frame: pd.DataFrame
    truth: pd.DataFrame | None
    mask: Any  # benchseq.plan.Mask or None
    plan: Any  # benchseq.plan.Plan or None
    plan_problem: str  # why the stored plan could not be read ("" when it could)
    verdict: MaskVerdict
    curves: list[Curve] = field(default_factory=list)

    @property
    def run_id(self) -> str:
        return str(self.meta.get("run_id", ""))

    @property
    def label(self) -> str:
        """File name and short run id: says which file and run a curve comes from."""
        short = self.run_id[:8]
        return f"{self.path.name} (run {short})" if short else self.path.name

    @property
    def status(self) -> str:
        return str(self.meta.get("status", "unknown"))

    @property
    def stored(self) -> int:
        return len(self.frame)

    @property
    def planned(self) -> int | None:
        count = self.meta.get("point_count")
        return int(count) if isinstance(count, int | float) and math.isfinite(count) else None

    @property
    def partial(self) -> bool:
        """True unless the run completed with every planned point stored."""
        return self.status != "complete" or (
            self.planned is not None and self.stored < self.planned
        )

    def verdict_summary(self) -> str:
        """The verdict in a sentence; says so when the stored plan (and its mask) was unreadable."""
        if self.mask is None and self.plan_problem:
            return f"no mask verdict: the stored plan could not be read ({self.plan_problem})"
        return self.verdict.summary()

    def status_note(self) -> str:
        """Plain words on how complete the run is."""
        of = f" of {self.planned}" if self.planned is not None else ""
        stored = f"{self.stored}{of} planned points stored"
        if not self.partial:
            return f"complete: {stored}"
        reason = str(self.meta.get("reason", "") or "")
        why = {
            "stopped": "stopped by the user before the end",
            "aborted": "aborted by a fault",
            "running": "still running (its writer holds the file)",
            "interrupted": "its process ended without finishing (killed, crashed, power lost)",
        }.get(self.status, self.status)
        text = f"PARTIAL RUN ({self.status}): {why}; {stored}"
        if reason:
            text += f"; reason: {reason}"
        return text + ". Everything here covers the stored points only."


@dataclass
class Report:
    """Everything a report shows, for one or several result files (overlaid)."""

    sources: list[Source]
    generated: str  # ISO time the report was made
    software: str
    model: Any = None  # a circuit model's prediction (report.circuit_model.ModelOverlay)

    @property
    def title(self) -> str:
        first = self.sources[0]
        return str(first.meta.get("title") or first.path.stem)

    @property
    def curves(self) -> list[Curve]:
        return [c for s in self.sources for c in s.curves]

    @property
    def overlay(self) -> bool:
        return len(self.sources) > 1

    def curve_label(self, curve: Curve) -> str:
        source = self.sources[curve.source_index]
        return curve.label(source.label if self.overlay else None)

    def flags_in_use(self) -> list[tuple[str, int, str]]:
        """(flag, how many points carry it, its explanation), in order of first appearance."""
        from benchseq.records import FLAG_TEXT

        counts: dict[str, int] = {}
        for source in self.sources:
            for text in source.frame.get("flags", pd.Series([], dtype=object)):
                for flag in str(text).split():
                    counts[flag] = counts.get(flag, 0) + 1
        return [
            (flag, n, FLAG_TEXT.get(flag, "not explained by this version of benchseq"))
            for flag, n in counts.items()
        ]

    def has_floor(self) -> bool:
        """True when some run measured the generator-off floor."""
        for source in self.sources:
            for name in ("floor_output", "floor_pin"):
                if name in source.frame.columns and np.isfinite(source.frame[name]).any():
                    return True
        return False


# -- reading ------------------------------------------------------------------------------
def _stored_plan(meta: dict[str, Any], path: Path) -> tuple[Any, str]:
    from benchseq.plan import parse_plan
    from benchseq.tomlfile import parse_toml_text

    text = meta.get("plan_text")
    if not isinstance(text, str) or not text.strip():
        return None, "the result file holds no plan text"
    try:
        text, data = parse_toml_text(text, f"{path} (stored plan)")
        return parse_plan(data, str(meta.get("plan_source", path)), text), ""
    except BenchseqError as exc:
        return None, str(exc)


def _operating_points(frame: pd.DataFrame) -> list[tuple[OperatingPoint, pd.DataFrame]]:
    if not len(frame):
        return []
    keys = pd.DataFrame(
        {
            "dc": frame.get("dc_level", pd.Series(np.nan, index=frame.index)).astype(float),
            "load": frame.get("load_current", pd.Series(np.nan, index=frame.index)).astype(float),
            "ripple": frame.get("ripple_target", pd.Series(np.nan, index=frame.index)).astype(
                float
            ),
        }
    ).round(12)
    groups: list[tuple[OperatingPoint, pd.DataFrame]] = []
    for key, rows in frame.groupby(
        [keys["dc"], keys["load"], keys["ripple"]], dropna=False, sort=False
    ):
        dc, load, ripple = (float(v) for v in key)
        conventions = rows.get("ripple_convention", ["pp"])
        convention = str(next(iter(conventions), "pp")) or "pp"
        sort_by = "frequency" if "frequency" in rows else "point_id"
        groups.append((OperatingPoint(dc, load, ripple, convention), rows.sort_values(sort_by)))
    return groups


def _curves(source_index: int, frame: pd.DataFrame, start: int) -> list[Curve]:
    if "repeat_of" in frame.columns:
        repeat = frame["repeat_of"].to_numpy() >= 0
    else:
        repeat = np.zeros(len(frame), dtype=bool)
    curves: list[Curve] = []
    for part, is_repeat in ((frame[~repeat], False), (frame[repeat], True)):
        for op, rows in _operating_points(part):
            curves.append(Curve(source_index, start + len(curves), op, rows, is_repeat))
    return curves


def load_source(path: str | Path, index: int = 0, first_curve: int = 0) -> Source:
    """Read one result file (BadInput naming the file when it cannot be read)."""
    from benchseq.store import read_meta, read_results, read_truth

    path = Path(path)
    if path.is_dir():
        raise BadInput(f"{path} is a folder; give a result file (.h5)")
    try:
        meta = read_meta(path)
        frame = read_results(path)
        truth = read_truth(path) if meta.get("simulated") else None
    except BenchseqError:
        raise
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise BadInput(f"{path}: cannot read this result file ({exc})") from None
    if "point_id" in frame.columns:
        frame = frame.sort_values("point_id", kind="stable").reset_index(drop=True)
    plan, problem = _stored_plan(meta, path)
    mask = plan.mask if plan is not None else None
    count = meta.get("point_count")
    planned = int(count) if isinstance(count, int | float) and math.isfinite(count) else None
    verdict = mask_verdict(mask, frame, COVERAGE_FACTOR, planned)
    source = Source(index, path, meta, frame, truth, mask, plan, problem, verdict)
    source.curves = _curves(index, frame, first_curve)
    return source


def gather(paths: Sequence[str | Path]) -> Report:
    """The report of one or several result files (several overlay for comparison)."""
    from benchseq import __version__

    if not paths:
        raise BadInput("give at least one result file")
    seen: dict[Path, str] = {}
    sources: list[Source] = []
    for k, path in enumerate(paths):
        resolved = Path(path).resolve()
        if resolved in seen:
            raise BadInput(f"{path} is given twice (also as {seen[resolved]})")
        seen[resolved] = str(path)
        first_curve = sum(len(s.curves) for s in sources)
        sources.append(load_source(path, k, first_curve))
    generated = dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
    return Report(sources, generated, f"benchseq {__version__}")


# -- texts the formats share ----------------------------------------------------------------
def rejection_cell(row: dict[str, Any], prefix: str = "") -> str:
    """'62.31' for a value, '≥ 91.8' for a lower bound, '' when neither is known (dB);
    ``prefix`` "_input" reads the input-referred columns."""
    if bool(row.get("is_bound")):
        bound = float(row.get(f"bound{prefix}_db", math.nan))
        return f"≥ {bound:.1f}" if math.isfinite(bound) else ""
    value = float(row.get(f"rejection{prefix}_db", math.nan))
    return f"{value:.2f}" if math.isfinite(value) else ""


def frequency_cell(row: dict[str, Any]) -> str:
    """The planned frequency, with the generator's move in ppm when it was moved (towards a
    whole number of cycles, within the plan's frequency tolerance)."""
    actual = float(row.get("frequency", math.nan))
    planned = float(row.get("frequency_planned", actual))
    text = format_si(planned, "Hz", 4)
    # a move under 0.5 ppm is the generator's own resolution, not a move: not shown
    if math.isfinite(planned) and planned > 0 and abs(actual / planned - 1) >= 0.5e-6:
        text += f" ({(actual / planned - 1) * 1e6:+.0f} ppm)"
    return text


def has_input_referred(frame: pd.DataFrame) -> bool:
    """True when the run stored input-referred rejection (the plan declared a gain)."""
    return any(
        name in frame.columns and np.isfinite(frame[name].to_numpy(dtype=float)).any()
        for name in ("rejection_input_db", "bound_input_db")
    )


def _number_cell(value: Any, digits: str) -> str:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return ""
    return format(number, digits) if math.isfinite(number) else ""


def ratio_phase_deg(ratio: Any) -> np.ndarray:
    """Phase of V_out/V_pin in degrees, (-180, 180]."""
    return np.degrees(np.angle(np.asarray(ratio, dtype=complex)))


POINT_TABLE_HEADERS = (
    "#",
    "frequency (planned)",
    "operating point",
    "pin ripple",
    "rejection [dB]",
    f"U (k={COVERAGE_FACTOR:g}) [dB]",
    "phase [°]",
    "limit [dB]",
    "margin [dB]",
    "verdict",
    "flags",
)


def point_table(source: Source) -> tuple[list[str], list[list[str]]]:
    """Headers and text cells of the table of points (one row per stored point)."""
    headers = list(POINT_TABLE_HEADERS)
    frame = source.frame
    inputs = has_input_referred(frame)
    if inputs:
        headers[4] = "rejection, output-referred [dB]"
        headers.insert(6, "rejection, input-referred [dB]")
    extra: list[tuple[str, str]] = []
    if "repeat_of" in frame.columns and (frame["repeat_of"] >= 0).any():
        extra.append(("repeat_of", "repeat of #"))
    for name, title in (("floor_pin", "gen-off pin"), ("floor_output", "gen-off output")):
        if name in frame.columns and np.isfinite(frame[name].to_numpy(dtype=float)).any():
            extra.append((name, title))
    headers[-1:-1] = [title for _, title in extra]
    verdicts = source.verdict.points.set_index("point_id", drop=False)
    rows: list[list[str]] = []
    for row in frame.to_dict(orient="records"):
        op = OperatingPoint(
            float(row.get("dc_level", math.nan)),
            float(row.get("load_current", math.nan)),
            float(row.get("ripple_target", math.nan)),
            str(row.get("ripple_convention", "pp")),
        )
        pin = abs(complex(row.get("pin", math.nan)))
        is_bound = bool(row.get("is_bound"))
        u = float(row.get("uncertainty_db", math.nan))
        phase = "" if is_bound else _number_cell(ratio_phase_deg(row.get("ratio", math.nan)), ".1f")
        pid = int(row.get("point_id", -1))
        verdict = verdicts.loc[pid] if pid in verdicts.index else None
        if isinstance(verdict, pd.DataFrame):  # a duplicated id: take the first
            verdict = verdict.iloc[0]
        limit = margin = outcome = ""
        if verdict is not None and verdict["outcome"] != "no limit":
            limit = _number_cell(verdict["limit_db"], ".1f")
            margin = _number_cell(verdict["margin_db"], "+.2f")
            if is_bound and margin:
                margin = "≥ " + margin
            outcome = str(verdict["outcome"]) + (" (within U)" if verdict["straddles"] else "")
        cells = [
            str(pid),
            frequency_cell(row),
            op.label(),
            ripple_text(pin, op.convention) if math.isfinite(pin) else "",
            rejection_cell(row),
            "" if is_bound else _number_cell(COVERAGE_FACTOR * u, ".2f"),
            *([rejection_cell(row, "_input")] if inputs else []),
            phase,
            limit,
            margin,
            outcome,
        ]
        for name, _ in extra:
            value = row.get(name)
            if name == "repeat_of":
                cells.append("" if int(value) < 0 else str(int(value)))
            else:
                cells.append(format_si(float(value), "Vpk", 3) if math.isfinite(value) else "")
        cells.append(str(row.get("flags", "")))
        rows.append(cells)
    return headers, rows


def headline(source: Source) -> list[tuple[str, str]]:
    """The facts a reader wants first: device, operator, date, status, run."""
    meta = source.meta
    started = str(meta.get("started", "") or "")
    ended = str(meta.get("ended", "") or "")
    date = started[:10] or "unknown"
    if started:
        date += f" (started {started}" + (f", ended {ended})" if ended else ", not ended)")
    pairs = [
        ("device", str(meta.get("device", "") or "")),
        ("operator", str(meta.get("operator", "") or "")),
        ("date", date),
        ("status", source.status_note()),
        ("run", f"{source.path.name}, run id {source.run_id or 'unknown'}"),
        ("mask verdict", source.verdict_summary()),
    ]
    return [(k, v) for k, v in pairs if v]


PLOT_CAPTIONS: dict[str, str] = {
    "rejection": (
        "Rejection 20·log10(|V_pin|/|V_out|) (output-referred) over frequency, one curve per "
        "operating point. "
        f"Bars: expanded uncertainty U = {COVERAGE_FACTOR:g}·u (k = {COVERAGE_FACTOR:g}, about "
        "95 % coverage). A bar with an arrow rising from it marks a lower bound: the output was "
        "under the noise floor and the true rejection is at or above the bar. The dash-dot line "
        "is the plan's mask; the shaded region under it fails."
    ),
    "phase": (
        "Phase of the ratio V_out/V_pin in degrees, unwrapped along each curve; lower bounds "
        "have no phase (the output was not detected)."
    ),
    "differences": (
        "Top: both runs' rejection per operating point (reference solid, other dashed). "
        "Bottom: the difference other − reference in dB with the band d ± U, "
        f"U = {COVERAGE_FACTOR:g}·u_c, u_c = √(u_ref² + u_other²) (uncorrelated); circled "
        "points differ significantly (|d| > U). Where the frequencies differ the other run is "
        "interpolated over log frequency; a difference involving a lower bound is itself only "
        "a bound (triangles)."
    ),
    "floor": (
        "Measured output ripple against the generator-off floor at the same frequency "
        "(peak volts): where they meet, the rejection reading is floor-limited."
    ),
}
