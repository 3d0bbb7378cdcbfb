"""The report's plots (matplotlib, Agg/SVG canvases, no pyplot state): rejection with k = 2
bars, lower bounds and the mask; phase of the ratio; the measured floor when it exists.

Lower bounds are drawn with their own glyph: a short bar at the bound with an arrow rising
from it ("the true value is at or above this"), hollow, in the curve's colour. In SVG every
bound glyph sits in a group whose id starts with BOUND_GID, values in VALUE_GID."""

from __future__ import annotations

import contextlib
import io
import re
import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from benchseq.report.model import COVERAGE_FACTOR, Curve, Report, ratio_phase_deg

PALETTE = (
    "#2b5c8a",  # deep blue
    "#c8641e",  # burnt orange
    "#3d8b5a",  # green
    "#8a3d7a",  # plum
    "#b8962e",  # ochre
    "#2e8b8b",  # teal
    "#a23b3b",  # brick
    "#555a66",  # slate
)
LINESTYLES: tuple[Any, ...] = ("-", "--", "-.", ":")  # matplotlib dash names
MASK_COLOUR = "#3a3a3a"
BOUND_GID = "bound-markers"
VALUE_GID = "rejection-values"
MASK_GID = "mask-line"
FIGURE_SIZE = (8.0, 4.6)  # inches


def bound_marker() -> Any:
    """The lower-bound glyph: base bar at the bound, stem and arrowhead pointing up."""
    from matplotlib.path import Path

    vertices = [
        (-0.8, 0.0),
        (0.8, 0.0),
        (0.0, 0.0),
        (0.0, 2.0),
        (-0.6, 1.3),
        (0.0, 2.0),
        (0.6, 1.3),
    ]
    codes = [
        Path.MOVETO,
        Path.LINETO,
        Path.MOVETO,
        Path.LINETO,
        Path.MOVETO,
        Path.LINETO,
        Path.LINETO,
    ]
    return Path(vertices, codes)


def plot_text(text: Any) -> str:
    """File text made literal for matplotlib: '$' would start mathtext, a leading '_'
    would hide a legend entry."""
    value = re.sub(r"(?<!\\)\$", r"\\$", str(text))
    return " " + value if value.startswith("_") else value


