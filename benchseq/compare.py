"""Two or more runs (or a run and a circuit model) point by point: `benchseq compare`.

Points are matched by operating point (DC level, load current, ripple target; linearity
repeats apart) and planned frequency. Where the other run has no point at that frequency,
its curve is interpolated linearly in dB over log10 f between its two neighbours, with the
standard uncertainty propagated through the interpolation weights (JCGM 100:2008, eq. 10,
the neighbours taken as uncorrelated); the interpolation's own error (the curve's bending
between neighbours) is not included. Outside the other run's span a point has no partner:
nothing is extrapolated.

The difference d = other − reference (dB) has the combined standard uncertainty
u_c = √(u_ref² + u_other²) (JCGM 100:2008, eq. 10, uncorrelated inputs); the files store
u (k = 1) and everything shown is U = k·u_c with k = 2 (benchseq.records). A difference is
significant when |d| > k·u_c.

Lower bounds (the output was under the floor; the true rejection is at or above the bound)
carry over honestly: other bound minus reference value is a lower bound of d (significant,
"other higher", only when it exceeds k·u_c); other value minus reference bound is an upper
bound of d (significant, "other lower", only below −k·u_c); two bounds say nothing.
Otherwise the point is "undetermined". With k = 2 about 4.6 % of agreeing values exceed k·u_c
by chance (normal distribution), which the summary states beside the count.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchseq.errors import BadInput
from benchseq.records import SHOWN_COVERAGE_FACTOR
from benchseq.units import format_si

K = SHOWN_COVERAGE_FACTOR
MAX_ROWS = 40  # a longer comparison is summarised (``--all`` lists every row)

# how a difference reads (the ``kind`` column)
KINDS = ("value", "lower bound", "upper bound", "undetermined", "no partner")
COLUMNS = (
    "key",  # operating point label
    "frequency",  # planned frequency (Hz)
    "ref_point_id",
    "ref_db",  # reference rejection (value or bound), dB
    "ref_u_db",
    "ref_is_bound",
    "other_point_id",  # -1 when interpolated or absent
    "other_db",
    "other_u_db",
    "other_is_bound",
    "interpolated",
    "difference_db",  # other − reference (a bound of it for the bound kinds)
    "u_c_db",
    "expanded_db",  # k·u_c
    "kind",
    "significant",
    "reading",
)


@dataclass
class Side:
    """One side of a comparison: a label, where it came from, and its points."""

    label: str
    path: str
    frame: pd.DataFrame  # point_id, frequency_planned, key, value_db, u_db, is_bound
    meta: dict[str, Any] = field(default_factory=dict)
    is_model: bool = False


@dataclass
class Comparison:
    """One other side against the reference: a row per point of either (COLUMNS)."""

    reference: Side
    other: Side
    rows: pd.DataFrame
    k: float = K

    def count(self, kind: str | None = None, significant: bool | None = None) -> int:
        rows = self.rows
        mask = np.ones(len(rows), dtype=bool)
        if kind is not None:
            mask &= (rows["kind"] == kind).to_numpy()
        if significant is not None:
            mask &= (rows["significant"] == significant).to_numpy()
        return int(mask.sum())

    @property
    def chance_fraction(self) -> float:
        """Share of agreeing values with |d| > k·u_c by chance (normal distribution)."""
        return math.erfc(self.k / math.sqrt(2.0))

    def no_partner(self) -> tuple[int, int]:
        """(reference points without a partner, other points without one)."""
        none = self.rows[self.rows["kind"] == "no partner"]
        return int((none["ref_point_id"] >= 0).sum()), int((none["ref_point_id"] < 0).sum())

    def summary(self) -> list[str]:
        values = self.count("value")
        sig_values = self.count("value", True)
        bounds = self.count("lower bound") + self.count("upper bound")
        sig_bounds = self.count("lower bound", True) + self.count("upper bound", True)
        lines = [
            f"{self.other.label} against {self.reference.label}: d = other − reference "
            f"(dB), U = {self.k:g}·u_c (u_c = √(u_ref² + u_other²))",
            f"{values} values compared: {sig_values} differ significantly (|d| > {self.k:g}·u_c; "
            f"about {values * self.chance_fraction:.1f} expected by chance when the runs agree)",
        ]
        for side in (self.reference, self.other):
            status = str(side.meta.get("status", "complete")) if side.meta else "complete"
            if status != "complete":
                planned = side.meta.get("point_count", "?")
                lines.append(
                    f"{side.label} is a partial run ({status}): {len(side.frame)} of {planned} "
                    "planned points stored; the comparison covers those only"
                )
        if bounds:
            lines.append(
                f"{bounds} differences involve a lower bound and are themselves only bounds: "
                f"{sig_bounds} significant, {bounds - sig_bounds} undetermined"
            )
        if self.count("undetermined"):
            lines.append(f"{self.count('undetermined')} undetermined (two bounds, or no value)")
        ref_alone, other_alone = self.no_partner()
        if ref_alone or other_alone:
            lines.append(
                f"no partner: {ref_alone} points of {self.reference.label}, {other_alone} of "
                f"{self.other.label} (other operating point, or outside the other's span: "
                "nothing is extrapolated)"
            )
        interpolated = int(self.rows["interpolated"].sum())
        if interpolated:
            lines.append(
                f"{interpolated} partners interpolated in dB over log f between neighbours "
                "(their u propagated; the curve's bending between neighbours not included)"
            )
        if self.other.is_model:
            lines.append("the model's prediction is taken as exact (u = 0)")
        largest = self.largest()
        if largest is not None:
            lines.append(
                f"largest |d|/u_c: {largest['ratio']:.2f} at {largest['key']}, "
                f"{format_si(largest['frequency'], 'Hz', 4)} (d = {largest['difference_db']:+.2f} dB)"
            )
        return lines

    def largest(self) -> dict[str, Any] | None:
        values = self.rows[(self.rows["kind"] == "value") & (self.rows["u_c_db"] > 0)]
        if not len(values):
            return None
        ratio = (values["difference_db"].abs() / values["u_c_db"]).astype(float)
        i = ratio.idxmax()
        return {**values.loc[i].to_dict(), "ratio": float(ratio[i])}

    def to_dict(self) -> dict[str, Any]:
        ref_alone, other_alone = self.no_partner()
        return {
            "reference": {
                "label": self.reference.label,
                "path": self.reference.path,
                "status": self.reference.meta.get("status"),
            },
            "other": {
                "label": self.other.label,
                "path": self.other.path,
                "status": self.other.meta.get("status"),
                "model": self.other.is_model,
            },
            "difference": "other minus reference, dB",
            "coverage_factor": self.k,
            "counts": {
                "values": self.count("value"),
                "values_significant": self.count("value", True),
                "lower_bounds": self.count("lower bound"),
                "upper_bounds": self.count("upper bound"),
                "bounds_significant": self.count("lower bound", True)
                + self.count("upper bound", True),
                "undetermined": self.count("undetermined"),
                "no_partner_reference": ref_alone,
                "no_partner_other": other_alone,
                "interpolated": int(self.rows["interpolated"].sum()),
            },
            "chance_fraction": self.chance_fraction,
            "points": [
                {k: _plain(v) for k, v in row.items()} for row in self.rows.to_dict("records")
            ],
        }


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


# -- sides ------------------------------------------------------------------------------------
def _keys(frame: pd.DataFrame) -> pd.Series:
    from benchseq.overview import _op_key

    return _op_key(frame)


def side_from_frame(label: str, path: str, frame: pd.DataFrame, meta: dict[str, Any]) -> Side:
    """A side from a result's table of points (read_results columns)."""
    if not len(frame):
        data = pd.DataFrame(columns=["point_id", "frequency_planned", "key", "value_db", "u_db"])
        data["is_bound"] = pd.Series([], dtype=bool)
        return Side(label, path, data, meta)
    bound = frame["is_bound"].to_numpy(dtype=bool)
    value = np.where(
        bound, frame["bound_db"].to_numpy(dtype=float), frame["rejection_db"].to_numpy(dtype=float)
    )
    planned = "frequency_planned" if "frequency_planned" in frame.columns else "frequency"
    data = pd.DataFrame(
        {
            "point_id": frame["point_id"].to_numpy(dtype=np.int64),
            "frequency_planned": frame[planned].to_numpy(dtype=float),
            "key": _keys(frame).to_numpy(),
            "value_db": value,
            "u_db": np.where(bound, np.nan, frame["uncertainty_db"].to_numpy(dtype=float)),
            "is_bound": bound,
        }
    )
    return Side(label, path, data, meta)


