"""What `benchseq show` prints: the summary and the verdict first, then the points — every
row for a short run, a summarised table for a long one (per operating point, then a listing
that keeps the failing and the worst points and thins the rest evenly, saying how many rows
were left out and how to see them all). A calibration file (CAL.h5) is described as one.

Library code: returns rich renderables, never prints."""

from __future__ import annotations

import math
import os
from typing import Any

import numpy as np
import pandas as pd

from benchseq.display import expanded_text, points_table, rejection_text
from benchseq.records import SHOWN_COVERAGE_FACTOR
from benchseq.report.model import OperatingPoint
from benchseq.units import format_si

MAX_ROWS = 40  # a longer run gets the summarised table (``--all`` lists every row)
MAX_OPERATING_POINTS = 16  # rows of the per-operating-point table before it is cut
WORST_SHOWN = 5


def _op_key(frame: pd.DataFrame) -> pd.Series:
    """A text key per row naming its operating point (DC, load, ripple; repeats apart)."""

    def col(name: str) -> np.ndarray:
        if name in frame.columns:
            return frame[name].to_numpy(dtype=float)
        return np.full(len(frame), np.nan)

    dc, load, ripple = col("dc_level"), col("load_current"), col("ripple_target")
    conv = frame["ripple_convention"] if "ripple_convention" in frame.columns else None
    repeat = frame["repeat_of"].to_numpy() >= 0 if "repeat_of" in frame.columns else None
    keys = []
    for i in range(len(frame)):
        convention = str(conv.iloc[i]) if conv is not None else "pp"
        text = OperatingPoint(dc[i], load[i], ripple[i], convention or "pp").label()
        if repeat is not None and repeat[i]:
            text = "repeat at " + text
        keys.append(text)
    return pd.Series(keys, index=frame.index)


def _value(frame: pd.DataFrame) -> np.ndarray:
    """The rejection a row stands for: its value, or its lower bound (dB)."""
    bound = frame["is_bound"].to_numpy(dtype=bool)
    return np.where(
        bound, frame["bound_db"].to_numpy(dtype=float), frame["rejection_db"].to_numpy(dtype=float)
    )


def counts(frame: pd.DataFrame) -> dict[str, Any]:
    """How many values, lower bounds, undetected and flagged points, and each flag's count."""
    bound = frame["is_bound"].to_numpy(dtype=bool) if len(frame) else np.zeros(0, bool)
    value = frame["rejection_db"].to_numpy(dtype=float) if len(frame) else np.zeros(0)
    flags: dict[str, int] = {}
    flagged = 0
    for text in frame.get("flags", pd.Series([], dtype=object)):
        words = str(text).split()
        flagged += bool(words)
        for flag in words:
            flags[flag] = flags.get(flag, 0) + 1
    return {
        "points": len(frame),
        "values": int((~bound & np.isfinite(value)).sum()),
        "bounds": int(bound.sum()),
        "neither": int((~bound & ~np.isfinite(value)).sum()),
        "flagged": flagged,
        "flags": flags,
    }


def worst_points(frame: pd.DataFrame, verdict: Any, n: int = WORST_SHOWN) -> list[dict[str, Any]]:
    """The ``n`` points nearest to failing: smallest margin against the mask when there is
    one (failing points first), else the lowest rejection values. Rows of ``frame``."""
    if not len(frame):
        return []
    by_id = frame.set_index("point_id", drop=False)
    if verdict is not None and verdict.status != "no mask":
        judged = verdict.points[verdict.points["outcome"].isin(["pass", "fail"])]
        ids = judged.sort_values("margin_db", kind="stable")["point_id"].head(n)
    else:
        value = pd.Series(_value(frame), index=frame.index)
        keep = frame[~frame["is_bound"].to_numpy(dtype=bool) & np.isfinite(value.to_numpy())]
        ids = keep.loc[value[keep.index].sort_values(kind="stable").index, "point_id"].head(n)
    rows = []
    for pid in ids:
        row = by_id.loc[pid]
        if isinstance(row, pd.DataFrame):
            row = row.iloc[0]
        rows.append(row.to_dict())
    return rows


