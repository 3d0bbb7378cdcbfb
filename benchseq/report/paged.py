"""The report as PDF pages (matplotlib PdfPages) and as one PNG of the plots.

PDF pages, in order:
  1. summary (title, device, date, status, verdicts) above the rejection plot  (A4 portrait)
  2. phase of the ratio, with the generator-off floor below it when measured    (A4 portrait)
  3. the table of points: ceil(points / ROWS_PER_PAGE) pages per result file,
     at least one                                                              (A4 landscape)
  4. conditions: one page per result file (two columns; more pages only if
     they overflow)                                                            (A4 portrait)
  5. one page: the flags that occur, explained, and the safety cautions        (A4 portrait)
"""

from __future__ import annotations

import math
import textwrap
from pathlib import Path
from typing import Any

from benchseq.report.conditions import conditions
from benchseq.report.model import (
    PLOT_CAPTIONS,
    SAFETY_CAUTIONS,
    Report,
    Source,
    headline,
    point_table,
)
from benchseq.report.plots import (
    draw_floor,
    draw_phase,
    draw_rejection,
    plot_text,
    png_bytes,
    quiet_fonts,
    stacked_figure,
)

A4_PORTRAIT = (8.27, 11.69)  # inches
A4_LANDSCAPE = (11.69, 8.27)
ROWS_PER_PAGE = 34
TEXT_SIZE = 7.5  # points
_LINE = 1.42 * TEXT_SIZE / 72  # inches per text line


def _page(size: tuple[float, float] = A4_PORTRAIT) -> Any:
    from matplotlib.figure import Figure

    return Figure(figsize=size)


class _TextFlow:
    """Lines of text placed down one or more columns of pages."""

    def __init__(self, pages: list[Any], title: str, columns: int = 1) -> None:
        self.pages = pages
        self.title = title
        self.columns = columns
        self.width_chars = 120 if columns == 1 else 62
        self._new_page()

    def _new_page(self) -> None:
        self.fig = _page()
        self.pages.append(self.fig)
        self.fig.text(0.06, 0.965, plot_text(self.title), fontsize=12, weight="bold", va="top")
        self.column = 0
        self.y = 0.935

    def _advance(self, lines: int) -> None:
        step = lines * _LINE / A4_PORTRAIT[1]
        if self.y - step < 0.04:
            self.column += 1
            self.y = 0.935
            if self.column >= self.columns:
                self._new_page()

    def line(
        self, text: str, *, weight: str = "normal", indent: int = 0, size: float = TEXT_SIZE
    ) -> None:
        width = self.width_chars - indent
        for part in textwrap.wrap(text, width, subsequent_indent="  ") or [""]:
            self._advance(1)
            x = 0.06 + self.column * (0.88 / self.columns) + indent * 0.006
            self.fig.text(x, self.y, plot_text(part), fontsize=size, weight=weight, va="top")
            self.y -= _LINE / A4_PORTRAIT[1]

    def gap(self) -> None:
        self.y -= 0.5 * _LINE / A4_PORTRAIT[1]


def _summary_page(report: Report) -> Any:
    fig = _page()
    y = 0.965
    fig.text(0.06, y, plot_text(report.title), fontsize=14, weight="bold", va="top")
    y -= 0.03
    for source in report.sources:
        if report.overlay:
            fig.text(0.06, y, plot_text(source.label), fontsize=9, weight="bold", va="top")
            y -= 0.018
        for key, value in headline(source):
            for k, part in enumerate(textwrap.wrap(value, 105) or [""]):
                label = f"{key}:" if k == 0 else ""
                fig.text(0.06, y, plot_text(label), fontsize=8, color="#555555", va="top")
                colour = "#9a6a00" if key == "status" and source.partial else "black"
                fig.text(0.2, y, plot_text(part), fontsize=8, va="top", color=colour,
                         weight="bold" if key == "status" and source.partial else "normal")  # fmt: skip
                y -= 0.0145
        y -= 0.008
    bottom = 0.1
    height = max(0.25, y - 0.03 - bottom)
    ax = fig.add_axes((0.1, bottom, 0.84, height))
    if _many(report):  # small multiples on their own pages
        ax.set_axis_off()
        ax.text(0.5, 0.5, plot_text(f"{len(report.curves)} curves: the rejection and phase plots "
                "follow as small multiples, one panel per operating point or DC level"),
                ha="center", va="center", fontsize=9, wrap=True)  # fmt: skip
    else:
        draw_rejection(ax, report)
    caption = textwrap.fill(PLOT_CAPTIONS["rejection"], 120)
    fig.text(0.06, 0.055, caption, fontsize=6.5, color="#555555", va="top")
    return fig


def _many(report: Report) -> bool:
    from benchseq.report.plots import MAX_CURVES_IN_ONE

    return len(report.curves) > MAX_CURVES_IN_ONE


def _plot_pages(report: Report) -> list[Any]:
    """The phase (and floor) page; with many curves the small multiples instead (the floor
    page kept); with several runs their differences."""
    from benchseq.report.plots import phase_figure, rejection_figure

    pages = [rejection_figure(report)[0], phase_figure(report)] if _many(report) else []
    if not _many(report) or report.has_floor():
        pages.append(_plot_page(report))
    if report.overlay:
        from benchseq.compare import comparison_figure, report_comparisons

        pages += [comparison_figure(c) for c in report_comparisons(report)]
    return pages


