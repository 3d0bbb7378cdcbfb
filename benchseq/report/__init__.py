"""Lab reports from result files: `benchseq report RESULT.h5 [RESULT2.h5 ...]`.

``write_report(paths, fmt, out)`` gathers what the report shows (``model.gather``), then one
writer per format renders it: html (one self-contained file), md (Markdown plus PNG plots
beside it), csv (tidy table; ``read_report_csv`` reads it back), pdf (pages) and png (the
plots in one image). Several result files overlay for comparison.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

from benchseq.errors import BadInput
from benchseq.report.model import Report, gather
from benchseq.report.tabular import read_report_csv

Writer = Callable[[Report, Path], list[Path]]


def _html(report: Report, out: Path) -> list[Path]:
    from benchseq.report.html import write_html

    return write_html(report, out)


def _markdown(report: Report, out: Path) -> list[Path]:
    from benchseq.report.markdown import write_markdown

    return write_markdown(report, out)


def _csv(report: Report, out: Path) -> list[Path]:
    from benchseq.report.tabular import write_csv

    return write_csv(report, out)


def _pdf(report: Report, out: Path) -> list[Path]:
    from benchseq.report.paged import write_pdf

    return write_pdf(report, out)


def _png(report: Report, out: Path) -> list[Path]:
    from benchseq.report.paged import write_png

    return write_png(report, out)


# format name -> (file extension, writer)
FORMATS: dict[str, tuple[str, Writer]] = {
    "html": (".html", _html),
    "md": (".md", _markdown),
    "csv": (".csv", _csv),
    "pdf": (".pdf", _pdf),
    "png": (".png", _png),
}
_ALIASES = {"markdown": "md", "htm": "html"}


def format_name(fmt: str | None, out: str | Path | None = None) -> str:
    """The format asked for, else the one the output's extension names, else html."""
    if fmt:
        name = _ALIASES.get(fmt.lower(), fmt.lower())
        if name not in FORMATS:
            raise BadInput(f"unknown report format {fmt!r}; choose one of {', '.join(FORMATS)}")
        return name
    if out is not None:
        suffix = Path(out).suffix.lower().lstrip(".")
        name = _ALIASES.get(suffix, suffix)
        if name in FORMATS:
            return name
    return "html"


def write_report(
    paths: Sequence[str | Path],
    fmt: str,
    out: str | Path | None = None,
    model: tuple[str | Path, str, float] | None = None,
) -> list[Path]:
    """Write the report of ``paths`` in ``fmt``; returns every file written (main file first).

    ``out`` defaults to '<stem>-report.<ext>' beside the first result file. BadInput for a
    missing or unreadable result file, an unknown format or an output that would overwrite
    a result. ``model`` = (netlist, subcircuit, board load in A) overlays that circuit's
    predicted curve and the difference (benchseq.report.circuit_model)."""
    from benchseq.report.output import check_output, default_output

    name = format_name(fmt, out)
    extension, writer = FORMATS[name]
    if not paths:
        raise BadInput("give at least one result file")
    target = Path(out) if out is not None else default_output(paths[0], extension)
    check_output(target, paths)
    report = gather(paths)
    if model is not None:
        from benchseq.report.circuit_model import predict

        report.model = predict(report, *model)
    return writer(report, target)


__all__ = ["FORMATS", "Report", "format_name", "gather", "read_report_csv", "write_report"]