def read_side(path: str | Path) -> Side:
    """A result file as a side (BadInput naming the file when it cannot be read)."""
    from benchseq.report.model import load_source

    source = load_source(path)
    return side_from_frame(source.label, str(path), source.frame, source.meta)


def model_side(path: str | Path, netlist: str | Path, subcircuit: str, board_load: float) -> Side:
    """The circuit model's prediction at the points of the run in ``path`` (u = 0)."""
    from benchseq.report.circuit_model import predict
    from benchseq.report.model import gather

    report = gather([path])
    overlay = predict(report, netlist, subcircuit, board_load)
    parts = []
    for curve in report.curves:
        prediction = overlay.predictions.get(curve.index)
        if prediction is None:
            continue
        frame = curve.frame.copy()
        frame["rejection_db"] = prediction.rejection_db
        frame["uncertainty_db"] = 0.0
        frame["is_bound"] = False
        frame["bound_db"] = np.nan
        parts.append(frame)
    frame = pd.concat(parts, ignore_index=True) if parts else report.sources[0].frame.iloc[0:0]
    return Side(overlay.label, str(netlist), side_from_frame(overlay.label, "", frame, {}).frame,
                {}, is_model=True)  # fmt: skip


# -- matching ---------------------------------------------------------------------------------
def interpolate_log_f(
    f: np.ndarray, fs: np.ndarray, ys: np.ndarray, us: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Linear interpolation of ``ys`` over log10 f at ``f`` (``fs`` ascending), with the
    standard uncertainty from the weights: u² = (1−w)²·u0² + w²·u1² (uncorrelated
    neighbours). Returns (y, u, left index, right index); NaN outside [fs[0], fs[-1]]."""
    f = np.asarray(f, dtype=float)
    x, xs = np.log10(f), np.log10(np.asarray(fs, dtype=float))
    inside = (x >= xs[0]) & (x <= xs[-1])
    right = np.clip(np.searchsorted(xs, x, side="left"), 1, max(len(xs) - 1, 1))
    left = right - 1
    if len(xs) == 1:
        left = right = np.zeros(len(x), dtype=int)
        w = np.zeros(len(x))
    else:
        w = (x - xs[left]) / (xs[right] - xs[left])
    y = (1 - w) * ys[left] + w * ys[right]
    u = np.sqrt(((1 - w) * us[left]) ** 2 + (w * us[right]) ** 2)
    y = np.where(inside, y, np.nan)
    u = np.where(inside, u, np.nan)
    return y, u, left, right


def _difference(
    ref: float, ref_u: float, ref_bound: bool, oth: float, oth_u: float, oth_bound: bool, k: float
) -> tuple[float, float, str, bool, str]:
    """(d or its bound, u_c, kind, significant, reading) of other − reference."""
    if not (math.isfinite(ref) and math.isfinite(oth)) or (ref_bound and oth_bound):
        return math.nan, math.nan, "undetermined", False, "undetermined"
    d = oth - ref
    if not ref_bound and not oth_bound:
        u_c = (
            math.hypot(ref_u, oth_u) if math.isfinite(ref_u) and math.isfinite(oth_u) else math.nan
        )
        significant = math.isfinite(u_c) and abs(d) > k * u_c
        reading = ("other higher" if d > 0 else "other lower") if significant else "agree within U"
        return d, u_c, "value", significant, reading
    if oth_bound:  # other ≥ bound: d ≥ bound − ref
        u_c = ref_u if math.isfinite(ref_u) else math.nan
        significant = math.isfinite(u_c) and d > k * u_c
        return d, u_c, "lower bound", significant, "other higher" if significant else "undetermined"
    u_c = oth_u if math.isfinite(oth_u) else math.nan  # reference ≥ bound: d ≤ other − bound
    significant = math.isfinite(u_c) and d < -k * u_c
    return d, u_c, "upper bound", significant, "other lower" if significant else "undetermined"


def compare_sides(reference: Side, other: Side, k: float = K) -> Comparison:
    """Match ``other`` to ``reference`` (COLUMNS rows: every reference point, then the
    other's points that no reference point matched exactly)."""
    records: list[dict[str, Any]] = []
    used: set[int] = set()
    ref, oth = reference.frame, other.frame
    groups = {
        key: rows.sort_values("frequency_planned") for key, rows in oth.groupby("key", sort=False)
    }
    for key, rows in ref.groupby("key", sort=False):
        partner = groups.get(key)
        f = rows["frequency_planned"].to_numpy(dtype=float)
        n = len(rows)
        o_val, o_u = np.full(n, np.nan), np.full(n, np.nan)
        o_bound, o_id = np.zeros(n, dtype=bool), np.full(n, -1, dtype=np.int64)
        interp, present = np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
        if partner is not None and len(partner):
            pf = partner["frequency_planned"].to_numpy(dtype=float)
            pv, pu = (
                partner["value_db"].to_numpy(dtype=float),
                partner["u_db"].to_numpy(dtype=float),
            )
            pb = partner["is_bound"].to_numpy(dtype=bool)
            pid = partner["point_id"].to_numpy(dtype=np.int64)
            y, u, left, right = interpolate_log_f(f, pf, pv, pu)
            for i in range(n):
                exact = np.flatnonzero(np.abs(pf / f[i] - 1) <= 1e-9)
                if exact.size:
                    j = int(exact[0])
                    o_val[i], o_u[i], o_bound[i], o_id[i] = pv[j], pu[j], pb[j], pid[j]
                    present[i] = True
                    used.add(int(pid[j]))
                elif math.isfinite(y[i]):
                    o_val[i], o_u[i] = y[i], u[i]
                    o_bound[i] = bool(pb[left[i]] or pb[right[i]])
                    if o_bound[i]:  # a bound enters the interpolation: the result is a bound
                        o_u[i] = math.nan
                    interp[i] = present[i] = True
        for i, row in enumerate(rows.to_dict("records")):
            base = {
                "key": key,
                "frequency": float(f[i]),
                "ref_point_id": int(row["point_id"]),
                "ref_db": float(row["value_db"]),
                "ref_u_db": float(row["u_db"]),
                "ref_is_bound": bool(row["is_bound"]),
                "other_point_id": int(o_id[i]),
                "other_db": float(o_val[i]),
                "other_u_db": float(o_u[i]),
                "other_is_bound": bool(o_bound[i]),
                "interpolated": bool(interp[i]),
            }
            if not present[i]:
                d, u_c, kind, sig, reading = math.nan, math.nan, "no partner", False, "no partner"
            else:
                d, u_c, kind, sig, reading = _difference(
                    base["ref_db"], base["ref_u_db"], base["ref_is_bound"],
                    base["other_db"], base["other_u_db"], base["other_is_bound"], k,
                )  # fmt: skip
            records.append(
                {**base, "difference_db": d, "u_c_db": u_c, "expanded_db": k * u_c, "kind": kind,
                 "significant": sig, "reading": reading}
            )  # fmt: skip
    for row in oth.to_dict("records"):
        if int(row["point_id"]) in used:
            continue
        keyed = ref[ref["key"] == row["key"]]
        if len(keyed):  # inside the reference's span: the interpolated reference is its partner
            lo, hi = keyed["frequency_planned"].min(), keyed["frequency_planned"].max()
            if lo <= row["frequency_planned"] <= hi:
                continue
        records.append(
            {
                "key": row["key"], "frequency": float(row["frequency_planned"]),
                "ref_point_id": -1, "ref_db": math.nan, "ref_u_db": math.nan,
                "ref_is_bound": False, "other_point_id": int(row["point_id"]),
                "other_db": float(row["value_db"]), "other_u_db": float(row["u_db"]),
                "other_is_bound": bool(row["is_bound"]), "interpolated": False,
                "difference_db": math.nan, "u_c_db": math.nan, "expanded_db": math.nan,
                "kind": "no partner", "significant": False, "reading": "no partner",
            }
        )  # fmt: skip
    return Comparison(reference, other, pd.DataFrame(records, columns=list(COLUMNS)), k)


def compare_files(
    paths: Sequence[str | Path],
    model: tuple[str | Path, str, float] | None = None,
) -> list[Comparison]:
    """The first file against each of the others (and against the model when given)."""
    if not paths:
        raise BadInput("give at least one result file")
    if len(paths) < 2 and model is None:
        raise BadInput("compare needs two result files or more (or one and --model FILE.cir)")
    seen: dict[Path, str] = {}
    for path in paths:
        resolved = Path(path).resolve()
        if resolved in seen:
            raise BadInput(f"{path} is given twice (also as {seen[resolved]})")
        seen[resolved] = str(path)
    sides = [read_side(p) for p in paths]
    comparisons = [compare_sides(sides[0], other) for other in sides[1:]]
    if model is not None:
        netlist, subcircuit, board_load = model
        comparisons.append(
            compare_sides(sides[0], model_side(paths[0], netlist, subcircuit, board_load))
        )
    return comparisons


def report_comparisons(report: Any) -> list[Comparison]:
    """The first run of a report (benchseq.report.model.Report) against each of the others."""
    sides = [side_from_frame(s.label, str(s.path), s.frame, s.meta) for s in report.sources]
    return [compare_sides(sides[0], other) for other in sides[1:]]


# -- rendering --------------------------------------------------------------------------------
def _cell(value: float, fmt: str) -> str:
    return format(value, fmt) if math.isfinite(value) else ""


def difference_cell(row: dict[str, Any]) -> str:
    d = float(row["difference_db"])
    if not math.isfinite(d):
        return ""
    prefix = {"lower bound": "≥ ", "upper bound": "≤ "}.get(str(row["kind"]), "")
    return f"{prefix}{d:+.2f}"


def side_cell(value: float, bound: bool, interpolated: bool = False) -> str:
    if not math.isfinite(value):
        return ""
    text = f"≥ {value:.1f}" if bound else f"{value:.2f}"
    return text + (" (interp.)" if interpolated else "")


def pick(rows: pd.DataFrame, limit: int = MAX_ROWS) -> pd.DataFrame:
    """At most ``limit`` rows: significant first, then undetermined and unpartnered, then the
    largest |d|/u_c; shown in operating-point and frequency order."""
    if len(rows) <= limit:
        return rows
    ratio = (rows["difference_db"].abs() / rows["u_c_db"]).fillna(0.0)
    rank = np.select(
        [rows["significant"].to_numpy(), (rows["kind"] != "value").to_numpy()], [0, 1], 2
    )
    order = pd.DataFrame({"rank": rank, "ratio": -ratio.to_numpy()}, index=rows.index)
    keep = order.sort_values(["rank", "ratio"], kind="stable").index[:limit]
    return rows.loc[sorted(keep)]


TABLE_HEADERS = (
    "operating point",
    "frequency",
    "reference [dB]",
    "other [dB]",
    "d = other − ref [dB]",
    f"U (k={K:g}) [dB]",
    "reading",
)


def table_cells(rows: pd.DataFrame) -> list[list[str]]:
    """Text cells per row, in TABLE_HEADERS order."""
    cells = []
    for row in rows.to_dict("records"):
        cells.append(
            [
                str(row["key"]),
                format_si(float(row["frequency"]), "Hz", 4),
                side_cell(float(row["ref_db"]), bool(row["ref_is_bound"])),
                side_cell(
                    float(row["other_db"]), bool(row["other_is_bound"]), bool(row["interpolated"])
                ),
                difference_cell(row),
                _cell(float(row["expanded_db"]), ".2f"),
                str(row["reading"]) + (" *" if row["significant"] else ""),
            ]
        )
    return cells


def render_comparisons(comparisons: Sequence[Comparison], all_rows: bool = False) -> list[Any]:
    """Rich renderables: each comparison's summary, then its table (summarised when long)."""
    from rich.markup import escape
    from rich.table import Table

    parts: list[Any] = []
    for comparison in comparisons:
        lines = comparison.summary()
        parts.append(f"[bold]{escape(lines[0])}[/]")
        parts += [escape(line) for line in lines[1:]]
        rows = comparison.rows if all_rows else pick(comparison.rows)
        table = Table(title_justify="left")
        for name in TABLE_HEADERS:
            table.add_column(
                escape(name), justify="left" if name in ("operating point", "reading") else "right"
            )
        for cells in table_cells(rows):
            table.add_row(*(escape(c) for c in cells))
        if len(rows) < len(comparison.rows):
            table.title = (
                f"{len(rows)} of {len(comparison.rows)} rows (significant, undetermined and "
                "unpartnered first, then the largest |d|/u_c)"
            )
            table.caption = "every row: --all (or --json)"
        parts.append(table)
        parts.append(
            "[dim]* significant: |d| > k·u_c, k = 2 (bounds: beyond it in the bound's direction)[/]"
        )
    return parts


# -- plot ---------------------------------------------------------------------------------------
def comparison_figure(comparison: Comparison) -> Any:
    """Both curves (top) and the difference with its ±U band (bottom), per operating point;
    the legend beside the data; the title says how many operating points were drawn."""
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    from benchseq.report.plots import PALETTE, _frequency_axis, _settle_limits, plot_text

    fig = Figure(figsize=(10.0, 6.4))
    fig.subplots_adjust(left=0.08, right=0.72, bottom=0.09, top=0.9, hspace=0.08)
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=[1.4, 1.0])
    rows = comparison.rows
    keys = list(dict.fromkeys(rows["key"]))
    ref, oth = comparison.reference.frame, comparison.other.frame
    for n, key in enumerate(keys):
        colour = PALETTE[n % len(PALETTE)]
        for side, style, marker in ((ref, "-", "o"), (oth, "--", "s")):
            part = side[side["key"] == key].sort_values("frequency_planned")
            f = part["frequency_planned"].to_numpy(dtype=float)
            v = part["value_db"].to_numpy(dtype=float)
            b = part["is_bound"].to_numpy(dtype=bool)
            top.plot(f, np.where(b, np.nan, v), color=colour, linestyle=style, marker=marker,
                     markersize=3, linewidth=1.1)  # fmt: skip
            if b.any():
                top.plot(f[b], v[b], linestyle="none", marker="^", markerfacecolor="none",
                         markeredgecolor=colour)  # fmt: skip
        part = rows[(rows["key"] == key) & rows["difference_db"].notna()].sort_values("frequency")
        f = part["frequency"].to_numpy(dtype=float)
        d = part["difference_db"].to_numpy(dtype=float)
        big_u = part["expanded_db"].to_numpy(dtype=float)
        value = (part["kind"] == "value").to_numpy()
        bottom.fill_between(f, np.where(value, d - big_u, np.nan), np.where(value, d + big_u, np.nan),
                            color=colour, alpha=0.18, linewidth=0)  # fmt: skip
        bottom.plot(f[value], d[value], color=colour, marker="o", markersize=3, linewidth=1.0)
        for kind, glyph in (("lower bound", "^"), ("upper bound", "v")):
            sel = (part["kind"] == kind).to_numpy()
            if sel.any():
                bottom.plot(f[sel], d[sel], linestyle="none", marker=glyph,
                            markerfacecolor="none", markeredgecolor=colour)  # fmt: skip
        sig = part["significant"].to_numpy(dtype=bool)
        if sig.any():
            bottom.plot(f[sig], d[sig], linestyle="none", marker="o", markersize=8,
                        markerfacecolor="none", markeredgecolor="#a23b3b")  # fmt: skip
    for ax in (top, bottom):
        _frequency_axis(ax)
        _settle_limits(ax)
    top.set_xlabel("")
    top.set_ylabel("rejection [dB]")
    bottom.set_ylabel("other − reference [dB]")
    bottom.axhline(0.0, color="#888888", linewidth=0.8)
    shown = len(PALETTE)
    handles = [
        Line2D([], [], color=PALETTE[n % len(PALETTE)], label=plot_text(key))
        for n, key in enumerate(keys[:shown])
    ]
    if len(keys) > shown:
        handles.append(
            Line2D([], [], linestyle="none",
                   label=f"… {len(keys) - shown} more (colours repeat)")
        )  # fmt: skip
        significant = rows[rows["significant"]].copy()
        significant["ratio"] = (significant["difference_db"].abs() / significant["u_c_db"]).fillna(
            0
        )
        for _, row in significant.sort_values("ratio", ascending=False).head(8).iterrows():
            bottom.annotate(
                plot_text(f"{row['key']}, {format_si(float(row['frequency']), 'Hz', 3)}"),
                (row["frequency"], row["difference_db"]), xytext=(6, 4),
                textcoords="offset points", fontsize="xx-small", color="#a23b3b",
            )  # fmt: skip
    handles += [
        Line2D([], [], color="#444444", linestyle="-", marker="o", markersize=3,
               label=plot_text(f"reference: {comparison.reference.label}")),
        Line2D([], [], color="#444444", linestyle="--", marker="s", markersize=3,
               label=plot_text(f"other: {comparison.other.label}")),
        Line2D([], [], linestyle="none", marker="^", markerfacecolor="none",
               markeredgecolor="#444444", label="lower bound (▲) / upper bound of d (▼)"),
        Line2D([], [], linestyle="none", marker="o", markersize=8, markerfacecolor="none",
               markeredgecolor="#a23b3b", label=f"significant: |d| > {comparison.k:g}·u_c"),
        Line2D([], [], color="#999999", linewidth=6, alpha=0.4,
               label=f"band: d ± U, U = {comparison.k:g}·u_c"),
    ]  # fmt: skip
    fig.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.73, 0.9), fontsize="x-small",
               frameon=False)  # fmt: skip
    sig = comparison.count("value", True)
    fig.suptitle(
        plot_text(
            f"{comparison.other.label} against {comparison.reference.label}\n"
            f"{len(keys)} operating point{'s' if len(keys) != 1 else ''} drawn; "
            f"{sig} of {comparison.count('value')} values differ significantly"
        ),
        fontsize="small",
        x=0.08,
        ha="left",
    )
    return fig


def write_plot(comparisons: Sequence[Comparison], out: str | Path) -> list[Path]:
    """One PNG per comparison: ``out`` for the first, ``<stem>-2.png`` … for the others."""
    from benchseq.report.output import write_atomic
    from benchseq.report.plots import png_bytes

    out = Path(out)
    written = []
    for n, comparison in enumerate(comparisons):
        target = out if n == 0 else out.with_name(f"{out.stem}-{n + 1}{out.suffix}")
        write_atomic(target, png_bytes(comparison_figure(comparison)))
        written.append(target)
    return written
