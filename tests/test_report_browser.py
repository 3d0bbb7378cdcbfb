"""The HTML report rendered by headless Chromium (the reference renderer, see browser_ref):
plots drawn with a real size, one table row per point, the sections present, and a hostile
plan title shown as text without running."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from browser_ref import Browser, require_browser
from report_files import HOSTILE_TITLE, row, write_result

from benchseq.report import write_report

PAGE_FACTS = """
const svgs = Array.from(document.querySelectorAll('figure.plot svg'));
const tables = Array.from(document.querySelectorAll('table.points'));
return {
  title: document.title,
  h1: document.querySelector('h1').textContent,
  pwned: typeof window.pwned === 'undefined' ? null : String(window.pwned),
  scripts: document.scripts.length,
  images: Array.from(document.images).map(i => [i.naturalWidth, i.naturalHeight]),
  plots: svgs.map(s => { const b = s.getBBox(); const r = s.getBoundingClientRect();
                         return [b.width, b.height, r.width, r.height]; }),
  boundGlyphs: document.querySelectorAll('g[id^="bound-markers-"] use').length,
  rows: tables.map(t => t.tBodies[0].rows.length),
  cells: tables.map(t => t.tBodies[0].rows[0] ? t.tBodies[0].rows[0].cells.length : 0),
  headers: tables.map(t => t.tHead.rows[0].cells.length),
  sections: ['verdict', 'plots', 'points', 'conditions', 'flags', 'safety']
            .filter(id => document.getElementById(id) !== null),
  conditionsText: document.getElementById('conditions').innerText,
  flagsText: document.getElementById('flags').innerText,
  partial: Array.from(document.querySelectorAll('.partial')).map(p => p.innerText),
};
"""


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    chromium, driver = require_browser()
    session = Browser(chromium, driver)
    try:
        yield session
    finally:
        session.close()


def test_report_renders_in_chromium(browser: Browser, tmp_path: Path) -> None:
    nan = float("nan")
    result = write_result(
        tmp_path / "fv33.h5",
        [
            row(0, 100.0, 62.0),
            row(1, 1000.0, nan, bound_db=55.0),
            row(2, 1e4, 41.0, flags="distorted"),
            row(3, 1e5, nan, bound_db=31.0),
            row(4, 1e6, 12.0),
        ],
        title=HOSTILE_TITLE,
        status="stopped",
        point_count=9,
    )
    out = write_report([result], "html", tmp_path / "fv33.html")[0]
    browser.open(out)
    facts = browser.run(PAGE_FACTS)
    assert facts["pwned"] is None, "the hostile title ran"
    assert facts["scripts"] == 0 and facts["images"] == []
    assert facts["h1"] == HOSTILE_TITLE
    assert facts["title"] == HOSTILE_TITLE + " — benchseq report"
    assert len(facts["plots"]) == 2
    for width, height, shown_w, shown_h in facts["plots"]:
        assert width > 100 and height > 100 and shown_w > 100 and shown_h > 100
    assert facts["boundGlyphs"] == 2
    assert facts["rows"] == [5] and facts["cells"] == facts["headers"]
    assert facts["sections"] == ["verdict", "plots", "points", "conditions", "flags", "safety"]
    assert "Fernhollow,SCOPE-1,0001,1.0" in facts["conditionsText"]
    assert "15 Hz – 1.4 MHz" in facts["conditionsText"]
    assert "distorted" in facts["flagsText"] and "bound" in facts["flagsText"]
    assert len(facts["partial"]) == 1 and facts["partial"][0].startswith("PARTIAL RUN (stopped)")


def test_overlay_renders_in_chromium(browser: Browser, tmp_path: Path) -> None:
    first = write_result(tmp_path / "a.h5", [row(k, 10.0**k, 70.0 - 10 * k) for k in range(1, 6)])
    second = write_result(tmp_path / "b.h5", [row(k, 10.0**k, 72.0 - 10 * k) for k in range(1, 4)])
    out = write_report([first, second], "html", tmp_path / "ab.html")[0]
    browser.open(out)
    facts = browser.run(PAGE_FACTS)
    assert facts["rows"] == [5, 3]
    assert facts["partial"] == [] and facts["pwned"] is None
    assert all(w > 100 and h > 100 for w, h, _, _ in facts["plots"])