def pick_rows(frame: pd.DataFrame, verdict: Any, limit: int = MAX_ROWS) -> pd.DataFrame:
    """At most ``limit`` rows in point order: the failing points and the worst of each
    operating point first, then the rest thinned evenly over the run."""
    frame = frame.sort_values("point_id", kind="stable").reset_index(drop=True)
    if len(frame) <= limit:
        return frame
    chosen: list[int] = []

    def take(index: Any) -> None:
        for i in index:
            if len(chosen) >= limit:
                return
            if int(i) not in chosen:
                chosen.append(int(i))

    score = pd.Series(_value(frame), index=frame.index)  # lowest first
    if verdict is not None and verdict.status != "no mask":
        by_id = verdict.points.set_index("point_id")
        margin = frame["point_id"].map(by_id["margin_db"]).astype(float)
        fails = frame.index[frame["point_id"].map(by_id["outcome"]).to_numpy() == "fail"]
        take(sorted(fails, key=lambda i: float(margin[i]))[:10])
        score = margin.where(np.isfinite(margin.to_numpy()), score)
    for _, rows in frame.groupby(_op_key(frame), sort=False):
        values = score[rows.index].dropna()
        if len(values):
            take([values.idxmin()])
    rest = limit - len(chosen)
    if rest > 0:
        spread = np.linspace(0, len(frame) - 1, rest).round().astype(int)
        take([i for i in spread if int(i) not in chosen])
    return frame.loc[sorted(chosen)]


def operating_point_table(
    frame: pd.DataFrame, verdict: Any, limit: int = MAX_OPERATING_POINTS
) -> Any:
    """One row per operating point: points, bounds, lowest and highest rejection (with the
    frequency), worst margin and fails when there is a mask, flagged points."""
    from rich.table import Table

    keys = _op_key(frame)
    margin = outcome = None
    if verdict is not None and verdict.status != "no mask":
        margin = verdict.points.set_index("point_id")["margin_db"]
        outcome = verdict.points.set_index("point_id")["outcome"]
    value = pd.Series(_value(frame), index=frame.index)
    groups = list(frame.groupby(keys, sort=False))
    table = Table(title="per operating point", title_justify="left")
    for name in ("operating point", "points", "bounds", "lowest", "highest"):
        table.add_column(name, justify="left" if name == "operating point" else "right")
    if margin is not None:
        table.add_column("worst margin", justify="right")
        table.add_column("fail", justify="right")
    table.add_column("flagged", justify="right")
    ordered = []
    for key, rows in groups:
        worst = math.inf
        if margin is not None:
            m = rows["point_id"].map(margin).to_numpy(dtype=float)
            worst = float(np.nanmin(m)) if np.isfinite(m).any() else math.inf
        ordered.append((worst, key, rows))
    if margin is not None:
        ordered.sort(key=lambda item: item[0])  # the nearest to failing first
    for worst, key, rows in ordered[:limit]:
        values = value[rows.index]
        finite = values.dropna()
        cells = [
            str(key),
            str(len(rows)),
            str(int(rows["is_bound"].to_numpy(dtype=bool).sum())),
            _at(rows, values, finite.idxmin()) if len(finite) else "—",
            _at(rows, values, finite.idxmax()) if len(finite) else "—",
        ]
        if margin is not None and outcome is not None:
            cells.append(f"{worst:+.2f} dB" if math.isfinite(worst) else "—")
            cells.append(str(int((rows["point_id"].map(outcome) == "fail").sum())))
        cells.append(str(int((rows["flags"].astype(str).str.strip() != "").sum())))
        table.add_row(*cells)
    if len(ordered) > limit:
        table.caption = (
            f"{len(ordered) - limit} more operating points not listed (nearest to failing first)"
        )
    return table


def _at(rows: pd.DataFrame, values: pd.Series, i: Any) -> str:
    """'≥ 61.20 dB at 10 kHz': a row's value (or bound) and its planned frequency."""
    bound = "≥ " if bool(rows.at[i, "is_bound"]) else ""
    return (
        f"{bound}{values[i]:.2f} dB at {format_si(float(rows.at[i, 'frequency_planned']), 'Hz', 4)}"
    )


