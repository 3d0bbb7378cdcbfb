"""Reports: CSV round trip, PDF pages, HTML that stays inert, bounds drawn distinctly,
overlays, partial runs, the mask verdict rules and bad input."""

from __future__ import annotations

import math
import re
import struct
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from report_files import DEMO_PLAN, HOSTILE_TITLE, SOON_COLUMNS, row, write_result

from benchseq.errors import BadInput
from benchseq.plan import Mask
from benchseq.records import POINT_COLUMNS
from benchseq.report import format_name, gather, read_report_csv, write_report
from benchseq.report.markdown import md_escape, render_markdown
from benchseq.report.plots import (
    BOUND_GID,
    bound_marker,
    draw_rejection,
    rejection_figure,
    svg_text,
)
from benchseq.store import read_meta, read_results, read_truth
from benchseq.verdict import mask_verdict

HOSTILE_DEVICE = "FV-33 <iframe src=javascript:alert(1)></iframe> & | `tick` # heading $x$"
PDF_PAGE = re.compile(rb"/Type\s*/Page(?![a-zA-Z])")


# -- files ----------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """plans/demo.toml run on the embedded simulated bench (about 7 s)."""
    from benchseq.runner import start_run

    out = tmp_path_factory.mktemp("demo") / "demo.h5"
    outcome, path = start_run(str(DEMO_PLAN), None, str(out))
    assert outcome.status == "complete"
    return path


