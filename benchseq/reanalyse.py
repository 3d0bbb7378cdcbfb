"""Re-analysis: recompute a run's results from its stored raw waveforms, without a bench.

A run made with ``keep_waveforms`` stores, per point, the pooled pin and output records the
sequencer analysed: every triggered record of the point's final capture, summed as integer
converter codes with their scaling (benchseq.batches.Pool). ``reanalyse`` feeds them to
benchseq.analysis.measure_point with the analysis settings of the installed software and
writes a new result file: the stored metadata (plus ``reanalysed_from``), every point's
row with the analysis columns replaced, the stored truth and the same waveforms.

What is reproduced and what is not:

* the same pooled record the run analysed is analysed again, so the numbers are identical
  unless the analysis changed (a pool whose batches had different ranges was requantised
  at its finest step: the run analysed the same requantised record);
* the converter's code range (for clipping and resolution checks) is taken from the
  stored range and scaling (range / scale = k·256 codes for k pooled 8-bit records,
  k·65,536 for 16-bit), else from the sample type;
* a channel calibration is applied only when given (``calibration=``);
* the bench-side columns (generator setting, pin DC, supply current, ranges, capture
  settings, bench time) are the stored ones; flags from the bench (current limit, pin DC
  limits, target unmet, instrument retries, ranging) are kept, the analysis flags and
  those derived from the analysis (bound, pin off target, model mismatch, distortion)
  are recomputed with the stored plan's watch thresholds;
* points stored without waveforms are copied unchanged and marked so.
"""

from __future__ import annotations

import math
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchseq.errors import BadInput
from benchseq.records import SHOWN_COVERAGE_FACTOR, input_referred

COVERAGE_K = 3.0  # as benchseq.replay: many points are compared at once

# flags recomputed from the analysis (all others are the bench's and kept)
_RECOMPUTED = {
    "bound",
    "pin_off_target",
    "model_mismatch",
    "distorted",
    "not_detected",
    "outside_calibration",
    "floor_from_residual",
    "uncalibrated",
}
_RECOMPUTED_PREFIXES = ("clipped_", "unresolved_", "small_", "unrefined_")