@contextlib.contextmanager
def quiet_fonts() -> Iterator[None]:
    """Characters the font lacks are drawn as boxes without a warning per glyph."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r".*[Gg]lyph .* missing from")
        warnings.filterwarnings("ignore", message=r".*[Mm]atplotlib currently does not support")
        yield


def _style(curve: Curve, colours: dict[int, str] | None = None) -> tuple[str, str]:
    colour = (colours or {}).get(curve.index, PALETTE[curve.index % len(PALETTE)])
    return colour, LINESTYLES[curve.source_index % len(LINESTYLES)]


def _column(curve: Curve, name: str) -> np.ndarray:
    frame = curve.frame
    if name not in frame.columns:
        return np.full(len(frame), np.nan)
    return frame[name].to_numpy()


def _frequency_axis(ax: Any) -> None:
    from matplotlib.ticker import EngFormatter

    ax.set_xscale("log")
    ax.xaxis.set_major_formatter(EngFormatter(unit="Hz", sep=" "))
    ax.set_xlabel("frequency")
    ax.grid(True, which="major", color="#d0d0d0", linewidth=0.6)
    ax.grid(True, which="minor", color="#ececec", linewidth=0.4)


def _settle_limits(ax: Any) -> None:
    """Give the axes a usable span when the data have none (one frequency, one value)."""
    box = ax.dataLim
    x0, x1, y0, y1 = box.x0, box.x1, box.y0, box.y1
    log_y = ax.get_yscale() == "log"
    x_span: tuple[float, float] | None = None
    y_span: tuple[float, float] | None = None
    if not (np.isfinite([x0, x1]).all() and x0 > 0):
        x_span = (10.0, 1e6)
    elif x1 <= x0 * (1 + 1e-9):
        x_span = (x0 / 3.0, x0 * 3.0)
    if not np.isfinite([y0, y1]).all() or (log_y and y0 <= 0):
        y_span = (1e-6, 1.0) if log_y else (0.0, 1.0)
    elif y1 - y0 <= 1e-9 * max(abs(y0), 1.0):
        y_span = (y0 / 3.0, y0 * 3.0) if log_y else (y0 - 1.0, y0 + 1.0)
    if x_span is not None:
        ax.set_autoscalex_on(False)  # before set_xlim: no autoscale pass on the singular data
        ax.set_xlim(*x_span)
    if y_span is not None:
        ax.set_autoscaley_on(False)
        ax.set_ylim(*y_span)


def _empty(ax: Any, report: Report) -> bool:
    if any(len(c.frame) for c in report.curves):
        return False
    ax.text(0.5, 0.5, "no points stored", transform=ax.transAxes, ha="center", va="center")
    return True


@dataclass
class RejectionArtists:
    """What draw_rejection put on the axes (tests look at these)."""

    values: list[Any] = field(default_factory=list)  # one errorbar container per curve
    bounds: list[Any] = field(default_factory=list)  # Line2D of bound glyphs per curve
    masks: list[Any] = field(default_factory=list)  # Line2D per distinct mask
    verdicts: list[str] = field(default_factory=list)  # one line per source


def draw_rejection(
    ax: Any,
    report: Report,
    curves: list[Curve] | None = None,
    panel: bool = False,
    colours: dict[int, str] | None = None,
) -> RejectionArtists:
    """Rejection (dB) over log frequency: values with ±k·u bars, bounds, masks, verdicts.

    ``curves``: draw only these (a panel of small multiples); ``panel``: no legend and no
    verdict title (the figure carries them once)."""
    from matplotlib.lines import Line2D

    drawn = RejectionArtists()
    _frequency_axis(ax)
    ax.set_ylabel("rejection [dB]")
    glyph = bound_marker()
    handles: list[Any] = []
    if not _empty(ax, report):
        for curve in report.curves if curves is None else curves:
            colour, line = _style(curve, colours)
            f = _column(curve, "frequency").astype(float)
            bound = _column(curve, "is_bound").astype(bool)
            values = np.where(bound, np.nan, _column(curve, "rejection_db").astype(float))
            bars = COVERAGE_FACTOR * np.where(bound, np.nan, _column(curve, "uncertainty_db"))
            label = plot_text(report.curve_label(curve))
            container = ax.errorbar(
                f, values, yerr=np.nan_to_num(bars, nan=0.0), color=colour,
                linestyle="none" if curve.repeats else line, linewidth=1.4,
                marker="D" if curve.repeats else "o", markersize=3.6, capsize=2.5,
                elinewidth=0.9, label=label,
            )  # fmt: skip
            container.lines[0].set_gid(f"{VALUE_GID}-{curve.index}")
            drawn.values.append(container)
            handles.append(container)
            if bound.any():
                (marks,) = ax.plot(
                    f[bound], _column(curve, "bound_db").astype(float)[bound],
                    linestyle="none", marker=glyph, markersize=15, markerfacecolor="none",
                    markeredgecolor=colour, markeredgewidth=1.5, label="_bound",
                )  # fmt: skip
                marks.set_gid(f"{BOUND_GID}-{curve.index}")
                drawn.bounds.append(marks)
    handles += _draw_model(ax, report, curves, colours)
    seen: set[tuple[Any, ...]] = set()
    for source in report.sources:
        mask = source.mask
        if mask is None:
            continue
        key = (mask.name, tuple(mask.frequencies), tuple(mask.min_rejection_db))
        if key in seen:
            continue
        seen.add(key)
        (line,) = ax.plot(
            mask.frequencies, mask.min_rejection_db, color=MASK_COLOUR, linewidth=2.0,
            linestyle=(0, (6, 2, 1, 2)), label=plot_text(f"mask: {mask.name}" if mask.name else "mask"),
        )  # fmt: skip
        line.set_gid(f"{MASK_GID}-{len(drawn.masks)}")
        drawn.masks.append(line)
        handles.append(line)
    _settle_limits(ax)
    if drawn.masks:
        bottom, top = ax.get_ylim()
        for line in drawn.masks:
            xs, ys = line.get_data()
            ax.fill_between(xs, ys, bottom, color=MASK_COLOUR, alpha=0.07, linewidth=0)
        ax.set_ylim(bottom, top)
    if drawn.bounds:
        handles.append(
            Line2D([], [], linestyle="none", marker=glyph, markersize=15, markerfacecolor="none",
                   markeredgecolor="#444444", markeredgewidth=1.5,
                   label="lower bound (true rejection at or above)")
        )  # fmt: skip
    if panel:
        return drawn
    if handles:
        handles.append(Line2D([], [], linestyle="none", label=f"bars: ±U, k = {COVERAGE_FACTOR:g}"))
        ax.legend(handles=handles, loc="best", fontsize="x-small", framealpha=0.85)
    for source in report.sources:
        prefix = f"{source.label}: " if report.overlay else ""
        partial = " [partial run]" if source.partial else ""
        short = source.verdict.short()
        if source.mask is None and source.plan_problem:
            short += " (stored plan unreadable)"
        drawn.verdicts.append(plot_text(f"{prefix}{short}{partial}"))
    ax.set_title("\n".join(drawn.verdicts), fontsize="small", loc="left")
    return drawn


MODEL_GID = "model-curve"


def _draw_model(
    ax: Any,
    report: Report,
    curves: list[Curve] | None = None,
    colours: dict[int, str] | None = None,
) -> list[Any]:
    """A circuit model's predicted rejection, one dashed line per curve (when present)."""
    overlay = report.model
    if overlay is None:
        return []
    lines = []
    for curve in report.curves if curves is None else curves:
        prediction = overlay.predictions.get(curve.index)
        if prediction is None:
            continue
        colour, _ = _style(curve, colours)
        (line,) = ax.plot(
            _column(curve, "frequency").astype(float), prediction.rejection_db, color=colour,
            linestyle=(0, (4, 2)), linewidth=1.1, alpha=0.8,
            label=plot_text(f"{overlay.label}, {report.curve_label(curve)}"),
        )  # fmt: skip
        line.set_gid(f"{MODEL_GID}-{curve.index}")
        lines.append(line)
    return lines


