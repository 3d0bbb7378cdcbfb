"""check_plan / injector_report / plot_injector on the demo bench and plans."""

from __future__ import annotations

import io
import json
import tomllib
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console

from benchseq.bench import load_bench
from benchseq.check import check_plan, injector_report, plot_injector, render_check, render_injector
from benchseq.plan import parse_plan
from benchseq.units import parse_amplitude

PLANS = Path(__file__).resolve().parent.parent / "plans"


def plan_with(**sweep_changes: object) -> object:
    """The demo plan with some [sweep] keys replaced (parsed by benchseq.plan)."""
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    data["sweep"].update(sweep_changes)
    return parse_plan(data, "demo-variant.toml", text)


def rendered(renderable: object) -> str:
    out = io.StringIO()
    Console(file=out, width=200, color_system=None).print(renderable)
    return out.getvalue()


def test_demo_plan_is_feasible_on_demo_bench() -> None:
    """The shipped demo plan: every point feasible, exit status 0, strict JSON."""
    plan = plan_with()
    report = check_plan(plan, load_bench(None))
    assert report.point_count == len(plan.expand())
    assert report.refused_count == 0 and report.exit_code == 0
    assert report.ok_count + report.marginal_count == report.point_count
    data = json.loads(json.dumps(report.to_dict(), allow_nan=False))
    assert data["refused"] == 0 and data["point_count"] == report.point_count


def test_too_much_ripple_at_high_frequency_is_refused() -> None:
    """2 Vpp at 5 MHz on the demo bench exceeds the 10 V/µs slew rate (full-power bandwidth
    SR/(2π·Vpk) = 1.6 MHz at 1 Vpk, Horowitz & Hill): refused, with the reason; exit 1."""
    plan = plan_with(ripple=["2 Vpp"], frequency={"at": ["1 kHz", "5 MHz"]})
    report = check_plan(plan, load_bench(None))
    assert report.refused_count == 1 and report.exit_code == 1
    codes = {(g.code, g.severity) for g in report.groups}
    assert ("slew-rate", "refused") in codes
    worst = next(p for p in report.worst if p.verdict == "refused")
    assert worst.frequency == pytest.approx(5e6)
    assert any("slew rate" in m for m in worst.messages)
    text = rendered(render_check(report))
    assert "refused" in text and "slew rate" in text


def test_device_limits_come_from_the_plan() -> None:
    """DC + ripple above the plan's absolute maximum (6 V) is refused (common practice: stay inside the device's absolute maximum)."""
    plan = plan_with(dc=["5.98 V"], ripple=["100 mVpp"], frequency={"at": ["1 kHz"]})
    report = check_plan(plan, load_bench(None))
    assert {g.code for g in report.groups if g.severity == "refused"} == {"device-absolute-max"}


def test_bench_time_estimate() -> None:
    """Under settle.rule = "time-constants", settling per point = wait + time_constants x
    slowest τ. Worked by hand: plans/demo.toml has wait = "0 s", the test sets
    time_constants = 5 (e^-5 leaves 0.7 % of a step; the common-practice 5-7 τ rule); the
    demo bench's injector has its slowest time constant Rb·Cb = 10 kΩ x 10 µF = 0.1 s. So
    0.5 s per point, 1.0 s for the two. A capture of 10 cycles takes 1 s at 10 Hz and 0.5 s
    at 20 Hz."""
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    data["sweep"].update(frequency={"at": ["10 Hz", "20 Hz"]})
    data["settle"].update(rule="time-constants", time_constants=5)
    plan = parse_plan(data, "demo-variant.toml", text)
    report = check_plan(plan, load_bench(None))
    assert report.point_count == 2
    assert report.time_breakdown["settling"] == pytest.approx(1.0, rel=1e-3)
    assert report.time_breakdown["captures"] == pytest.approx(1.0 + 0.5, rel=1e-9)
    # the range's ends are the sums of their parts; the estimate lies between them
    low, high = report.estimated_range_s
    assert low == pytest.approx(sum(report.range_breakdown["low"].values()))
    assert high == pytest.approx(sum(report.range_breakdown["high"].values()))
    assert low <= report.estimated_time_s <= high
    assert report.range_breakdown["low"]["settling"] == pytest.approx(1.0, rel=1e-3)
    # the default rule waits for the injector's transient alone: at 10 and 20 Hz the
    # coupling mode (Rg·Cc ≈ 10.5 ms) needs well under the 0.5 s of five bias time constants
    default = check_plan(plan_with(frequency={"at": ["10 Hz", "20 Hz"]}), load_bench(None))
    assert 0 < default.time_breakdown["settling"] < 0.25 * report.time_breakdown["settling"]
    assert report.estimated_time_s > report.time_breakdown["settling"]


def test_injector_report_spot_table_and_generator_setting() -> None:
    """Spot table at 10 Hz ... 10 MHz; 100 mVpp at the pin needs 100/1.905 = 52.5 mVpp
    displayed in 50 Ω mode at 1 kHz (the 50 Ω-mode factor, computed)."""
    bench = load_bench(None)
    report = injector_report(bench, parse_amplitude("100 mVpp"))
    assert [r.frequency for r in report.rows] == [10, 100, 1e3, 10e3, 100e3, 1e6, 10e6]
    at_1k = report.rows[2]
    assert at_1k.generator_pp == pytest.approx(0.1 / 1.905, rel=2e-3)
    assert at_1k.gain_db == pytest.approx(20 * np.log10(1000 / 1050), abs=0.01)
    assert at_1k.usable and not report.rows[0].usable
    data = json.loads(json.dumps(report.to_dict(), allow_nan=False))
    assert len(data["spot"]) == 7 and data["usable_band_hz"][0] == pytest.approx(15.2, rel=0.05)
    assert "spot frequencies" in rendered(render_injector(report))
    plain = injector_report(bench)
    assert all(r.generator_pp is None for r in plain.rows)


def test_plot_injector_writes_png(tmp_path: Path) -> None:
    """A PNG file (signature bytes per the PNG specification, RFC 2083)."""
    out = plot_injector(load_bench(None), tmp_path / "bode.png", parse_amplitude("100 mVpp"))
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000