def summary_lines(meta: dict[str, Any], frame: pd.DataFrame, verdict: Any, path: str) -> list[str]:
    """The lines that lead `show` (rich markup): title, status, verdict, counts, worst points."""
    from rich.markup import escape

    lines = [
        f"[bold]{escape(str(meta.get('title', '')))}[/] — {escape(str(meta.get('device', '')))}",
        f"status {escape(str(meta.get('status')))}; started {escape(str(meta.get('started')))}; "
        f"{len(frame)} of {meta.get('point_count', '?')} points stored; bench "
        f"{escape(str(meta.get('bench_name', '')))}",
    ]
    if meta.get("status") == "interrupted":
        when = (meta.get("interrupted") or {}).get("last_point_at") or "never"
        lines.append(
            f"[bold yellow]interrupted:[/] its process ended without finishing; last point "
            f"stored {escape(str(when))}; continue with: benchseq run --resume {escape(path)}"
        )
    if verdict is not None:
        colour = {"pass": "green", "fail": "red"}.get(verdict.status, "yellow")
        lines.append(f"[bold {colour}]mask:[/] {escape(verdict.summary())}")
    else:
        lines.append("[yellow]mask:[/] no verdict (the stored plan could not be read back)")
    c = counts(frame)
    ops = frame.groupby(_op_key(frame), sort=False).ngroups if len(frame) else 0
    text = (
        f"points: {c['points']} in {ops} operating point{'s' if ops != 1 else ''}; "
        f"{c['values']} values, {c['bounds']} lower bounds"
    )
    if c["neither"]:
        text += f", {c['neither']} with neither"
    text += f"; {c['flagged']} flagged"
    if c["flags"]:
        text += " (" + ", ".join(f"{k} {v}" for k, v in c["flags"].items()) + ")"
    lines.append(escape(text))
    worst = worst_points(frame, verdict)
    if worst:
        with_mask = verdict is not None and verdict.status != "no mask"
        margins = verdict.points.set_index("point_id")["margin_db"] if with_mask else None
        parts = []
        for row in worst:
            item = (
                f"#{int(row['point_id'])} {format_si(float(row['frequency_planned']), 'Hz', 4)} "
                f"{rejection_text(row)}"
            )
            u = expanded_text(float(row.get("uncertainty_db", math.nan)))
            if u and not row.get("is_bound"):
                item += f" ± {u}"
            if margins is not None:
                item += f" (margin {float(margins.get(row['point_id'], math.nan)):+.2f} dB)"
            parts.append(item)
        what = "nearest the mask" if with_mask else "lowest rejection"
        lines.append(
            f"worst points ({what}; ± U, k = {SHOWN_COVERAGE_FACTOR:g}): "
            + escape("; ".join(parts))
        )
    return lines


def render_result(
    meta: dict[str, Any],
    frame: pd.DataFrame,
    verdict: Any,
    path: str,
    all_rows: bool = False,
    limit: int = MAX_ROWS,
) -> list[Any]:
    """Renderables of `show`: summary and verdict, then the table (summarised when long)."""
    from rich.markup import escape

    parts: list[Any] = list(summary_lines(meta, frame, verdict, path))
    if not len(frame):
        return parts
    ordered = frame.sort_values("point_id", kind="stable")
    if all_rows or len(frame) <= limit:
        parts.append(points_table(ordered.to_dict(orient="records"), title="points"))
        return parts
    parts.append(operating_point_table(frame, verdict))
    shown = pick_rows(frame, verdict, limit)
    parts.append(
        points_table(
            shown.to_dict(orient="records"),
            title=f"points: {len(shown)} of {len(frame)} (failing, worst per operating point, "
            "the rest thinned evenly)",
        )
    )
    parts.append(
        f"[dim]{len(frame) - len(shown)} rows left out; every row: benchseq show "
        f"{escape(path)} --all (or --json)[/]"
    )
    return parts


# -- calibration files --------------------------------------------------------------------------
def is_calibration_file(path: str) -> bool:
    """True when ``path`` is an HDF5 file written by `benchseq calibrate`."""
    from benchseq.calibrate import FORMAT, h5py

    if not os.path.isfile(path):  # a FIFO or device would block the open; the reader refuses it
        return False
    try:
        with h5py.File(path, "r", locking=False) as h5:
            return h5.attrs.get("format") == FORMAT
    except (OSError, ValueError, KeyError, TypeError):  # not HDF5, or damaged: not ours
        return False