def draw_model_difference(ax: Any, report: Report) -> list[Any]:
    """Measured − predicted (dB) with ±k·u bars; a bound minus the prediction as a bound."""
    from benchseq.report.circuit_model import differences

    _frequency_axis(ax)
    ax.set_ylabel("measured − model [dB]")
    ax.axhline(0.0, color="#888888", linewidth=0.8)
    drawn: list[Any] = []
    overlay = report.model
    glyph = bound_marker()
    for curve in report.curves:
        if overlay is None or curve.index not in overlay.predictions:
            continue
        colour, _ = _style(curve)
        f = _column(curve, "frequency").astype(float)
        diff, u, bound_diff = differences(overlay, curve)
        container = ax.errorbar(
            f, diff, yerr=np.nan_to_num(COVERAGE_FACTOR * u, nan=0.0), color=colour,
            linestyle="none", marker="o", markersize=3.6, capsize=2.5, elinewidth=0.9,
            label=plot_text(report.curve_label(curve)),
        )  # fmt: skip
        drawn.append(container)
        if np.isfinite(bound_diff).any():
            ax.plot(
                f, bound_diff, linestyle="none", marker=glyph, markersize=15,
                markerfacecolor="none", markeredgecolor=colour, markeredgewidth=1.5,
                label="_bound",
            )  # fmt: skip
    if drawn:
        ax.legend(loc="best", fontsize="x-small", framealpha=0.85)
    title = (
        "" if overlay is None else plot_text(f"{overlay.label}: bars ±U, k = {COVERAGE_FACTOR:g}")
    )
    ax.set_title(title, fontsize="small", loc="left")
    return drawn


def model_difference_figure(report: Report) -> Any:
    fig = _figure(3.6, 0.15)
    draw_model_difference(fig.add_subplot(), report)
    return fig


def draw_phase(
    ax: Any,
    report: Report,
    curves: list[Curve] | None = None,
    panel: bool = False,
    colours: dict[int, str] | None = None,
) -> list[Any]:
    """Phase of V_out/V_pin (degrees, unwrapped along each curve); bounds have no phase."""
    _frequency_axis(ax)
    ax.set_ylabel("phase of V_out/V_pin [°]")
    lines: list[Any] = []
    if _empty(ax, report):
        _settle_limits(ax)
        return lines
    for curve in report.curves if curves is None else curves:
        colour, line = _style(curve, colours)
        f = _column(curve, "frequency").astype(float)
        bound = _column(curve, "is_bound").astype(bool)
        ratio = _column(curve, "ratio")
        phase = np.full(len(f), np.nan)
        good = ~bound & np.isfinite(np.asarray(ratio, dtype=complex))
        if good.any():
            unwrapped = np.degrees(np.unwrap(np.radians(ratio_phase_deg(ratio[good]))))
            unwrapped -= 360.0 * np.round(unwrapped[0] / 360.0)
            phase[good] = unwrapped
        (drawn,) = ax.plot(
            f, phase, color=colour, linestyle="none" if curve.repeats else line,
            marker="D" if curve.repeats else "o", markersize=3.6, linewidth=1.3,
            label=plot_text(report.curve_label(curve)),
        )  # fmt: skip
        lines.append(drawn)
    _settle_limits(ax)
    if not panel:
        ax.legend(loc="best", fontsize="x-small", framealpha=0.85)
    return lines