@pytest.fixture(scope="module")
def edge_files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Files built directly: bounds, a partial run, hostile strings, the columns to come."""
    folder = tmp_path_factory.mktemp("edge")
    nan = math.nan
    files = {}
    files["bounds"] = write_result(
        folder / "bounds.h5",
        [
            row(0, 100.0, 60.0),
            row(1, 1000.0, nan, bound_db=55.0),  # limit 40 dB: bound above passes
            row(2, 1e4, nan, bound_db=30.0),  # limit 40 dB: bound below is undetermined
            row(3, 1e5, 30.0),
        ],
    )
    files["partial"] = write_result(
        folder / "partial.h5",
        [row(k, f, 50.0) for k, f in enumerate((10.0, 100.0, 1000.0))],
        status=None,
        point_count=8,
    )
    files["stopped"] = write_result(
        folder / "stopped.h5", [row(0, 100.0, 50.0)], status="stopped", point_count=4
    )
    files["hostile"] = write_result(
        folder / 'run-"><b>x.h5',
        [row(0, 100.0, 50.0, flags="distorted <script>window.pwned=3</script>")],
        title=HOSTILE_TITLE,
        meta={
            "device": HOSTILE_DEVICE,
            "operator": "- [x](javascript:alert(1)) <svg onload=alert(1)>",
            "identities": {"scope": '<img src=x onerror="window.pwned=4">'},
            "calibration": {"id": "<b onmouseover=alert(1)>", "path": "cal|1.h5"},
        },
    )
    repeat = {"repeat_of": -1, "ripple_factor": 1.0, "floor_output": 2e-6, "floor_pin": 1e-5}
    files["soon"] = write_result(
        folder / "soon.h5",
        [
            row(0, 1000.0, 60.0, **repeat),
            row(1, 1e4, 45.0, **{**repeat, "floor_output": nan}),
            row(
                2,
                1000.0,
                60.2,
                **{**repeat, "repeat_of": 0, "ripple_factor": 0.5},
                ripple_target=0.025,
                flags="nonlinear",
            ),
        ],
        columns=(*POINT_COLUMNS, *SOON_COLUMNS),
        meta={"replay_of": {"run_id": "0a1b2c3d", "file": "bay2-night.h5"}},
    )
    return files


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, list[tuple[str, str | None]]]] = []
        self.text: list[str] = []
        self.stack: list[str] = []
        self.h1 = ""

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, attrs))
        self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if tag in self.stack:
            while self.stack and self.stack.pop() != tag:
                pass

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self.stack and self.stack[-1] == "h1":
            self.h1 += data


def _parse(text: str) -> _Collect:
    parser = _Collect()
    parser.feed(text)
    parser.close()
    return parser


# -- CSV ------------------------------------------------------------------------------------
def test_csv_round_trips_to_the_stored_numbers(demo_file: Path, tmp_path: Path) -> None:
    """The CSV read back equals read_results exactly (floats written with repr)."""
    out = write_report([demo_file], "csv", tmp_path / "demo.csv")
    assert out == [tmp_path / "demo.csv"]
    header = out[0].read_text(encoding="utf-8").splitlines()[0].split(",")
    assert header[0] == "source"
    for name in (
        "frequency [Hz]",
        "rejection_db [dB]",
        "uncertainty_db [dB (k=1)]",
        "pin_re [V (peak)]",
        "pin_im [V (peak)]",
        "ripple_target [V (peak)]",
        "generator_pp [V (pp)]",
        "output_noise [V (rms)]",
        "dc_level [V]",
        "point_id",
        "flags",
    ):
        assert name in header
    back = read_report_csv(out[0])
    stored = read_results(demo_file)
    assert len(back) == len(stored) == 16
    pd.testing.assert_frame_equal(back[list(stored.columns)], stored, check_exact=True)
    assert back.attrs["units"]["frequency"] == "Hz" and back.attrs["units"]["pin"] == "V (peak)"
    verdict = mask_verdict(gather([demo_file]).sources[0].mask, stored)
    np.testing.assert_array_equal(
        back["mask_margin"].to_numpy(), verdict.points["margin_db"].to_numpy()
    )
    assert set(back["source"]) == {str(demo_file)}


def test_csv_of_several_files_and_new_columns(
    demo_file: Path, edge_files: dict[str, Path], tmp_path: Path
) -> None:
    """Two files: a source column tells them apart; columns only one has are empty for the other."""
    out = write_report([demo_file, edge_files["soon"]], "csv", tmp_path / "both.csv")[0]
    back = read_report_csv(out)
    assert back["source"].value_counts().to_dict() == {
        str(demo_file): 16,
        str(edge_files["soon"]): 3,
    }
    soon = back[back["source"] == str(edge_files["soon"])].reset_index(drop=True)
    stored = read_results(edge_files["soon"])
    for name in ("frequency", "rejection_db", "pin", "ratio", "floor_output", "ripple_factor"):
        np.testing.assert_array_equal(soon[name].to_numpy(), stored[name].to_numpy())
    assert soon["repeat_of"].tolist() == [-1, -1, 0]
    assert back[back["source"] == str(demo_file)]["floor_output"].isna().all()
    alone = read_report_csv(write_report([edge_files["soon"]], "csv", tmp_path / "soon.csv")[0])
    assert alone["repeat_of"].dtype == np.int64
    pd.testing.assert_frame_equal(alone[list(stored.columns)], stored, check_exact=True)


# -- PDF and PNG ------------------------------------------------------------------------------
@pytest.mark.slow
def test_pdf_pages(demo_file: Path, edge_files: dict[str, Path], tmp_path: Path) -> None:
    """Summary+rejection, phase, points (16 rows fit one page), conditions, flags+safety: 5;
    two files add one points page and one conditions page each, and their differences: 8."""
    one = write_report([demo_file], "pdf", tmp_path / "one.pdf")[0].read_bytes()
    assert one.startswith(b"%PDF-")
    assert len(PDF_PAGE.findall(one)) == 5
    two = write_report([demo_file, edge_files["bounds"]], "pdf", tmp_path / "two.pdf")[
        0
    ].read_bytes()
    assert two.startswith(b"%PDF-") and len(PDF_PAGE.findall(two)) == 8


@pytest.mark.slow
def test_png_is_the_stacked_plots(
    demo_file: Path, edge_files: dict[str, Path], tmp_path: Path
) -> None:
    """PNG signature and IHDR size (PNG specification): 8 in wide at 130 dpi; three plots
    (floor measured) make a taller image than two."""

    def size(path: Path) -> tuple[int, int]:
        data = path.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
        return struct.unpack(">II", data[16:24])

    width, height = size(write_report([demo_file], "png", tmp_path / "demo.png")[0])
    assert width == 1040
    width3, height3 = size(write_report([edge_files["soon"]], "png", tmp_path / "soon.png")[0])
    assert width3 == 1040 and height3 > height


# -- HTML -----------------------------------------------------------------------------------
def test_html_is_self_contained_and_complete(demo_file: Path, tmp_path: Path) -> None:
    out = write_report([demo_file], "html", tmp_path / "demo.html")[0]
    text = out.read_text(encoding="utf-8")
    page = _parse(text)
    tags = [t for t, _ in page.tags]
    assert "script" not in tags and "link" not in tags and "img" not in tags
    for tag, attrs in page.tags:
        for name, value in attrs:
            if name in ("href", "xlink:href", "src"):
                assert (value or "").startswith("#"), (tag, name, value)  # only in-document refs
    assert re.search(r"url\((?!#)", text) is None
    assert "Content-Security-Policy" in text
    assert tags.count("svg") == 2  # rejection and phase; no floor measured
    tables = [a for t, a in page.tags if t == "table"]
    assert len(tables) == 1
    assert text.count("<tr") - text.count("<thead") == 16  # one row per point
    words = " ".join(page.text)
    meta = read_meta(demo_file)
    for expected in (
        meta["identities"]["scope"],
        "15.2 Hz – 1.41 MHz",  # the usable band the run stored
        "coupling capacitor",
        "small_output",
        "protective earth",
        "expanded uncertainty U = 2·u (k = 2",
        'PASS against mask "FV-33 demo limit"',
    ):
        assert expected in words, expected
    for section in ("verdict", "plots", "points", "conditions", "flags", "safety"):
        assert f'<section id="{section}">' in text
    assert "bound (" not in words  # no bound flag in this run: only flags that occur


def test_hostile_strings_stay_inert(edge_files: dict[str, Path], tmp_path: Path) -> None:
    """Plan title, device, operator, identities, calibration, flags and the file name carry
    markup; the HTML parser (Python standard library) sees none of it as tags or handlers,
    only as text."""
    out = write_report([edge_files["hostile"]], "html", tmp_path / "hostile.html")[0]
    page = _parse(out.read_text(encoding="utf-8"))
    tags = [t for t, _ in page.tags]
    for forbidden in ("script", "img", "iframe", "b", "object", "embed"):
        assert forbidden not in tags, forbidden
    for tag, attrs in page.tags:
        for name, value in attrs:
            assert not name.lower().startswith("on"), (tag, name)
            assert "javascript:" not in (value or "").lower(), (tag, name, value)
    assert page.h1 == HOSTILE_TITLE
    text = "".join(page.text)
    for literal in (HOSTILE_DEVICE, '<img src=x onerror="window.pwned=4">', "<script>window.pwned=3</script>",
                    'run-"><b>x.h5', "<b onmouseover=alert(1)>"):  # fmt: skip
        assert literal in text, literal


def test_hostile_strings_stay_inert_in_markdown(
    edge_files: dict[str, Path], tmp_path: Path
) -> None:
    """Rendered by a CommonMark renderer (markdown-it-py, which rich depends on) with GFM
    tables: no tag or handler from the file's text, the hostile strings come out as text,
    and the table keeps one row per point with every cell in its column."""
    from markdown_it import MarkdownIt

    written = write_report([edge_files["hostile"]], "md", tmp_path / "hostile.md")
    text = written[0].read_text(encoding="utf-8")
    assert "<" not in text
    rendered = MarkdownIt("commonmark").enable("table").render(text)
    page = _parse(rendered)
    tags = [t for t, _ in page.tags]
    for forbidden in ("script", "iframe", "b", "svg"):
        assert forbidden not in tags, forbidden
    images = [dict(a)["src"] for t, a in page.tags if t == "img"]
    assert images == [p.name for p in written[1:]]  # only the report's own plots
    for tag, attrs in page.tags:
        for name, value in attrs:
            assert not name.lower().startswith("on"), (tag, name)
            assert "javascript:" not in (value or "").lower(), (tag, name, value)
    assert tags.count("h1") == 1 and page.h1 == HOSTILE_TITLE
    words = "".join(page.text)
    for literal in (HOSTILE_DEVICE, "<script>window.pwned=3</script>", "cal|1.h5"):
        assert literal in words, literal
    assert "- [x](javascript:alert(1)) <svg onload=alert(1)>" in words
    assert tags.count("tr") == 2 and tags.count("td") == tags.count("th")  # header + 1 point
    assert md_escape("1. item") == "1\\. item" and md_escape("-47.1") == "-47.1"
    assert md_escape("79.41") == "79.41"


def test_bounds_are_drawn_distinctly(edge_files: dict[str, Path]) -> None:
    """Bound points get the bound glyph at bound_db and no value marker; the SVG keeps them
    in their own group."""
    report = gather([edge_files["bounds"]])
    fig, drawn = rejection_figure(report)
    assert len(drawn.bounds) == 1
    marks = drawn.bounds[0]
    np.testing.assert_array_equal(marks.get_xdata(), [1000.0, 1e4])
    np.testing.assert_array_equal(marks.get_ydata(), [55.0, 30.0])
    glyph = marks.get_marker()
    np.testing.assert_array_equal(glyph.vertices, bound_marker().vertices)
    values = drawn.values[0].lines[0]
    assert values.get_marker() == "o"
    assert np.isnan(values.get_ydata()[1:3]).all() and list(values.get_ydata()[[0, 3]]) == [
        60.0,
        30.0,
    ]
    svg = svg_text(fig)
    group = re.search(rf'<g id="{BOUND_GID}-0">(.*?)</g>', svg, re.S)
    assert group is not None and group.group(1).count("<use ") == 2
    assert f'id="{BOUND_GID}' not in svg_text(rejection_figure(gather([edge_files["partial"]]))[0])


def test_overlay_of_two_files(demo_file: Path, edge_files: dict[str, Path], tmp_path: Path) -> None:
    """Curves of both files, labelled with file and run; one table and one verdict per file."""
    report = gather([demo_file, edge_files["bounds"]])
    from matplotlib.figure import Figure

    drawn = draw_rejection(Figure().add_subplot(), report)
    labels = [c.get_label() for c in drawn.values]
    run_a, run_b = (s.run_id[:8] for s in report.sources)
    assert labels == [
        f"demo.h5 (run {run_a}): 5 V DC, 100 mVpp",
        f"bounds.h5 (run {run_b}): 5 V DC, 100 mVpp",
    ]
    assert len(drawn.masks) == 1  # the same mask is drawn once
    assert [v.split(":")[0] for v in drawn.verdicts] == [
        f"demo.h5 (run {run_a})",
        f"bounds.h5 (run {run_b})",
    ]
    text = write_report([demo_file, edge_files["bounds"]], "html", tmp_path / "two.html")[
        0
    ].read_text()
    for index, count in ((0, 16), (1, 4)):
        table = re.search(rf'<table class="points" data-source="{index}">(.*?)</table>', text, re.S)
        assert table is not None and table.group(1).count("<tr") - 1 == count
    assert text.count('<p class="verdict ') == 2


def test_partial_run_is_marked(edge_files: dict[str, Path], tmp_path: Path) -> None:
    report = gather([edge_files["partial"]])
    source = report.sources[0]
    assert source.partial and source.status == "interrupted" and source.stored == 3
    note = source.status_note()
    assert note.startswith("PARTIAL RUN (interrupted)") and "3 of 8 planned points stored" in note
    html = write_report([edge_files["partial"]], "html", tmp_path / "p.html")[0].read_text()
    assert '<p class="partial" role="alert">PARTIAL RUN (interrupted)' in html
    md = write_report([edge_files["partial"]], "md", tmp_path / "p.md")[0].read_text()
    assert "> **PARTIAL RUN (interrupted)" in md
    stopped = gather([edge_files["stopped"]]).sources[0]
    assert stopped.partial and "stopped by the user" in stopped.status_note()
    assert "1 of 4 planned points stored" in stopped.status_note()


def test_floor_and_repeats_when_present(edge_files: dict[str, Path], tmp_path: Path) -> None:
    report = gather([edge_files["soon"]])
    curves = report.curves
    assert [(c.repeats, len(c.frame)) for c in curves] == [(False, 2), (True, 1)]
    assert report.has_floor()
    html = write_report([edge_files["soon"]], "html", tmp_path / "soon.html")[0].read_text()
    assert 'id="plot-floor"' in html and "repeat of #" in html and "gen-off output" in html
    assert "bay2-night.h5" in html  # replay_of in the conditions
    assert "nonlinear" in html
    written = write_report([edge_files["soon"]], "md", tmp_path / "soon.md")
    assert [p.name for p in written] == [
        "soon.md",
        "soon-rejection.png",
        "soon-phase.png",
        "soon-floor.png",
    ]
    md = written[0].read_text()
    for image in written[1:]:
        assert image.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and f"]({image.name})" in md


def test_demo_verdict_agrees_with_the_simulators_truth(demo_file: Path) -> None:
    """The simulator's true rejection judged by the same mask gives the same status. A
    detected point's margin differs from the true margin by its rejection error: within
    K = 4 of its stated standard uncertainty (an outlier limit); a point under the floor
    has a lower bound for its value, so its margin is at most the true one."""
    source = gather([demo_file]).sources[0]
    truth = read_truth(demo_file).set_index("point_id").loc[source.frame["point_id"]]
    true_frame = source.frame.assign(
        rejection_db=truth["rejection_db"].to_numpy(), uncertainty_db=0.0, is_bound=False
    )
    expected = mask_verdict(source.mask, true_frame)
    assert source.verdict.status == expected.status == "pass"
    measured = source.verdict.points["margin_db"].to_numpy()
    true = expected.points["margin_db"].to_numpy()
    bound = source.frame["is_bound"].to_numpy(dtype=bool)
    u = source.frame["uncertainty_db"].to_numpy(dtype=float)
    judged = np.isfinite(true)
    assert np.all(np.abs(measured - true)[judged & ~bound] <= 4.0 * u[judged & ~bound])
    assert np.all(measured[judged & bound] <= true[judged & bound] + 1e-9)


def test_markdown_names_its_pictures(demo_file: Path, tmp_path: Path) -> None:
    report = gather([demo_file])
    text = render_markdown(report, [("rejection", "r.png"), ("phase", "p.png")])
    assert "The plots are PNG files written beside this file: r.png, p.png." in text
    assert text.count("| ") > 16


# -- mask verdict rules -------------------------------------------------------------------------
MASK = Mask(np.array([100.0, 1e4]), np.array([60.0, 40.0]), "test limit")


def _frame(*points: tuple[float, float, float, float]) -> pd.DataFrame:
    """(frequency, rejection, uncertainty, bound): bound finite makes a bound point."""
    f, r, u, b = (np.array(v, dtype=float) for v in zip(*points, strict=True))
    return pd.DataFrame(
        {"point_id": np.arange(len(f)), "frequency": f, "rejection_db": r,
         "uncertainty_db": u, "bound_db": b, "is_bound": np.isfinite(b)}
    )  # fmt: skip


nan = math.nan


def test_verdict_value_points_pass_and_fail() -> None:
    """Simple acceptance (common practice): the measured value against the limit decides."""
    passing = mask_verdict(MASK, _frame((100.0, 65.0, 0.1, nan), (1e4, 41.0, 0.1, nan)))
    assert passing.status == "pass" and passing.worst_point_id == 1
    assert passing.worst_margin_db == pytest.approx(1.0)
    failing = mask_verdict(MASK, _frame((100.0, 65.0, 0.1, nan), (1e4, 39.5, 0.1, nan)))
    assert failing.status == "fail" and failing.points["outcome"].tolist() == ["pass", "fail"]
    assert failing.worst_margin_db == pytest.approx(-0.5)


def test_verdict_limit_is_straight_in_db_over_log_frequency() -> None:
    """1 kHz is halfway between 100 Hz and 10 kHz in log f: limit (60 + 40) / 2 = 50 dB."""
    verdict = mask_verdict(MASK, _frame((1000.0, 50.0, 0.1, nan), (1000.0, 49.99, 0.1, nan)))
    assert verdict.points["limit_db"].tolist() == pytest.approx([50.0, 50.0])
    assert verdict.points["outcome"].tolist() == ["pass", "fail"]


def test_verdict_bounds() -> None:
    """A lower bound at or above the limit passes (true ≥ bound ≥ limit); under it, the point
    is undetermined, never a fail."""
    above = mask_verdict(MASK, _frame((100.0, nan, nan, 60.0), (1e4, 45.0, 0.1, nan)))
    assert above.status == "pass" and above.points["outcome"].tolist() == ["pass", "pass"]
    assert above.worst_point_id == 0 and above.worst_is_bound and above.worst_margin_db == 0.0
    below = mask_verdict(MASK, _frame((100.0, nan, nan, 55.0), (1e4, 45.0, 0.1, nan)))
    assert below.status == "undetermined"
    assert below.points["outcome"].tolist() == ["undetermined", "pass"]
    assert below.worst_point_id == 1  # an undetermined bound does not set the worst margin
    both = mask_verdict(MASK, _frame((100.0, nan, nan, 55.0), (1e4, 39.0, 0.1, nan)))
    assert both.status == "fail"


def test_verdict_outside_the_span_has_no_limit() -> None:
    outside = mask_verdict(MASK, _frame((10.0, 0.0, 0.1, nan), (1e5, 0.0, 0.1, nan)))
    assert outside.points["outcome"].tolist() == ["no limit", "no limit"]
    assert outside.status == "undetermined" and math.isnan(outside.worst_margin_db)
    mixed = mask_verdict(MASK, _frame((10.0, 0.0, 0.1, nan), (100.0, 61.0, 0.1, nan)))
    assert mixed.status == "pass" and mixed.worst_point_id == 1
    assert mixed.count("no limit") == 1


def test_verdict_marks_points_within_the_uncertainty() -> None:
    """Within k = 2 standard uncertainties of the limit the point is marked (the value
    still decides)."""
    verdict = mask_verdict(
        MASK, _frame((100.0, 60.1, 0.1, nan), (100.0, 59.9, 0.1, nan), (100.0, 60.3, 0.1, nan))
    )
    assert verdict.points["outcome"].tolist() == ["pass", "fail", "pass"]
    assert verdict.points["straddles"].tolist() == [True, True, False]
    assert verdict.straddling == 2 and verdict.status == "fail"


def test_verdict_without_mask_or_points() -> None:
    frame = _frame((100.0, 65.0, 0.1, nan))
    assert mask_verdict(None, frame).status == "no mask"
    empty = mask_verdict(MASK, frame.iloc[:0])
    assert empty.status == "undetermined" and "no points stored" in empty.summary()
    assert empty.to_dict()["worst_margin_db"] is None


# -- bad input -----------------------------------------------------------------------------------
def test_bad_input_is_named(demo_file: Path, tmp_path: Path) -> None:
    missing = tmp_path / "nothing.h5"
    with pytest.raises(BadInput, match=r"nothing\.h5"):
        write_report([missing], "html", tmp_path / "x.html")
    junk = tmp_path / "junk.h5"
    junk.write_text("not an HDF5 file\n")
    with pytest.raises(BadInput, match=r"junk\.h5"):
        write_report([junk], "csv", tmp_path / "x.csv")
    with pytest.raises(BadInput, match="unknown report format 'docx'"):
        write_report([demo_file], "docx", None)
    with pytest.raises(BadInput, match="result file given as input"):
        write_report([demo_file], "csv", demo_file)
    with pytest.raises(BadInput, match="given twice"):
        write_report([demo_file, demo_file], "csv", tmp_path / "y.csv")
    with pytest.raises(BadInput, match="folder"):
        write_report([demo_file], "csv", tmp_path)
    assert not list(tmp_path.glob("x.*")) and not (tmp_path / "y.csv").exists()


def test_default_output_and_format_from_extension(demo_file: Path) -> None:
    written = write_report([demo_file], "csv")
    try:
        assert written == [demo_file.with_name("demo-report.csv")]
    finally:
        for path in written:
            path.unlink()
    assert format_name(None, "out/report.pdf") == "pdf"
    assert format_name(None, None) == "html" and format_name("Markdown") == "md"


def test_one_curve_per_operating_point(tmp_path: Path) -> None:
    """Two DC levels and two loads: four curves, labelled by their operating point."""
    rows = []
    for k, (dc, load) in enumerate([(4.5, 0.01), (4.5, 0.1), (5.0, 0.01), (5.0, 0.1)]):
        for j, f in enumerate((100.0, 1000.0)):
            rows.append(row(2 * k + j, f, 60.0 - k, dc_level=dc, load_current=load))
    path = write_result(tmp_path / "ops.h5", rows)
    report = gather([path])
    labels = [report.curve_label(c) for c in report.curves]
    assert labels == [
        "4.5 V DC, 10 mA load, 100 mVpp",
        "4.5 V DC, 100 mA load, 100 mVpp",
        "5 V DC, 10 mA load, 100 mVpp",
        "5 V DC, 100 mA load, 100 mVpp",
    ]
    assert all(len(c.frame) == 2 for c in report.curves)


@pytest.mark.parametrize("fmt", ["html", "md", "csv", "pdf", "png"])
def test_a_run_without_points_still_reports(fmt: str, tmp_path: Path) -> None:
    """An aborted run with no point stored: every format is written and says so."""
    path = write_result(tmp_path / "empty.h5", [], status="aborted", point_count=16)
    written = write_report([path], fmt, tmp_path / f"empty.{fmt}")
    assert written[0].stat().st_size > 0
    if fmt == "csv":
        assert len(read_report_csv(written[0])) == 0
    if fmt == "html":
        text = written[0].read_text(encoding="utf-8")
        assert "PARTIAL RUN (aborted)" in text and "0 of 16 planned points stored" in text


@pytest.mark.parametrize("fmt", ["html", "md", "csv", "pdf", "png"])
def test_odd_files_still_report(fmt: str, tmp_path: Path) -> None:
    """One frequency only, characters the plot font lacks, a stored plan that is not valid
    TOML (a control character in its title): every format is written without a warning,
    and the report says why there is no mask verdict."""
    path = write_result(
        tmp_path / "odd.h5",
        [row(0, 100.0, 50.0), row(1, 100.0, math.nan, bound_db=45.0)],
        title="中文 \U0001f600 \x07 $ (bay 2)",
    )
    written = write_report([path], fmt, tmp_path / f"odd.{fmt}")
    assert all(p.stat().st_size > 0 for p in written)
    if fmt == "html":
        text = written[0].read_text(encoding="utf-8")
        assert "no mask verdict: the stored plan could not be read" in text
