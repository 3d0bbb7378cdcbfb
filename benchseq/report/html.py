"""The report as ONE self-contained HTML file: inline CSS, plots as inline SVG (text drawn as
paths), no script, no external resource; a Content-Security-Policy forbids both anyway.
Every string taken from a result file goes through ``html.escape``."""

from __future__ import annotations

from html import escape
from pathlib import Path

from benchseq.report.conditions import conditions
from benchseq.report.model import (
    PLOT_CAPTIONS,
    SAFETY_CAUTIONS,
    Report,
    Source,
    headline,
    point_table,
)

_CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"

_CSS = """
:root { --ink: #1d232b; --muted: #5b6470; --rule: #d5d9de; --pass: #2f7d4f;
        --fail: #b23a2e; --open: #9a6a00; }
* { box-sizing: border-box; }
body { font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif;
       color: var(--ink); margin: 0 auto; max-width: 72rem; padding: 1.5rem 1.5rem 3rem; }
h1 { font-size: 1.6rem; margin: 0 0 .2rem; }
h2 { font-size: 1.2rem; border-bottom: 2px solid var(--rule); padding-bottom: .2rem;
     margin-top: 2.2rem; }
h3 { font-size: 1rem; margin: 1.3rem 0 .4rem; }
.sub { color: var(--muted); margin: 0 0 1rem; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: .15rem 1rem; margin: 0; }
dl.facts dt { color: var(--muted); }
dl.facts dd { margin: 0; overflow-wrap: anywhere; }
.partial { border: 2px solid var(--open); background: #fff6df; padding: .6rem .9rem;
           font-weight: 600; margin: 1rem 0; }
.verdict { padding: .5rem .9rem; border-left: 6px solid var(--muted); background: #f4f5f7;
           margin: .5rem 0; }
.verdict.pass { border-color: var(--pass); } .verdict.fail { border-color: var(--fail); }
.verdict.undetermined { border-color: var(--open); }
.verdict .word { font-weight: 700; text-transform: uppercase; letter-spacing: .04em; }
figure.plot { margin: 1rem 0 1.5rem; }
figure.plot svg { width: 100%; height: auto; display: block; }
figcaption { color: var(--muted); font-size: .9rem; margin-top: .3rem; }
.scroll { overflow-x: auto; }
table.differences { border-collapse: collapse; font-size: .85rem; }
table.differences th, table.differences td { border-bottom: 1px solid var(--rule); padding: .2rem .45rem; }
table.points { border-collapse: collapse; font-size: .85rem; width: 100%; }
table.points th, table.points td { border-bottom: 1px solid var(--rule); padding: .2rem .45rem;
                                   text-align: right; white-space: nowrap; }
table.points th { background: #eef0f3; position: sticky; top: 0; }
table.points .text { text-align: left; }
table.points .wrap { white-space: normal; min-width: 9rem; }
table.points tr.fail td { background: #fbe9e7; }
table.points tr.undetermined td { background: #fff6df; }
table.points tr.bound td.rej { font-style: italic; }
pre.stored { background: #f4f5f7; padding: .7rem; overflow-x: auto; font-size: .8rem; }
ul.safety li { margin: .2rem 0; }
footer { margin-top: 2.5rem; color: var(--muted); font-size: .85rem; }
@media print { figure.plot, table.points tr { break-inside: avoid; } details { display: none; } }
"""


def _text(value: object) -> str:
    return escape(str(value), quote=True)


def _facts(pairs: list[tuple[str, str]], css: str = "facts") -> str:
    items = "".join(f"<dt>{_text(k)}</dt><dd>{_text(v)}</dd>" for k, v in pairs)
    return f'<dl class="{css}">{items}</dl>'


def _verdict(source: Source, report: Report) -> str:
    verdict = source.verdict
    css = verdict.status.replace(" ", "-")
    who = f"{_text(source.label)}: " if report.overlay else ""
    summary = source.verdict_summary()
    word = verdict.status.upper()
    rest = summary[len(word) :] if summary.upper().startswith(word) else " — " + summary
    return (
        f'<p class="verdict {_text(css)}" data-source="{source.index}">{who}'
        f'<span class="word">{_text(verdict.status)}</span>{_text(rest)}</p>'
    )


_CELL_CLASS = {"operating point": "text", "verdict": "text", "flags": "text wrap"}


def _points(source: Source) -> str:
    headers, rows = point_table(source)
    kinds = [_CELL_CLASS.get(h, "rej" if h.startswith("rejection") else "") for h in headers]
    head = "".join(
        f'<th scope="col" class="{k}">{_text(h)}</th>' if k else f'<th scope="col">{_text(h)}</th>'
        for h, k in zip(headers, kinds, strict=True)
    )
    outcomes = source.verdict.points["outcome"].tolist()
    bounds = source.frame["is_bound"].tolist() if "is_bound" in source.frame else []
    body = []
    for k, cells in enumerate(rows):
        css = [outcomes[k]] if k < len(outcomes) and outcomes[k] in ("fail", "undetermined") else []
        if k < len(bounds) and bounds[k]:
            css.append("bound")
        tds = []
        for kind, cell in zip(kinds, cells, strict=True):
            tds.append(
                f'<td class="{kind}">{_text(cell)}</td>' if kind else f"<td>{_text(cell)}</td>"
            )
        body.append(f'<tr class="{" ".join(css)}">' + "".join(tds) + "</tr>")
    caption = f"{len(rows)} points of {source.label}"
    return (
        f'<div class="scroll"><table class="points" data-source="{source.index}">'
        f"<caption>{_text(caption)}</caption><thead><tr>{head}</tr></thead>"
        f"<tbody>{''.join(body)}</tbody></table></div>"
    )


