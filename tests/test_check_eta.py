"""The bench time `check` estimates and the finish the run shows, against the simulated
bench's own clock (the bench time a run really spent, from its virtual clock).

Reference: the simulated bench (Fernhollow bay 2, FV-33 board) and its clock; the run
log's clock stamps. The estimate is a range from stated assumptions (noise, rejection);
its tolerance is the run-to-run scatter of the bench time over the seeds (captures top up
on the noise each run meets): each seed's bench time must lie within the range widened by
K times that scatter's sample standard deviation."""

from __future__ import annotations

import datetime as dt
import json
import re
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from benchseq.bench import load_bench
from benchseq.check import check_plan, noise_target_db, scenario_likeness
from benchseq.cli import main
from benchseq.plan import load_plan
from benchseq.runner import start_run

RUN_LIMIT_S = 180.0
SEEDS = [1, 2, 3, 4]
K = 3.0  # coverage factor of the run-to-run scatter
PLAN = """
title = "FV-33 estimate check"
operator = "T. Varga-Ellison"
[device]
name = "FV-33 regulator evaluation board (3.3 V out, 0.25 V dropout)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["4.5 V", "5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["50 Hz", "500 Hz", "5 kHz", "50 kHz"] }
[settle]
after_operating_point = "0.5 s"
[capture]
max_time = "2 s"
target_uncertainty = "0.2 dB"
"""
STAMP = re.compile(
    r"^(\d{4}-\d\d-\d\d \d\d:\d\d:\d\d) point (\d+)/(\d+) .*; bench time left ≈ "
    r"(.+), finish ≈ (?:\w{3} )?(\d\d):(\d\d)$"
)


def _seconds(text: str) -> tuple[float, float]:
    """A shown duration ('12.3 s', '3 min 05 s', '1 h 02 min') in s, and its rounding (s)."""
    if m := re.fullmatch(r"([\d.]+) s", text):
        return float(m.group(1)), 0.05
    if m := re.fullmatch(r"(\d+) min (\d+) s", text):
        return 60.0 * int(m.group(1)) + int(m.group(2)), 0.5
    m = re.fullmatch(r"(\d+) h (\d+) min", text)
    assert m, text
    return 3600.0 * int(m.group(1)) + 60.0 * int(m.group(2)), 30.0


@pytest.fixture
def plan_path(tmp_path: Path) -> Path:
    path = tmp_path / "estimate.toml"
    path.write_text(PLAN, encoding="utf-8")
    return path


