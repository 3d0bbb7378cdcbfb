"""`benchseq show` on a long run (2,000 points over 20 operating points, written through the
store) and on a calibration file: summary and verdict first, a summarised table that says what
it left out, every row with --all, everything in --json."""

from __future__ import annotations

import json
import re
from pathlib import Path

import h5py
import pytest
from many_points import write_many

from benchseq.cli import main

PLAN = """
title = "FV-33 two-point calibration sweep"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["1 kHz", "10 kHz"] }
[capture]
max_time = "1 s"
"""


@pytest.fixture(autouse=True)
def wide_terminal(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "200")


@pytest.fixture(scope="module")
def long_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    # point 1234 (6 V, 10 mA, 521 Hz) at 3 dB: under the demo mask's 40 dB there
    return write_many(tmp_path_factory.mktemp("long") / "long.h5", fail_at=1234)


def _cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main(list(args))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _listed_ids(text: str) -> list[int]:
    """Point numbers in the first cell of the table rows."""
    return [int(m) for m in re.findall(r"^│\s+(\d+) │", text, flags=re.MULTILINE)]


def test_a_long_run_leads_with_the_verdict_and_summarises(
    long_run: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, err = _cli(capsys, "show", str(long_run))
    assert code == 0, err
    lines = out.splitlines()
    assert len(lines) < 90, len(lines)  # not 2,008
    first_table = next(i for i, line in enumerate(lines) if "┏" in line)
    head = "\n".join(lines[:first_table])
    assert "FAIL" in head and "1999 pass, 1 fail" in head
    assert "2000 in 20 operating points" in head and "lower bounds" in head
    assert "#1234" in head  # the failing point is named among the worst
    ids = _listed_ids(out)
    assert 1234 in ids and len(ids) <= 40 and ids == sorted(ids)
    assert f"{2000 - len(ids)} rows left out" in out and "--all" in out
    # every operating point's worst row is listed: one per (DC, load) group of 100
    assert {i // 100 for i in ids} == set(range(20))


def test_all_lists_every_row_and_json_keeps_everything(
    long_run: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = _cli(capsys, "show", str(long_run), "--all")
    assert code == 0
    assert _listed_ids(out) == list(range(2000))
    code, out, _ = _cli(capsys, "show", str(long_run), "--json")
    data = json.loads(out)
    assert code == 0 and len(data["points"]) == 2000
    assert data["mask"]["counts"]["fail"] == 1 and len(data["mask"]["points"]) == 2000


def test_a_short_run_is_listed_whole(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_many(tmp_path / "short.h5", frequencies=2)  # 40 points: at the limit
    code, out, _ = _cli(capsys, "show", str(path))
    assert code == 0 and _listed_ids(out) == list(range(40)) and "left out" not in out


def test_show_describes_a_calibration_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = tmp_path / "two.toml"
    plan.write_text(PLAN, encoding="utf-8")
    cal = tmp_path / "cal.h5"
    code, _, err = _cli(capsys, "calibrate", "--plan", str(plan), "--out", str(cal))
    assert code == 0, err
    code, out, err = _cli(capsys, "show", str(cal))
    assert code == 0, err
    assert "not a benchseq result" not in out + err
    text = re.sub(r"\s+", " ", out)
    assert "channel-match calibration file" in text and "benchseq calibrate" in text
    with h5py.File(cal, "r") as h5:  # what the file itself says
        created = str(h5.attrs["created"])
        points = int(h5.attrs["point_count"])
        bench = str(h5.attrs["bench_name"])
    assert created in text and bench in text and f"{points} points over" in text
    assert "match: gain" in text and "k = 2" in text and "CH" in text
    code, out, _ = _cli(capsys, "show", str(cal), "--json")
    data = json.loads(out)
    assert code == 0 and data["kind"] == "channel-match calibration"
    assert len(data["points"]) == points and data["match"]["points"] == points
