"""The Python interface: the README's notebook example, run as written on the embedded bench."""

from __future__ import annotations

from pathlib import Path

import h5py
import pytest

import benchseq
from benchseq.errors import BadInput

PLANS = Path(__file__).resolve().parents[1] / "plans"

SHORT = """\
title = "API check"
[device]
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = ["1 kHz", "10 kHz"]
"""


def test_import_is_light_and_names_load_on_use() -> None:
    assert benchseq.__version__
    assert callable(benchseq.run) and callable(benchseq.read_results)
    with pytest.raises(AttributeError):
        benchseq.no_such_name  # noqa: B018


def test_check_run_and_read_from_python(tmp_path: Path) -> None:
    plan_file = tmp_path / "short.toml"
    plan_file.write_text(SHORT, encoding="utf-8")
    plan = benchseq.load_plan(plan_file)
    report = benchseq.check_plan(plan)
    assert report.point_count == 2 and report.refused_count == 0
    events: list[str] = []
    result = benchseq.run(plan, out=tmp_path / "r.h5", on_event=lambda e: events.append(e.kind))
    assert result.status == "complete" and result.path.exists()
    assert "point_stored" in events
    points = benchseq.read_results(result.path)
    assert sorted(points["frequency"]) == pytest.approx([1e3, 1e4], rel=1e-3)
    assert benchseq.read_meta(result.path)["status"] == "complete"
    with h5py.File(result.path, "r") as f:  # plain h5py reads it too
        assert "points" in f
    # a stored run is never overwritten without force, from Python as from the command line
    with pytest.raises(BadInput):
        benchseq.run(plan, out=result.path)


def test_python_interface_does_not_print(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    plan_file = tmp_path / "short.toml"
    plan_file.write_text(SHORT, encoding="utf-8")
    benchseq.run(plan_file, out=tmp_path / "quiet.h5")
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""