@dataclass
class ReanalysisOutcome:
    path: Path
    source: Path
    comparison: pd.DataFrame
    reanalysed: int  # points recomputed from their waveforms
    copied: int  # points without waveforms, copied unchanged
    identical: int  # recomputed points whose numbers equal the stored ones
    coverage_k: float
    summary: dict[str, Any]
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able figures (for ``--json``)."""
        from benchseq.replay import _plain, records

        return {
            "file": str(self.path),
            "source": str(self.source),
            "reanalysed": self.reanalysed,
            "copied": self.copied,
            "identical": self.identical,
            "coverage_k": self.coverage_k,
            "summary": _plain(self.summary),
            "notes": list(self.notes),
            "points": records(self.comparison),
        }


def _code_range(wave: Any, full_scale: float) -> tuple[int, int]:
    """The code range of the stored samples, as the run saw it (benchseq.batches.code_range:
    from range / scale, an 8- or 16-bit transfer or a pool of them; else the sample type)."""
    from benchseq.batches import code_range

    return code_range(full_scale, float(wave.scale), np.asarray(wave.samples).dtype)


def _channel_codes(wave: Any, full_scale: float) -> Any:
    from benchseq import analysis

    low, high = _code_range(wave, full_scale)
    return analysis.ChannelCodes(
        codes=np.asarray(wave.samples),
        code_min=low,
        code_max=high,
        volts_per_code=float(wave.scale),
        full_scale=full_scale,
        ranges=None,
    )


def _recomputed(flag: str) -> bool:
    return flag in _RECOMPUTED or flag.startswith(_RECOMPUTED_PREFIXES)


def high_pass(frequency: float, corner: float) -> complex:
    """x/(1 + x), x = j·f/f_c: a first-order high-pass (any circuit handbook); 1 without one."""
    if not corner > 0:
        return 1.0 + 0.0j
    x = 1j * frequency / corner
    return x / (1.0 + x)


def reanalyse_row(
    row: dict[str, Any],
    waves: dict[str, Any],
    plan: Any,
    calibration: Any = None,
    couplings: tuple[bool, bool] = (False, False),
    ac_corner: float = 0.0,
    channel_match: float | None = None,
) -> dict[str, Any]:
    """The stored ``row`` with its analysis columns recomputed from ``waves`` (pin, output).

    ``ac_corner`` (Hz, the run's meta ``scope_ac_corner_hz``; 0 = none) and ``couplings``
    (pin, output AC-coupled): readings are referred back to the nodes through that
    high-pass, as the run did (the ratio is unchanged: both channels share it).
    ``channel_match``: the bench's uncalibrated channel-match uncertainty, in the budget of
    every point no calibration corrects (as in the run)."""
    from benchseq import analysis

    pin, out = waves["pin"], waves["output"]
    interval = float(pin.sample_interval)
    if not math.isfinite(interval) or interval <= 0:
        interval = float(row["sample_interval"])
    result = analysis.measure_point(
        pin.values(),
        out.values(),
        interval,
        float(row["frequency"]),
        pin_codes=_channel_codes(pin, float(row["pin_range"])),
        out_codes=_channel_codes(out, float(row["output_range"])),
        calibration=calibration,
        channel_match=channel_match,
    )
    rej = result.rejection
    f = float(row["frequency"])
    pin_through = high_pass(f, ac_corner) if couplings[0] else 1.0 + 0.0j
    out_through = high_pass(f, ac_corner) if couplings[1] else 1.0 + 0.0j
    pin_amplitude = result.pin.amplitude / abs(pin_through)
    new = dict(row)
    pin_model = abs(complex(row["pin_model"]))
    model_db = (
        20 * math.log10(pin_amplitude / pin_model)
        if pin_model > 0 and pin_amplitude > 0
        else math.nan
    )
    new.update(
        frequency_fitted=result.frequency,
        pin=result.pin.phasor / pin_through,
        pin_sigma=result.pin.amplitude_sigma / abs(pin_through),
        output=result.output.phasor / out_through,
        output_sigma=result.output_sigma / abs(out_through),
        output_floor=result.output_floor / abs(out_through),
        output_noise=result.output.residual_rms,
        ratio=rej.ratio,
        rejection_db=rej.rejection_db if not rej.is_bound else math.nan,
        uncertainty_db=rej.uncertainty_db if not rej.is_bound else math.nan,
        bound_db=rej.bound_db if rej.is_bound else math.nan,
        is_bound=bool(rej.is_bound),
        match_uncertainty=result.match_uncertainty,
        pin_model_ratio_db=model_db,
        thd=result.thd,
    )
    if "rejection_input_db" in row:
        new.update(input_referred(new["rejection_db"], new["bound_db"], plan.device.gain_db))
    flags = [f for f in str(row.get("flags", "")).split() if not _recomputed(f)]
    target = float(row["ripple_target"])
    if target > 0 and abs(pin_amplitude / target - 1.0) > 0.05:
        flags.append("pin_off_target")
    if math.isfinite(model_db) and abs(model_db) > plan.watch.model_mismatch_db:
        flags.append("model_mismatch")
    if math.isfinite(result.thd) and result.thd > plan.watch.distortion:
        flags.append("distorted")
    if rej.is_bound:
        flags.append("bound")
    flags.extend(result.flags)
    new["flags"] = " ".join(dict.fromkeys(flags))
    return new


def default_reanalysis_output(path: Path) -> Path:
    return path.with_name(f"{path.stem}-reanalysed.h5")


def reanalyse(
    result: str | Path,
    out: str | Path | None = None,
    *,
    force: bool = False,
    calibration: Any = None,
    keep_waveforms: bool = True,
) -> ReanalysisOutcome:
    """Recompute ``result``'s points from its stored waveforms into a new result file and
    compare with the stored numbers. A file without waveforms is a BadInput."""
    from benchseq import __version__
    from benchseq.replay import read_stored
    from benchseq.store import RunWriter, read_truth, read_waveforms

    stored = read_stored(result)
    path = stored.path
    rows = stored.points.to_dict(orient="records")
    waves = {int(r["point_id"]): read_waveforms(path, int(r["point_id"])) for r in rows}
    usable = {pid: w for pid, w in waves.items() if "pin" in w and "output" in w}
    if not usable:
        raise BadInput(
            f"{path}: no raw waveforms stored, so there is nothing to re-analyse; "
            "run the plan with --keep-waveforms to keep each point's records"
        )
    truth_frame = read_truth(path)
    truth = (
        {int(t["point_id"]): t for t in truth_frame.to_dict(orient="records")}
        if len(truth_frame.columns) > 1
        else {}
    )
    target = Path(out) if out is not None else default_reanalysis_output(path)
    meta = dict(stored.meta)
    for key in ("traceback", "reason", "ended", "status"):
        meta.pop(key, None)
    meta.update(
        run_id=str(uuid.uuid4()),
        status="running",
        software=f"benchseq {__version__}",
        keep_waveforms=keep_waveforms,
        reanalysed_from={
            "file": str(path),
            "run_id": stored.meta.get("run_id", ""),
            "status": stored.meta.get("status", ""),
            "software": stored.meta.get("software", ""),
            "points_reanalysed": len(usable),
            "points_copied": len(rows) - len(usable),
            "calibration_applied": calibration is not None,
        },
    )
    columns = columns_of(stored.points)
    writer = RunWriter.create(
        target,
        meta,
        columns,
        force=force,
        truth_columns=columns_of(truth_frame) if truth else None,
    )
    corner = stored.meta.get("scope_ac_corner_hz", 0.0)
    corner = float(corner) if isinstance(corner, int | float) and corner > 0 else 0.0
    couplings = (
        stored.bench.scope.pin.coupling == "AC",
        stored.bench.scope.output.coupling == "AC",
    )
    new_rows = []
    try:
        for row in rows:
            pid = int(row["point_id"])
            point_waves = usable.get(pid)
            new = (
                reanalyse_row(
                    row,
                    point_waves,
                    stored.plan,
                    calibration,
                    couplings,
                    corner,
                    stored.bench.scope.tolerances().uncertainty,
                )
                if point_waves is not None
                else dict(row)
            )
            truth_row = truth.get(pid)
            if truth_row is not None:
                truth_row = {k: v for k, v in truth_row.items() if k != "point_id"}
            writer.append(
                pid,
                {c.name: new[c.name] for c in columns if c.name != "point_id"},
                waveforms=point_waves if keep_waveforms else None,
                truth=truth_row,
            )
            new_rows.append(new)
    except BaseException:
        writer.finish("aborted", reason="re-analysis interrupted")
        raise
    writer.finish("complete", reason=f"re-analysed {len(usable)} of {len(rows)} points")
    comparison = compare_analyses(rows, new_rows, set(usable))
    identical = int(comparison["identical"].sum())
    notes = []
    if len(rows) > len(usable):
        notes.append(f"{len(rows) - len(usable)} point(s) had no waveforms and were copied")
    if calibration is None and stored.meta.get("calibration"):
        notes.append("the stored run applied a calibration; it was not re-applied here")
    return ReanalysisOutcome(
        path=target,
        source=path,
        comparison=comparison,
        reanalysed=len(usable),
        copied=len(rows) - len(usable),
        identical=identical,
        coverage_k=COVERAGE_K,
        summary=_summary(comparison),
        notes=notes,
    )


def columns_of(frame: pd.DataFrame) -> list[Any]:
    """The store Columns of a table read back (kind from the dtype; unit and meaning from
    the frame's attrs), so a file is rewritten with exactly the columns it has."""
    from benchseq.store import Column

    units = frame.attrs.get("units", {})
    descriptions = frame.attrs.get("descriptions", {})
    columns = []
    for name in frame.columns:
        dtype = frame[name].dtype
        if pd.api.types.is_bool_dtype(dtype):
            kind = "bool"
        elif pd.api.types.is_complex_dtype(dtype):
            kind = "c16"
        elif pd.api.types.is_integer_dtype(dtype):
            kind = "i8"
        elif pd.api.types.is_float_dtype(dtype):
            kind = "f8"
        else:
            kind = "str"
        columns.append(Column(name, kind, units.get(name, ""), descriptions.get(name, "")))  # type: ignore[arg-type]
    return columns


def _equal(a: float, b: float) -> bool:
    if math.isnan(a) and math.isnan(b):
        return True
    return bool(np.isclose(a, b, rtol=1e-9, atol=1e-12))


def compare_analyses(
    stored: list[dict[str, Any]],
    new: list[dict[str, Any]],
    reanalysed: set[int],
    k: float = COVERAGE_K,
) -> pd.DataFrame:
    out = []
    for s, r in zip(stored, new, strict=True):
        pid = int(s["point_id"])
        s_bound, r_bound = bool(s["is_bound"]), bool(r["is_bound"])
        both = not s_bound and not r_bound
        difference = float(r["rejection_db"]) - float(s["rejection_db"]) if both else math.nan
        combined = (
            math.hypot(float(s["uncertainty_db"]), float(r["uncertainty_db"])) if both else math.nan
        )
        same = (
            pid in reanalysed
            and s_bound == r_bound
            and _equal(abs(complex(s["ratio"])), abs(complex(r["ratio"])))
            and _equal(float(s["rejection_db"]), float(r["rejection_db"]))
            and _equal(float(s["bound_db"]), float(r["bound_db"]))
        )
        within = bool(abs(difference) <= k * combined) if both and pid in reanalysed else pd.NA
        if pid not in reanalysed:
            verdict = "copied (no waveforms)"
        elif same:
            verdict = "identical"
        elif both:
            verdict = "within uncertainty" if within else "differs"
        elif s_bound and r_bound:
            verdict = "bound in both"
        else:
            verdict = "bound in one only"
        out.append(
            {
                "point_id": pid,
                "frequency": float(s["frequency"]),
                "dc_level": float(s["dc_level"]),
                "load_current": float(s["load_current"]),
                "stored_db": float(s["rejection_db"]),
                "stored_u_db": float(s["uncertainty_db"]),
                "stored_bound_db": float(s["bound_db"]),
                "stored_is_bound": s_bound,
                "new_db": float(r["rejection_db"]),
                "new_u_db": float(r["uncertainty_db"]),
                "new_bound_db": float(r["bound_db"]),
                "new_is_bound": r_bound,
                "difference_db": difference,
                "combined_u_db": combined,
                "z": difference / combined if both and combined > 0 else math.nan,
                "reanalysed": pid in reanalysed,
                "identical": bool(same),
                "within": within,
                "flags_before": str(s.get("flags", "")),
                "flags_after": str(r.get("flags", "")),
                "verdict": verdict,
            }
        )
    frame = pd.DataFrame(out)
    frame["within"] = frame["within"].astype("boolean")
    frame.attrs["coverage_k"] = k
    return frame


def _summary(comparison: pd.DataFrame) -> dict[str, Any]:
    values = comparison[comparison["within"].notna()]
    z = values["z"].abs().to_numpy(float)
    return {
        "points": len(comparison),
        "reanalysed": int(comparison["reanalysed"].sum()),
        "identical": int(comparison["identical"].sum()),
        "compared": len(values),
        "within": int(values["within"].astype(bool).sum()),
        "max_abs_z": float(np.max(z)) if z.size else math.nan,
        "max_abs_difference_db": float(np.nanmax(np.abs(values["difference_db"])))
        if len(values)
        else math.nan,
        "bound_changes": int(
            (
                comparison["reanalysed"]
                & (comparison["stored_is_bound"] != comparison["new_is_bound"])
            ).sum()
        ),
    }


def render_reanalysis(outcome: ReanalysisOutcome) -> Any:
    """Summary and point-by-point comparison of a re-analysis (a rich renderable)."""
    from rich.console import Group
    from rich.markup import escape
    from rich.table import Table
    from rich.text import Text

    from benchseq.units import format_si

    s = outcome.summary
    head = [
        f"[bold]re-analysis[/] of {escape(str(outcome.source))} into {escape(str(outcome.path))}: "
        f"{outcome.reanalysed} point(s) recomputed from their waveforms, {outcome.copied} copied",
        f"{s['identical']} identical to the stored numbers; {s['within']} of {s['compared']} "
        f"values within k·u_c (k = {outcome.coverage_k:g})"
        + (f", largest |difference|/u_c {s['max_abs_z']:.2f}" if s["compared"] else ""),
    ]
    head.extend(f"note: {escape(n)}" for n in outcome.notes)
    table = Table(title="stored vs re-analysed", title_justify="left")
    k = SHOWN_COVERAGE_FACTOR
    for name in (
        "#",
        "frequency",
        f"stored (± U, k = {k:g})",
        f"re-analysed (± U, k = {k:g})",
        "difference",
        "verdict",
    ):
        table.add_column(name, justify="left" if name == "verdict" else "right")
    for r in outcome.comparison.to_dict(orient="records"):

        def side(value: float, u: float, bound: float, is_bound: bool) -> str:
            if is_bound:
                return f"≥ {bound:.1f} dB"
            return f"{value:.2f} ± {k * u:.2f} dB" if math.isfinite(value) else ""

        table.add_row(
            str(r["point_id"]),
            format_si(r["frequency"], "Hz", 4),
            side(r["stored_db"], r["stored_u_db"], r["stored_bound_db"], r["stored_is_bound"]),
            side(r["new_db"], r["new_u_db"], r["new_bound_db"], r["new_is_bound"]),
            f"{r['difference_db']:+.3f} dB" if math.isfinite(r["difference_db"]) else "",
            escape(r["verdict"]),
        )
    return Group(*(Text.from_markup(line) for line in head), table)