def calibration_figures(loaded: Any) -> dict[str, Any]:
    """The match in a few figures: gain and phase spans, their means weighted by 1/u², the
    largest expanded uncertainty and the Birge ratios (near 1 when the spread between
    neighbours agrees with the stated u)."""
    from benchseq.analysis import DB_PER_NEPER

    c = loaded.columns
    gain, phase = np.asarray(c["gain_db"], float), np.asarray(c["phase_deg"], float)
    u_gain = DB_PER_NEPER * np.asarray(c["uncertainty"], float)
    u_phase = np.asarray(c["phase_uncertainty_deg"], float)

    def weighted(x: np.ndarray, u: np.ndarray) -> float:
        ok = np.isfinite(x) & np.isfinite(u) & (u > 0)
        if not ok.any():
            return math.nan
        w = 1.0 / u[ok] ** 2
        return float(np.sum(w * x[ok]) / np.sum(w))

    meta = loaded.meta
    figures = {
        "points": int(gain.size),
        "span_hz": [float(v) for v in loaded.span],
        "gain_db_min": float(np.nanmin(gain)) if gain.size else math.nan,
        "gain_db_max": float(np.nanmax(gain)) if gain.size else math.nan,
        "gain_db_weighted_mean": weighted(gain, u_gain),
        "phase_deg_min": float(np.nanmin(phase)) if phase.size else math.nan,
        "phase_deg_max": float(np.nanmax(phase)) if phase.size else math.nan,
        "phase_deg_weighted_mean": weighted(phase, u_phase),
        "largest_gain_U_db": float(SHOWN_COVERAGE_FACTOR * np.nanmax(u_gain))
        if gain.size
        else math.nan,
        "coverage_factor": SHOWN_COVERAGE_FACTOR,
        "birge_ratio_magnitude": meta.get("birge_ratio_magnitude"),
        "birge_ratio_phase": meta.get("birge_ratio_phase"),
    }
    return {  # JSON has no NaN: unknown figures are None
        k: None if isinstance(v, float) and not math.isfinite(v) else v for k, v in figures.items()
    }


def _num(value: Any, fmt: str) -> str:
    return "—" if value is None else format(float(value), fmt)


def render_calibration_file(loaded: Any) -> list[Any]:
    """`show CAL.h5`: what the file is, when and where it was made, its channels, range and
    match figures, then its table."""
    from rich.markup import escape

    from benchseq.bench import describe_band
    from benchseq.calibrate import render_calibration

    meta, cond = loaded.meta, loaded.conditions
    fig = calibration_figures(loaded)
    pin, out = cond.get("pin", {}), cond.get("output", {})
    simulated = " (simulated bench)" if meta.get("simulated") else ""
    lines = [
        f"[bold]channel-match calibration file[/] {escape(str(loaded.path))}: written by "
        "benchseq calibrate, both probes on the supply pin; a bench applies it with "
        "scope.calibration (it is not a run's result)",
        f"made {escape(loaded.created)} on bench {escape(str(meta.get('bench_name', '')))}"
        f"{simulated}; id {escape(loaded.id)}; {escape(str(meta.get('software', '')))}",
        f"channels: pin CH{escape(str(pin.get('channel')))}, output "
        f"CH{escape(str(out.get('channel')))}; {fig['points']} points over "
        f"{escape(describe_band(*loaded.span))}",
        f"match: gain {_num(fig['gain_db_min'], '+.4f')} to {_num(fig['gain_db_max'], '+.4f')} "
        f"dB (weighted mean {_num(fig['gain_db_weighted_mean'], '+.4f')} dB), phase "
        f"{_num(fig['phase_deg_min'], '+.3f')} to {_num(fig['phase_deg_max'], '+.3f')}° "
        f"(weighted mean {_num(fig['phase_deg_weighted_mean'], '+.3f')}°); largest U "
        f"{_num(fig['largest_gain_U_db'], '.4f')} dB (k = {SHOWN_COVERAGE_FACTOR:g})",
    ]
    birge = [
        f"{what} {float(value):.2f}"
        for what, value in (
            ("magnitude", fig["birge_ratio_magnitude"]),
            ("phase", fig["birge_ratio_phase"]),
        )
        if isinstance(value, int | float) and math.isfinite(float(value))
    ]
    if birge:
        lines.append(
            "Birge ratio (spread between neighbours / stated u; near 1 agrees): " + ", ".join(birge)
        )
    return [*lines, render_calibration(loaded)]
