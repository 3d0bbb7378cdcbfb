"""The commands around a result file, through `benchseq` itself: run, show, report,
replay, calibrate — exit codes, what they print, and that bad input is a clear exit 2."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from benchseq.cli import main
from benchseq.store import read_meta, read_results

PLAN = """
title = "FV-33 three-point look"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["1 kHz", "10 kHz", "100 kHz"] }
[capture]
max_time = "1 s"
target_uncertainty = "0.2 dB"
[mask]
name = "three-point limit"
points = [["1 kHz", "40 dB"], ["100 kHz", "20 dB"]]
"""


@pytest.fixture(scope="module")
def stored(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("cli")
    plan = folder / "three.toml"
    plan.write_text(PLAN, encoding="utf-8")
    out = folder / "three.h5"
    assert main(["run", str(plan), "--out", str(out), "--keep-waveforms"]) == 0
    return plan, out


def test_run_summary_gives_the_mask_verdict_and_next_steps(
    stored: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    _, out = stored
    assert main(["run", "--resume", str(out)]) == 0  # complete: nothing to do
    printed = capsys.readouterr().out
    assert "already complete" in printed
    assert main(["show", str(out)]) == 0
    printed = capsys.readouterr().out
    # 1 kHz: 65.6 dB true vs 40 dB; 100 kHz: 34.5 dB vs 20 dB (simulator truth) -> pass
    assert "PASS" in printed and "three-point limit" in printed
    assert main(["show", str(out), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["mask"]["status"] == "pass" and len(data["points"]) == 3


def test_report_formats(stored: tuple[Path, Path], tmp_path: Path) -> None:
    _, out = stored
    for fmt in ("html", "csv", "md"):
        target = tmp_path / f"r.{fmt}"
        assert main(["report", str(out), "-o", str(target)]) == 0
        assert target.stat().st_size > 500
    assert main(["report", str(tmp_path / "missing.h5")]) == 2


def test_reanalyse_and_learned_replay(
    stored: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _, out = stored
    again = tmp_path / "again.h5"
    assert main(["replay", str(out), "--reanalyse", "--out", str(again)]) == 0
    assert (
        read_results(again)["rejection_db"].round(9).tolist()
        == read_results(out)["rejection_db"].round(9).tolist()
    )
    assert main(["replay", str(out), "--reanalyse", "--device", "demo"]) == 2
    replayed = tmp_path / "replayed.h5"
    capsys.readouterr()
    assert main(["replay", str(out), "--out", str(replayed), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert read_meta(replayed)["replay_of"]["device"] == "learned"
    assert data["status"] == "complete" and len(data["points"]) == 3


def test_calibrate_on_the_simulated_bench(
    stored: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan, _ = stored
    cal = tmp_path / "cal.h5"
    assert main(["calibrate", "--plan", str(plan), "--out", str(cal)]) == 0
    assert cal.exists()
    assert main(["calibrate", "--plan", str(plan), "--out", str(cal)]) == 2  # no overwrite
    err = capsys.readouterr().err
    assert "Traceback" not in err and "cal.h5" in err