def _plot_page(report: Report) -> Any:
    fig = _page()
    floor = report.has_floor()
    ax = fig.add_axes((0.1, 0.58 if floor else 0.35, 0.84, 0.36))
    draw_phase(ax, report)
    texts = [PLOT_CAPTIONS["phase"]]
    if floor:
        draw_floor(fig.add_axes((0.1, 0.14, 0.84, 0.34)), report)
        texts.append(PLOT_CAPTIONS["floor"])
    fig.text(0.06, 0.08 if floor else 0.28, textwrap.fill(" ".join(texts), 120), fontsize=6.5,
             color="#555555", va="top")  # fmt: skip
    return fig


def _table_pages(source: Source) -> list[Any]:
    from matplotlib.table import Table

    headers, rows = point_table(source)
    pages: list[Any] = []
    count = max(1, math.ceil(len(rows) / ROWS_PER_PAGE))
    for page in range(count):
        fig = _page(A4_LANDSCAPE)
        chunk = rows[page * ROWS_PER_PAGE : (page + 1) * ROWS_PER_PAGE]
        title = f"Points of {source.label}" + (f" ({page + 1} of {count})" if count > 1 else "")
        fig.text(0.04, 0.96, plot_text(title), fontsize=11, weight="bold", va="top")
        if not chunk:
            fig.text(0.04, 0.9, "no points stored", fontsize=9, va="top")
            pages.append(fig)
            continue
        ax = fig.add_axes((0.03, 0.04, 0.94, 0.88))
        ax.axis("off")
        table = Table(ax, loc="upper center")
        height = 0.88 / (ROWS_PER_PAGE + 1.5)
        for r, texts in enumerate([headers, *chunk]):
            for c, text in enumerate(texts):
                left = headers[c] in ("operating point", "verdict", "flags")
                table.add_cell(
                    r, c, width=0.05, height=height, text=plot_text(text),
                    loc="left" if left else "right",
                    facecolor="#e8eaed" if r == 0 else "white", edgecolor="#9aa0a6",
                )  # fmt: skip
        table.auto_set_font_size(False)
        table.set_fontsize(6.5)
        table.auto_set_column_width(list(range(len(headers))))
        for cell in table.get_celld().values():
            cell.set_linewidth(0.3)
        ax.add_table(table)
        pages.append(fig)
    return pages


def _conditions_pages(source: Source) -> list[Any]:
    pages: list[Any] = []
    flow = _TextFlow(pages, f"Conditions: {source.label}", columns=2)
    for title, pairs in conditions(source):
        flow.line(title, weight="bold")
        for key, value in pairs:
            flow.line(f"{key}: {value}", indent=1)
        flow.gap()
    return pages


def _notes_pages(report: Report) -> list[Any]:
    pages: list[Any] = []
    flow = _TextFlow(pages, "Flags and safety")
    used = report.flags_in_use()
    flow.line("Flags on the points", weight="bold")
    if not used:
        flow.line("No point carries a flag.", indent=1)
    for flag, count, text in used:
        flow.line(f"{flag} ({count} point{'s' if count != 1 else ''}): {text}", indent=1)
    flow.gap()
    flow.line("Safety", weight="bold")
    for caution in SAFETY_CAUTIONS:
        flow.line(f"- {caution}", indent=1)
    flow.gap()
    flow.line(f"Made by {report.software} on {report.generated}.", size=6.5)
    return pages


def write_pdf(report: Report, out: Path) -> list[Path]:
    import io

    from matplotlib.backends.backend_pdf import PdfPages

    from benchseq.report.output import write_atomic

    figures = [_summary_page(report), *_plot_pages(report)]
    for source in report.sources:
        figures += _table_pages(source)
    for source in report.sources:
        figures += _conditions_pages(source)
    figures += _notes_pages(report)
    buffer = io.BytesIO()
    metadata = {"Title": report.title, "Creator": report.software, "CreationDate": None}
    with quiet_fonts(), PdfPages(buffer, metadata=metadata) as pdf:
        for fig in figures:
            pdf.savefig(fig)
    write_atomic(out, buffer.getvalue())
    return [out]


def write_png(report: Report, out: Path) -> list[Path]:
    from benchseq.report.output import write_atomic

    if not _many(report):
        write_atomic(out, png_bytes(stacked_figure(report)))
        return [out]
    # small multiples: each figure drawn at its own size, stacked into one image
    import io

    import numpy as np
    from matplotlib.image import imread, imsave

    from benchseq.report.plots import report_figures

    images = [imread(io.BytesIO(png_bytes(fig))) for _, fig in report_figures(report)]
    width = max(image.shape[1] for image in images)
    padded = [np.pad(image, ((0, 0), (0, width - image.shape[1]), (0, 0)), constant_values=1.0)
              for image in images]  # fmt: skip
    buffer = io.BytesIO()
    no_software: dict[str, Any] = {"Software": None}  # None leaves the tag out
    imsave(buffer, np.vstack(padded), format="png", metadata=no_software)
    write_atomic(out, buffer.getvalue())
    return [out]