def test_check_range_holds_the_bench_time_over_seeds(
    plan_path: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Both ranges: from the simulated bench's scenario (what `check` uses on it) and from
    the stated assumptions (what it uses on a real bench without --like)."""
    assert main(["check", str(plan_path), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["estimate_assumes"]["source"] == "scenario"
    assumed = check_plan(load_plan(plan_path), load_bench(None), scenario=False)
    took = []
    for seed in SEEDS:
        outcome, _ = start_run(str(plan_path), None, str(tmp_path / f"e{seed}.h5"), seed=seed)
        assert outcome.status == "complete"
        took.append(outcome.bench_time)
    scatter = float(np.std(took, ddof=1))
    for low, high in (report["estimated_time_range_s"], assumed.estimated_range_s):
        for seed, seconds in zip(SEEDS, took, strict=True):
            assert low - K * scatter <= seconds <= high + K * scatter, (seed, seconds, low, high)


def test_check_json_carries_the_range_and_what_it_assumed(
    plan_path: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["check", str(plan_path), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    low, high = report["estimated_time_range_s"]
    assert 0 < low <= report["estimated_time_s"] <= high
    stated = report["estimate_assumes"]  # the simulated bench: its scenario, said so
    assert stated["source"] == "scenario" and stated["scenario"] == "demo"
    assert "scenario 'demo'" in report["capture_estimate"]
    assert "time_breakdown_s" in report and "capture_estimate" in report  # kept keys
    real = check_plan(load_plan(plan_path), load_bench(None), scenario=False).to_dict()
    assumed = real["estimate_assumes"]  # as on a bench without a scenario
    assert assumed["source"] == "assumed"
    assert assumed["noise_v_rms"] > 0 and len(assumed["rejection_db"]) == 2
    previous = tmp_path / "previous.h5"
    outcome, _ = start_run(str(plan_path), None, str(previous), seed=5)
    assert outcome.status == "complete"
    assert main(["check", str(plan_path), "--json", "--like", str(previous)]) == 0
    liked = json.loads(capsys.readouterr().out)
    assert liked["estimate_assumes"]["source"] == str(previous)
    assert liked["estimate_assumes"]["notes"] == []  # same bench, same device
    assert main(["check", str(plan_path), "--like", str(tmp_path / "none.h5")]) == 2
    assert "--like" in capsys.readouterr().err


def test_log_lines_show_a_finish_consistent_with_the_time_left(
    plan_path: Path, tmp_path: Path
) -> None:
    """finish − the line's clock stamp is the time left at the wall-clock pace the run has
    kept: on the simulated bench, whose bench time runs ahead of the wall, never more than
    the bench time left shown, to the rounding of the two shown figures (the finish to the
    minute, the time left to its last digit) plus 1 s between reading the clock for the
    finish and stamping the line; a finish past midnight wraps."""
    done = subprocess.run(
        [sys.executable, "-m", "benchseq", "run", str(plan_path), "--out", str(tmp_path / "r.h5")],
        capture_output=True, text=True, cwd=tmp_path, timeout=RUN_LIMIT_S,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    lines = [m for line in done.stderr.splitlines() if (m := STAMP.match(line))]
    points = [line for line in done.stderr.splitlines() if " point " in f" {line}"]
    assert len(lines) == 7 and len(points) >= 8  # every point but the last says when
    for m in lines:
        stamp = dt.datetime.strptime(m.group(1), "%Y-%m-%d %H:%M:%S")
        left, rounding = _seconds(m.group(4))
        finish = stamp.replace(hour=int(m.group(5)), minute=int(m.group(6)), second=0)
        gap = (finish - stamp).total_seconds()
        if gap < -120.0:  # the finish is after midnight
            gap += 86400.0
        # the shown finish is truncated to its minute: the true one is up to 60 s later
        assert -60.0 - 1.0 <= gap <= left + rounding + 1.0, m.group(0)


def test_finish_is_paced_by_the_wall_clock_the_run_keeps(
    plan_path: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The finish's clock time comes from the wall time the bench time left will take at
    the pace the run has kept (wall s per bench s since it began). A wall clock that runs
    at a quarter of the simulated bench's pace (a fixed, known pace: no real time is read)
    gives a wall time left of exactly a quarter of the bench time left at every point; a
    simulated bench states no finish before its first point (its pace is not yet known)."""
    import benchseq.runner as runner
    from benchseq.runner import start_run

    class QuarterPace(runner.Sequencer):  # type: ignore[misc,valid-type]
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            super().__init__(*args, **kwargs)
            self.wall_clock = lambda: 1000.0 + 0.25 * self.session.clock.now()

    monkeypatch.setattr(runner, "Sequencer", QuarterPace)
    events: list[Any] = []
    outcome, _ = start_run(str(plan_path), None, str(tmp_path / "paced.h5"), emit=events.append)
    assert outcome.status == "complete"
    start = next(e for e in events if e.kind == "state" and "points to measure" in e.message)
    assert start.bench_time_left > 0 and start.wall_time_left is None
    stored = [e for e in events if e.kind == "point_stored"]
    assert len(stored) == 8
    for event in stored:
        assert event.wall_time_left == pytest.approx(0.25 * event.bench_time_left, abs=1e-9)


def test_noise_target_leaves_the_channel_match_its_share() -> None:
    """Uncorrelated parts of u add in quadrature (GUM, JCGM 100:2008, 5.1.2): with the
    uncalibrated channel match at 1.35 % (k = 1), i.e. 0.11726 dB (20/ln 10 dB per unit
    relative), a 0.2 dB target leaves √(0.2² − 0.11726²) = 0.16202 dB for the noise (hand
    calculation). Where the match alone exceeds the target (0.1 dB), the run aims the noise
    at half the target, 0.05 dB (DEVELOPERS.md, "top-ups")."""
    assert noise_target_db(0.2, 0.0135) == pytest.approx(0.16202, abs=2e-5)
    assert noise_target_db(0.1, 0.0135) == pytest.approx(0.05, abs=1e-9)
    assert noise_target_db(0.2, 0.0) == pytest.approx(0.2, abs=1e-12)


def test_scenario_states_the_demo_noise_and_rejection(plan_path: Path) -> None:
    """The demo scenario's stated numbers (sim/scenarios/demo.toml), worked by hand:
    rejection at 10 Hz, 5 V in, the board's 50 mA: headroom 5 − 3.3 − (0.08 + 2.4 Ω × 50 mA)
    = 1.5 V, loop gain 10^(80/20) × 1.5/(1.5 + 0.1) = 9375 (the error amplifier's 200 Hz
    pole moves it by 0.1 %), feed-through 66 Ω/(66 Ω + 2 Ω) = 0.9706 (the 2.2 µF is 7.2 kΩ at
    10 Hz), so 20·log10(9376/0.9706) = 79.70 dB. Output channel noise on the 8 mV range
    (1 mV/div, probe ×1): √((0.03 × 1 mV)² + (100 µV)²) = 104.4 µV, × √(20 MHz/200 MHz) =
    33.0 µV behind the bandwidth limit, with the 8-bit step's 8 mV/256/√12 = 9.02 µV:
    34.2 µV. The device's density at 100 Hz: (40 nV/√Hz)² × (1 + 300/100) = 6.4e-15 V²/Hz."""
    scenario = scenario_likeness(load_plan(plan_path), load_bench(None))
    assert scenario is not None
    assert scenario.rejection_db(10.0, 5.0, float("nan")) == pytest.approx(79.70, abs=0.05)
    noise = scenario.noise(100.0, 0.05, 0.05 * 10 ** (-79.0 / 20.0))
    assert noise.white_sigma == pytest.approx(34.2e-6, rel=0.01)
    assert noise.coloured == pytest.approx(6.4e-15, rel=0.01)
    # a real bench (no scenario) has none
    real = load_bench(None)
    assert scenario_likeness(load_plan(plan_path), _without_simulation(real)) is None


def _without_simulation(bench):  # type: ignore[no-untyped-def]
    import dataclasses

    return dataclasses.replace(bench, simulation=None)