def _conditions(source: Source) -> str:
    parts = [f'<div class="conditions" data-source="{source.index}">']
    parts.append(f"<h3>{_text(source.label)}</h3>")
    for title, pairs in conditions(source):
        parts.append(f"<h4>{_text(title)}</h4>{_facts(pairs)}")
    for key, what in (("plan_text", "stored plan"), ("bench_text", "stored bench file")):
        text = source.meta.get(key)
        if isinstance(text, str) and text:
            parts.append(
                f"<details><summary>{_text(what)}</summary>"
                f'<pre class="stored">{_text(text)}</pre></details>'
            )
    parts.append("</div>")
    return "".join(parts)


def _flags(report: Report) -> str:
    used = report.flags_in_use()
    if not used:
        return '<p id="no-flags">No point carries a flag.</p>'
    items = "".join(
        f"<dt><code>{_text(flag)}</code> ({count} point{'s' if count != 1 else ''})</dt>"
        f"<dd>{_text(text)}</dd>"
        for flag, count, text in used
    )
    return f'<dl class="facts flags">{items}</dl>'


def _differences(report: Report) -> list[str]:
    """Per other run: the comparison's summary and its (summarised) table."""
    from benchseq.compare import TABLE_HEADERS, pick, report_comparisons, table_cells

    parts = []
    for comparison in report_comparisons(report):
        lines = comparison.summary()
        parts.append(f"<h3>{_text(lines[0])}</h3>")
        parts += [f"<p>{_text(line)}</p>" for line in lines[1:]]
        rows = pick(comparison.rows)
        if len(rows) < len(comparison.rows):
            parts.append(
                f"<p>{len(rows)} of {len(comparison.rows)} rows: significant, undetermined and "
                "unpartnered first, then the largest |d|/u_c (every row: benchseq compare "
                "--all or --json).</p>"
            )
        head = "".join(f"<th>{_text(h)}</th>" for h in TABLE_HEADERS)
        body = "".join(
            "<tr>" + "".join(f"<td>{_text(c)}</td>" for c in cells) + "</tr>"
            for cells in table_cells(rows)
        )
        parts.append(
            f'<div class="scroll"><table class="differences"><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table></div>"
        )
    return parts


def render_html(report: Report, figures: list[tuple[str, str]]) -> str:
    """The whole document; ``figures`` are (name, <svg> text) from plots.svg_text."""
    first = report.sources[0]
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_text(report.title)} — benchseq report</title>",
        f"<style>{_CSS}</style></head><body>",
        f'<header><h1 id="report-title">{_text(report.title)}</h1>',
        f'<p class="sub">Supply-ripple rejection (PSRR) report — {_text(first.meta.get("device", ""))}</p>',
    ]
    for source in report.sources:
        if report.overlay:
            parts.append(f"<h3>{_text(source.label)}</h3>")
        parts.append(_facts(headline(source)))
        if source.partial:
            parts.append(f'<p class="partial" role="alert">{_text(source.status_note())}</p>')
    parts.append('</header><section id="verdict"><h2>Mask verdict</h2>')
    parts += [_verdict(s, report) for s in report.sources]
    parts.append('</section><section id="plots"><h2>Plots</h2>')
    for name, svg in figures:
        parts.append(
            f'<figure class="plot" id="plot-{_text(name)}">{svg}'
            f"<figcaption>{_text(PLOT_CAPTIONS.get(name, ''))}</figcaption></figure>"
        )
    if report.overlay:
        parts.append(
            '</section><section id="differences"><h2>Differences against the first run</h2>'
        )
        parts += _differences(report)
    parts.append('</section><section id="points"><h2>Points</h2>')
    parts += [_points(s) for s in report.sources]
    parts.append('</section><section id="conditions"><h2>Conditions</h2>')
    parts += [_conditions(s) for s in report.sources]
    parts.append('</section><section id="flags"><h2>Flags</h2>')
    parts.append(_flags(report))
    parts.append('</section><section id="safety"><h2>Safety</h2><ul class="safety">')
    parts += [f"<li>{_text(c)}</li>" for c in SAFETY_CAUTIONS]
    parts.append("</ul></section>")
    parts.append(
        f"<footer>Made by {_text(report.software)} on {_text(report.generated)} from "
        f"{_text(', '.join(str(s.path) for s in report.sources))}.</footer></body></html>\n"
    )
    return "\n".join(parts)


def write_html(report: Report, out: Path) -> list[Path]:
    from benchseq.report.output import write_atomic
    from benchseq.report.plots import report_figures, svg_text

    figures = [(name, svg_text(fig)) for name, fig in report_figures(report)]
    write_atomic(out, render_html(report, figures).encode("utf-8"))
    return [out]