def draw_floor(ax: Any, report: Report) -> list[Any]:
    """Output ripple against the generator-off floor (V peak at the test frequency)."""
    _frequency_axis(ax)
    ax.set_yscale("log")
    ax.set_ylabel("amplitude [V peak]")
    lines: list[Any] = []
    for curve in report.curves:
        colour, line = _style(curve)
        f = _column(curve, "frequency").astype(float)
        name = report.curve_label(curve)
        series = (
            (
                "output ripple",
                np.abs(np.asarray(_column(curve, "output"), dtype=complex)),
                "o",
                line,
            ),
            ("generator-off output", _column(curve, "floor_output").astype(float), "v", ":"),
            ("generator-off pin", _column(curve, "floor_pin").astype(float), "s", ":"),
        )
        for what, values, marker, style in series:
            keep = np.isfinite(values) & (values > 0)
            if not keep.any():
                continue
            (drawn,) = ax.plot(
                f[keep], values[keep], color=colour, marker=marker, markersize=3.4,
                linestyle=style, linewidth=1.1, markerfacecolor="none" if marker != "o" else colour,
                label=plot_text(f"{name}: {what}"),
            )  # fmt: skip
            lines.append(drawn)
    _settle_limits(ax)
    if lines:
        ax.legend(loc="best", fontsize="x-small", framealpha=0.85)
    else:
        ax.text(0.5, 0.5, "no floor measured", transform=ax.transAxes, ha="center", va="center")
    return lines


