"""Report plots of many operating points stay legible: small multiples with shared axes
beyond four curves (one panel per operating point, or per DC level beyond 16 of them), the
legend outside every panel's data, the count of curves drawn stated, no curve lost; and a
report of several runs carries their differences (section and plot)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from many_points import write_many

from benchseq.report import gather, write_report
from benchseq.report.plots import phase_figure, rejection_figure


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("scale")
    return {
        "twenty": write_many(folder / "twenty.h5", frequencies=6, fail_at=25),  # 5 DC × 4 loads
        "eight": write_many(folder / "eight.h5", frequencies=6, dc_levels=(5.0, 5.5)),
        "three": write_many(
            folder / "three.h5", frequencies=6, dc_levels=(5.0,), loads=(0.01, 0.05, 0.1)
        ),
    }


def _panels(fig) -> list:
    return [ax for ax in fig.axes if ax.get_visible()]


def _outside(fig, legend, axes) -> bool:
    """True when the legend's box overlaps no panel's box (drawn on the figure's canvas)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig).draw()
    box = legend.get_window_extent()
    return not any(box.overlaps(ax.get_window_extent()) for ax in axes)


def test_twenty_operating_points_get_one_panel_per_dc_level(files: dict[str, Path]) -> None:
    report = gather([files["twenty"]])
    assert len(report.curves) == 20
    fig, drawn = rejection_figure(report)
    panels = _panels(fig)
    assert len(panels) == 5
    assert [ax.get_title(loc="left") for ax in panels] == [
        "4.5 V DC",
        "5 V DC",
        "5.5 V DC",
        "6 V DC",
        "6.5 V DC",
    ]
    assert len(drawn.values) == 20  # every curve drawn, none lost
    assert {c.get_label() for c in drawn.values} == {report.curve_label(c) for c in report.curves}
    assert all(ax.get_legend() is None for ax in panels)  # no legend over the data
    assert len(fig.legends) == 1 and _outside(fig, fig.legends[0], panels)
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "10 mA load, 100 mVpp" in legend and "200 mA load, 100 mVpp" in legend
    assert "20 curves drawn in 5 panels" in fig._suptitle.get_text()
    assert "FAIL" in fig._suptitle.get_text()
    # shared axes: every panel shows the same frequency and rejection span
    assert len({ax.get_xlim() for ax in panels}) == 1 and len({ax.get_ylim() for ax in panels}) == 1
    phase = phase_figure(report)
    assert len(_panels(phase)) == 5 and "20 curves drawn" in phase._suptitle.get_text()


def test_eight_operating_points_get_a_panel_each(files: dict[str, Path]) -> None:
    report = gather([files["eight"]])
    fig, drawn = rejection_figure(report)
    panels = _panels(fig)
    assert len(panels) == 8 and len(drawn.values) == 8
    assert panels[0].get_title(loc="left") == "5 V DC, 10 mA load, 100 mVpp"
    assert "8 curves drawn in 8 panels (one per operating point" in fig._suptitle.get_text()


def test_a_few_curves_stay_in_one_plot(files: dict[str, Path]) -> None:
    fig, drawn = rejection_figure(gather([files["three"]]))
    assert len(_panels(fig)) == 1 and len(drawn.values) == 3
    assert fig.axes[0].get_legend() is not None


def test_a_report_of_several_runs_shows_their_differences(
    files: dict[str, Path], tmp_path: Path
) -> None:
    """twenty.h5 and eight.h5 share the 5 V and 5.5 V operating points at the same
    frequencies with the same values, but for point 25 (3 dB in twenty.h5) and a lower bound
    on each side at one point each (every 37th point is a bound)."""
    html = write_report([files["eight"], files["twenty"]], "html", tmp_path / "two.html")[0]
    text = html.read_text(encoding="utf-8")
    assert 'id="differences"' in text and 'id="plot-differences"' in text
    section = text[text.index('id="differences"') : text.index('id="points"')]
    plain = re.sub(r"<[^>]+>", " ", section)
    assert "46 values compared: 1 differ significantly" in plain
    assert "2 differences involve a lower bound and are themselves only bounds" in plain
    assert "no partner: 0 points of eight.h5" in plain and "72 of twenty.h5" in plain
    md = write_report([files["eight"], files["twenty"]], "md", tmp_path / "two.md")
    assert any(p.name == "two-differences.png" for p in md)


@pytest.mark.slow
def test_pdf_and_png_carry_the_small_multiples(files: dict[str, Path], tmp_path: Path) -> None:
    from matplotlib.image import imread

    from benchseq.report.plots import png_bytes

    report = gather([files["twenty"]])
    pdf = write_report([files["twenty"]], "pdf", tmp_path / "long.pdf")[0]
    assert pdf.read_bytes()[:5] == b"%PDF-"
    pages = pdf.read_bytes().count(b"/Type /Page\n") + pdf.read_bytes().count(b"/Type /Page ")
    assert pages >= 3  # summary, rejection panels, phase panels (then the tables)
    png = write_report([files["twenty"]], "png", tmp_path / "long.png")[0]
    height = imread(str(png)).shape[0]
    import io

    one = imread(io.BytesIO(png_bytes(rejection_figure(report)[0]))).shape[0]
    assert height > one  # the rejection panels and the phase panels, one above the other
