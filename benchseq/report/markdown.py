"""The report as Markdown for a lab notebook, with each plot as a PNG written beside it
(``<stem>-rejection.png``, ``<stem>-phase.png``, ``<stem>-floor.png`` when measured).
Strings from result files are escaped so they stay text: & < > as entities; | ` * _ [ ] !
and \\ with a backslash; a leading # or =, a leading - or + before a space, and the
dot of a leading "1. " with a backslash (all valid CommonMark escapes)."""

from __future__ import annotations

import re
from pathlib import Path

from benchseq.report.conditions import conditions
from benchseq.report.model import PLOT_CAPTIONS, SAFETY_CAUTIONS, Report, headline, point_table

_SPECIAL = re.compile(r"([\\`*_\[\]|!~])")
_LINE_START = re.compile(r"^(\s*)([#=]|[+\-](?=\s|$))")
_NUMBERED = re.compile(r"^(\s*\d+)([.)])(?=\s|$)")


def md_escape(value: object) -> str:
    """One line of file text made inert in Markdown (newlines become spaces)."""
    text = " ".join(str(value).split())
    text = text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    text = _SPECIAL.sub(r"\\\1", text)
    text = _NUMBERED.sub(lambda m: m.group(1) + "\\" + m.group(2), text)
    return _LINE_START.sub(lambda m: m.group(1) + "\\" + m.group(2), text)


def _table(headers: list[str], rows: list[list[str]]) -> list[str]:
    lines = ["| " + " | ".join(md_escape(h) for h in headers) + " |"]
    lines.append(
        "|" + "|".join("---" if h in ("operating point", "flags") else "--:" for h in headers) + "|"
    )
    lines += ["| " + " | ".join(md_escape(c) for c in cells) + " |" for cells in rows]
    return lines


def render_markdown(report: Report, images: list[tuple[str, str]]) -> str:
    """The document; ``images`` are (plot name, file name beside the Markdown file)."""
    lines = [f"# {md_escape(report.title)}", ""]
    lines.append(
        "Supply-ripple rejection (PSRR) report made by " + md_escape(report.software) + "."
    )
    lines.append("")
    for source in report.sources:
        if report.overlay:
            lines += [f"### {md_escape(source.label)}", ""]
        lines += [f"- **{md_escape(k)}:** {md_escape(v)}" for k, v in headline(source)]
        lines.append("")
        if source.partial:
            lines += [f"> **{md_escape(source.status_note())}**", ""]
    lines += ["## Plots", ""]
    lines.append(
        "The plots are PNG files written beside this file: "
        + ", ".join(md_escape(name) for _, name in images) + "."
    )  # fmt: skip
    lines.append("")
    for name, file_name in images:
        target = file_name.replace(" ", "%20").replace("(", "%28").replace(")", "%29")
        lines += [
            f"![{name} plot]({target})",
            "",
            f"*{md_escape(PLOT_CAPTIONS.get(name, ''))}*",
            "",
        ]
    if report.overlay:
        from benchseq.compare import TABLE_HEADERS, pick, report_comparisons, table_cells

        lines += ["## Differences against the first run", ""]
        for comparison in report_comparisons(report):
            summary = comparison.summary()
            lines += [f"### {md_escape(summary[0])}", ""]
            lines += [f"- {md_escape(line)}" for line in summary[1:]] + [""]
            rows = pick(comparison.rows)
            if len(rows) < len(comparison.rows):
                lines += [
                    f"{len(rows)} of {len(comparison.rows)} rows: significant, undetermined and "
                    "unpartnered first (every row: benchseq compare --all or --json).",
                    "",
                ]
            lines += [*_table(list(TABLE_HEADERS), table_cells(rows)), ""]
    lines += ["## Points", ""]
    for source in report.sources:
        headers, rows = point_table(source)
        lines += [f"{len(rows)} points of {md_escape(source.label)}:", ""]
        lines += [*_table(headers, rows), ""]
    lines += ["## Conditions", ""]
    for source in report.sources:
        lines += [f"### {md_escape(source.label)}", ""]
        for title, pairs in conditions(source):
            lines += [f"**{md_escape(title)}**", ""]
            lines += [f"- {md_escape(k)}: {md_escape(v)}" for k, v in pairs] + [""]
    lines += ["## Flags", ""]
    used = report.flags_in_use()
    if not used:
        lines += ["No point carries a flag.", ""]
    for flag, count, text in used:
        lines.append(
            f"- **{md_escape(flag)}** ({count} point{'s' if count != 1 else ''}): {md_escape(text)}"
        )
    lines += ["", "## Safety", ""]
    lines += [f"- {md_escape(c)}" for c in SAFETY_CAUTIONS]
    lines += ["", f"*Made on {md_escape(report.generated)}.*", ""]
    return "\n".join(lines)


def write_markdown(report: Report, out: Path) -> list[Path]:
    from benchseq.report.output import write_atomic
    from benchseq.report.plots import png_bytes, report_figures

    written: list[Path] = []
    images: list[tuple[str, str]] = []
    for name, fig in report_figures(report):
        image = out.with_name(f"{out.stem}-{name}.png")
        write_atomic(image, png_bytes(fig))
        images.append((name, image.name))
        written.append(image)
    write_atomic(out, render_markdown(report, images).encode("utf-8"))
    return [out, *written]
