"""The `check` and `injector` commands: exit codes, JSON output, refusal with reasons."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from benchseq.cli import main

PLANS = Path(__file__).resolve().parent.parent / "plans"


def _plan_with(tmp_path: Path, old: str, new: str) -> Path:
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    assert old in text
    path = tmp_path / "variant.toml"
    path.write_text(text.replace(old, new), encoding="utf-8")
    return path


def test_check_demo_is_feasible(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(PLANS / "demo.toml"), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["point_count"] == 16
    assert report["refused"] == 0 and report["all_feasible"] is True


def test_check_refuses_what_the_injector_cannot_do(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """2 Vpp at 5 MHz: 2π·5 MHz·1 V = 31 V/µs > 10 V/µs slew rate (Horowitz & Hill,
    full-power bandwidth SR/(2π·Vpk)); the command says so and exits 1."""
    plan = _plan_with(
        tmp_path,
        'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }',
        'frequency = ["1 kHz", "5 MHz"]',
    )
    text = plan.read_text(encoding="utf-8").replace('ripple = ["100 mVpp"]', 'ripple = ["2 Vpp"]')
    text = text.replace('absolute_max = "6 V"', 'absolute_max = "6.5 V"')
    text = text.replace('min_operating = "3.8 V"', 'min_operating = "3.5 V"')
    plan.write_text(text, encoding="utf-8")
    assert main(["check", str(plan)]) == 1
    out = capsys.readouterr().out
    assert "refused" in out and "slew" in out.lower()


def test_check_bad_plan_exits_2_with_file_and_key(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = _plan_with(tmp_path, "min_cycles = 10", "min_cycle = 10")
    assert main(["check", str(plan)]) == 2
    err = capsys.readouterr().err
    assert "variant.toml" in err and "capture.min_cycle" in err and "min_cycles" in err


def test_check_missing_bench_file_exits_2(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(PLANS / "demo.toml"), "--bench", "no/such/bench.toml"]) == 2
    assert "file not found" in capsys.readouterr().err


def test_injector_json_and_plot(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Passband gain −Rf/(Rs+Rin) = −1000/1050 = −0.952 for the demo board (ideal inverting
    amplifier, computed by hand); in "50 ohm" mode the generator's EMF is twice its display
    (common practice), so the pin gets 2·0.952 = 1.905 per displayed volt and 100 mVpp at
    the pin needs about 100/1.905 = 52.5 mVpp displayed (computed; the pin's load moves it by
    well under 1 % at 1 kHz)."""
    png = tmp_path / "bode.png"
    assert main(["injector", "--ripple", "100mVpp", "--plot", str(png), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert data["corners"]["passband_gain"] == pytest.approx(-1000 / 1050, rel=1e-6)
    at_1k = next(s for s in data["spot"] if s["frequency"] == 1e3)
    assert at_1k["pin_per_displayed"] == pytest.approx(2 * 1000 / 1050, rel=0.01)
    assert at_1k["generator_pp"] == pytest.approx(0.1 / (2 * 1000 / 1050), rel=0.01)
    low, high = data["usable_band_hz"]
    assert low < 1e3 < high
    assert main(["injector", "--ripple", "100 mA"]) == 2
    assert "voltage" in capsys.readouterr().err


def test_piped_output_keeps_each_value_with_its_unit(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Written to a pipe or a file (capsys is neither a terminal), the head lines are not
    wrapped at the terminal width: a 50-column width must not split the bench-time range,
    whose line is longer than that, so a log or a script reads "… s on the bench" whole."""
    monkeypatch.setenv("COLUMNS", "50")
    assert main(["check", str(PLANS / "demo.toml")]) == 0
    lines = capsys.readouterr().out.splitlines()
    head = [line for line in lines if "on the bench" in line]
    assert len(head) == 1
    assert head[0].startswith("16 points; ") and len(head[0]) > 50