# -- figures ---------------------------------------------------------------------------------
def _figure(height: float, top_in: float) -> Any:
    """A figure with fixed margins (inches at the top for titles; cheaper than a layout engine)."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(FIGURE_SIZE[0], height))
    fig.subplots_adjust(
        left=0.85 / FIGURE_SIZE[0],
        right=1 - 0.2 / FIGURE_SIZE[0],
        bottom=0.5 / height,
        top=1 - top_in / height,
        hspace=0.12,
    )
    return fig


def _title_inches(report: Report) -> float:
    return 0.15 + 0.19 * len(report.sources)


def rejection_figure(report: Report) -> tuple[Any, RejectionArtists]:
    """One plot, or small multiples (one panel per operating point, shared axes) when the
    report has more than MAX_CURVES_IN_ONE curves."""
    if len(report.curves) > MAX_CURVES_IN_ONE:
        return _rejection_panels(report)
    fig = _figure(FIGURE_SIZE[1], _title_inches(report))
    return fig, draw_rejection(fig.add_subplot(), report)


def phase_figure(report: Report) -> Any:
    if len(report.curves) > MAX_CURVES_IN_ONE:
        return _phase_panels(report)
    fig = _figure(3.6, 0.15)
    draw_phase(fig.add_subplot(), report)
    return fig


# -- small multiples -------------------------------------------------------------------------
MAX_CURVES_IN_ONE = 4  # more curves than this: one panel per operating point
MAX_PANELS = 16  # more operating points than this: one panel per DC level
PANEL_COLUMNS = 4
PANEL_SIZE = (2.6, 2.0)  # inches per panel


def panel_groups(report: Report) -> tuple[list[tuple[str, list[Curve]]], dict[int, str], list[Any]]:
    """(panel title, curves) per panel, a colour per curve and the colour key's legend
    handles. One panel per operating point (the same operating point of several runs
    shares its panel; colour per run), or per DC level when that gives more than
    MAX_PANELS panels (colour per load and ripple, the same in every panel)."""
    from matplotlib.lines import Line2D

    from benchseq.units import format_si

    def by(key: Any) -> list[tuple[str, list[Curve]]]:
        groups: dict[str, list[Curve]] = {}
        for curve in report.curves:
            groups.setdefault(key(curve), []).append(curve)
        return list(groups.items())

    groups = by(lambda c: c.operating_point.label())
    if len(groups) <= MAX_PANELS:
        colours = {c.index: PALETTE[c.source_index % len(PALETTE)] for c in report.curves}
        return groups, colours, []
    groups = by(lambda c: format_si(c.operating_point.dc_level, "V", 4) + " DC")
    keys: dict[str, str] = {}
    colours = {}
    for curve in report.curves:
        label = curve.operating_point.label().split(", ", 1)[-1]
        if curve.repeats:
            label = "repeat at " + label
        colour = keys.setdefault(label, PALETTE[len(keys) % len(PALETTE)])
        colours[curve.index] = colour
    handles = [Line2D([], [], color=c, linewidth=2, label=plot_text(k)) for k, c in keys.items()]
    if len(keys) > len(PALETTE):
        handles = handles[: len(PALETTE)]
        handles.append(
            Line2D([], [], linestyle="none", label=f"{len(keys)} kinds of curve: colours repeat")
        )
    return groups, colours, handles


def _panel_grid(
    report: Report, groups: list[tuple[str, list[Curve]]], top_in: float, legend_items: int
) -> Any:
    from matplotlib.figure import Figure

    cols = min(PANEL_COLUMNS, len(groups))
    rows = -(-len(groups) // cols)
    legend_in = 0.3 + 0.17 * -(-(min(len(report.sources), 6) + legend_items) // 2)
    width = 0.9 + cols * PANEL_SIZE[0]
    height = top_in + rows * PANEL_SIZE[1] + 0.5 + legend_in
    fig = Figure(figsize=(width, height))
    fig.subplots_adjust(
        left=0.75 / width, right=1 - 0.15 / width, top=1 - top_in / height,
        bottom=(0.45 + legend_in) / height, hspace=0.32, wspace=0.08,
    )  # fmt: skip
    axes = fig.subplots(rows, cols, sharex=True, sharey=True, squeeze=False)
    for ax in axes.flat[len(groups) :]:
        ax.set_visible(False)
    return fig, axes, legend_in


def _panel_labels(axes: Any, used: int) -> None:
    """Axis labels once per row and column; tick labels under every bottom-most panel."""
    cols = axes.shape[1]
    for i, ax in enumerate(axes.flat[:used]):
        if i % cols:
            ax.set_ylabel("")
        if i + cols < used:
            ax.set_xlabel("")
        else:
            ax.xaxis.set_tick_params(labelbottom=True)


def _panel_legend(fig: Any, report: Report, legend_in: float, extra: list[Any]) -> None:
    """The legend below the panels, outside the data: line style per run, glyphs, mask."""
    from matplotlib.lines import Line2D

    handles = [
        Line2D([], [], color=PALETTE[s.index % len(PALETTE)] if report.overlay else "#444444",
               linestyle=LINESTYLES[s.index % len(LINESTYLES)], marker="o", markersize=3.6,
               label=plot_text(s.label if report.overlay else "measured"))
        for s in report.sources[:6]
    ]  # fmt: skip
    handles += extra
    fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.02, 0.01), ncols=2,
               fontsize="x-small", frameon=False)  # fmt: skip


def _rejection_panels(report: Report) -> tuple[Any, RejectionArtists]:
    from matplotlib.lines import Line2D

    groups, colours, keys = panel_groups(report)
    verdicts = []
    for source in report.sources:
        prefix = f"{source.label}: " if report.overlay else ""
        partial = " [partial run]" if source.partial else ""
        short = source.verdict.short()
        if source.mask is None and source.plan_problem:
            short += " (stored plan unreadable)"
        verdicts.append(plot_text(f"{prefix}{short}{partial}"))
    count = drawn_count_text(report, len(groups))
    top_in = 0.3 + 0.19 * (len(verdicts) + 1)
    fig, axes, legend_in = _panel_grid(report, groups, top_in, len(keys) + 3)
    drawn = RejectionArtists(verdicts=verdicts)
    for ax, (title, curves) in zip(axes.flat, groups, strict=False):
        part = draw_rejection(ax, report, curves, panel=True, colours=colours)
        drawn.values += part.values
        drawn.bounds += part.bounds
        drawn.masks += part.masks[:1] if not drawn.masks else []
        ax.set_title(plot_text(title), fontsize="x-small", loc="left")
        ax.tick_params(labelsize="x-small")
    _panel_labels(axes, len(groups))
    extra = [
        *keys,
        Line2D([], [], linestyle="none", marker=bound_marker(), markersize=12,
               markerfacecolor="none", markeredgecolor="#444444",
               label="lower bound (true rejection at or above)"),
        Line2D([], [], linestyle="none", label=f"bars: ±U, k = {COVERAGE_FACTOR:g}"),
    ]  # fmt: skip
    if drawn.masks:
        extra.append(Line2D([], [], color=MASK_COLOUR, linewidth=2.0, linestyle=(0, (6, 2, 1, 2)),
                            label="mask (shaded: fails)"))  # fmt: skip
    _panel_legend(fig, report, legend_in, extra)
    fig.suptitle("\n".join([*verdicts, count]), fontsize="small", x=0.75 / fig.get_figwidth(),
                 ha="left", y=1 - 0.12 / fig.get_figheight(), va="top")  # fmt: skip
    return fig, drawn


def _phase_panels(report: Report) -> Any:
    groups, colours, keys = panel_groups(report)
    fig, axes, legend_in = _panel_grid(report, groups, 0.5, len(keys))
    for ax, (title, curves) in zip(axes.flat, groups, strict=False):
        draw_phase(ax, report, curves, panel=True, colours=colours)
        ax.set_title(plot_text(title), fontsize="x-small", loc="left")
        ax.tick_params(labelsize="x-small")
    _panel_labels(axes, len(groups))
    _panel_legend(fig, report, legend_in, keys)
    fig.suptitle(drawn_count_text(report, len(groups)), fontsize="small",
                 x=0.75 / fig.get_figwidth(), ha="left", y=1 - 0.12 / fig.get_figheight(),
                 va="top")  # fmt: skip
    return fig


def drawn_count_text(report: Report, panels: int) -> str:
    """'20 curves drawn in 20 panels (one per operating point)'."""
    per = "operating point"
    if panels and panels < len({c.operating_point.label() for c in report.curves}):
        per = "DC level"
    return f"{len(report.curves)} curves drawn in {panels} panels (one per {per}; shared axes)"


def floor_figure(report: Report) -> Any | None:
    """The floor plot, or None when no run measured the generator-off floor."""
    if not report.has_floor():
        return None
    fig = _figure(3.8, 0.15)
    draw_floor(fig.add_subplot(), report)
    return fig


def report_figures(report: Report) -> list[tuple[str, Any]]:
    """(name, figure) of every plot the report shows, in reading order."""
    figures = [("rejection", rejection_figure(report)[0]), ("phase", phase_figure(report))]
    if report.model is not None:
        figures.append(("model difference", model_difference_figure(report)))
    floor = floor_figure(report)
    if floor is not None:
        figures.append(("floor", floor))
    if report.overlay:
        from benchseq.compare import comparison_figure, report_comparisons

        for n, comparison in enumerate(report_comparisons(report)):
            figures.append(
                (f"differences {n + 1}" if n else "differences", comparison_figure(comparison))
            )
    return figures


def stacked_figure(report: Report) -> Any:
    """All plots in one image, one above the other, sharing the frequency axis."""
    count = 2 + int(report.has_floor()) + int(report.model is not None)
    fig = _figure(4.6 + 3.0 * (count - 1), 0.35 + _title_inches(report))
    axes = fig.subplots(count, 1, sharex=True, height_ratios=[1.4] + [1.0] * (count - 1))
    draw_rejection(axes[0], report)
    draw_phase(axes[1], report)
    if report.has_floor():
        draw_floor(axes[2], report)
    if report.model is not None:
        draw_model_difference(axes[-1], report)
    for ax in axes[:-1]:
        ax.set_xlabel("")
    fig.suptitle(plot_text(report.title), fontsize="medium", y=1 - 0.08 / fig.get_figheight(),
                 va="top")  # fmt: skip
    return fig


def svg_text(fig: Any) -> str:
    """The figure as an <svg> element (text as paths: no fonts needed, nothing to inject)."""
    import matplotlib
    from matplotlib.backends.backend_svg import FigureCanvasSVG

    buffer = io.StringIO()
    with quiet_fonts(), matplotlib.rc_context({"svg.fonttype": "path"}):
        FigureCanvasSVG(fig)
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    text = buffer.getvalue()
    return text[text.index("<svg") :]


def png_bytes(fig: Any, dpi: int = 130) -> bytes:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    buffer = io.BytesIO()
    with quiet_fonts():
        FigureCanvasAgg(fig)
        fig.savefig(buffer, format="png", dpi=dpi, metadata={"Software": None})
    return buffer.getvalue()
