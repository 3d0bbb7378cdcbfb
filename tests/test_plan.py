"""Plan files -> Plan -> Sweep (benchseq.plan): exact points in run order, and errors that name
the file and the key.

External references used below:
- SHA-256 test vector for "abc": FIPS 180-2, appendix B.1.
- Log sweeps: a point every 1/n decade is a frequency ratio of 10^(1/n) (definition of the
  decade); counts like 5 decades x 10 per decade + 1 = 51 are computed from it.
- Sine amplitudes: peak = pp / 2 (definition).
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from tomlfuzz import mutate

from benchseq.errors import BadInput, FileKeyError
from benchseq.plan import MAX_POINTS, Plan, Sweep, load_plan, parse_plan
from benchseq.tomlfile import parse_toml_text

PLANS = Path(__file__).resolve().parent.parent / "plans"
FAST = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])

MINIMAL = """
[device]
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = "5 V"
ripple = "100 mVpp"
frequency = "1 kHz"
"""


def plan_from(text: str, source: str = "bay2.toml") -> Plan:
    text_read, data = parse_toml_text(text, source)
    return parse_plan(data, source, text_read)


def with_sweep(sweep_lines: str, extra: str = "") -> str:
    """A plan with the device limits above and the given [sweep] body."""
    return (
        f'[device]\nabsolute_max = "6 V"\nmin_operating = "3.8 V"\n[sweep]\n{sweep_lines}\n{extra}'
    )


def error_of(text: str, source: str = "bay2.toml") -> FileKeyError:
    with pytest.raises(FileKeyError) as caught:
        plan_from(text, source)
    assert source in str(caught.value)
    return caught.value


# -- the example plans -------------------------------------------------------------------
def test_demo_plan_expands_to_sixteen_points() -> None:
    """10 Hz-1 MHz is 5 decades; 3 per decade -> 5x3 + 1 = 16 frequencies (computed)."""
    plan = load_plan(PLANS / "demo.toml")
    sweep = plan.expand()
    assert len(sweep) == 16 == plan.point_count
    assert plan.axes == ("dc", "ripple", "frequency")
    assert plan.load_currents is None
    assert np.all(np.isnan(sweep.load_current))
    assert sweep.frequency[0] == 10.0 and sweep.frequency[-1] == 1e6
    assert np.allclose(np.diff(np.log10(sweep.frequency)), 1 / 3, rtol=1e-9)
    assert np.all(sweep.ripple_peak == 0.05)  # 100 mVpp = 50 mVpk
    assert set(sweep.ripple_convention) == {"pp"}
    assert np.all(sweep.dc_level == 5.0)
    assert plan.device.absolute_max_v == 6.0 and plan.device.min_operating_v == 3.8
    assert plan.mask is not None
    assert plan.linearity is None and plan.floor is None


def test_overnight_plan_counts_and_order() -> None:
    """51 log points (5 decades x 10 + 1) plus 120 Hz = 52 frequencies; x 2 ripple x 4 DC x
    2 load = 832 points; load outermost, frequency innermost."""
    plan = load_plan(PLANS / "overnight.toml")
    sweep = plan.expand()
    assert plan.frequencies.size == 52
    assert 120.0 in plan.frequencies
    assert len(sweep) == 832
    assert plan.axes == ("load", "dc", "ripple", "frequency")
    assert np.all(sweep.load_current[:416] == 0.01) and np.all(sweep.load_current[416:] == 0.1)
    assert list(sweep.dc_level[::104][:4]) == [4.2, 4.5, 5.0, 5.5]
    assert list(sweep.ripple_peak[:104:52]) == [0.05, 0.1]
    assert np.array_equal(sweep.frequency[:52], plan.frequencies)
    assert np.array_equal(sweep.index, np.arange(832))
    assert plan.linearity is not None and list(plan.linearity.frequencies) == [1e3, 1e5]
    assert plan.floor is not None and list(plan.floor.frequencies) == [100.0, 1e4, 1e6]
    assert plan.device.max_load_current == pytest.approx(0.3)


def test_every_point_of_the_examples_is_inside_the_device_limits() -> None:
    """Vdc + Vpk <= absolute max and Vdc - Vpk >= minimum operating (common practice: a device's absolute maximum and minimum operating level bound the ripple's peaks)."""
    for name in ("demo.toml", "overnight.toml"):
        plan = load_plan(PLANS / name)
        sweep = plan.expand()
        assert np.all(sweep.dc_level + sweep.ripple_peak <= plan.device.absolute_max_v)
        assert np.all(sweep.dc_level - sweep.ripple_peak >= plan.device.min_operating_v)


@pytest.mark.parametrize("name", ["demo.toml", "overnight.toml"])
def test_example_plans_are_feasible_on_the_demo_bench(name: str) -> None:
    """The feasibility check (benchseq.check) refuses no point of the example plans on the
    embedded simulated bench, so `benchseq run plans/<name>` starts."""
    from benchseq.bench import load_bench
    from benchseq.check import check_plan

    report = check_plan(load_plan(PLANS / name), load_bench(None)).to_dict()
    assert report["refused"] == 0, report["reasons"]
    assert report["point_count"] == load_plan(PLANS / name).point_count


def test_text_and_hash_are_kept() -> None:
    """sha256("abc") is the FIPS 180-2 appendix B.1 test vector."""
    _, data = parse_toml_text(MINIMAL, "x.toml")
    plan = parse_plan(data, "x.toml", "abc")
    assert plan.text == "abc"
    assert plan.text_hash == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert plan.title == "x"  # default: the file's stem


# -- expansion ---------------------------------------------------------------------------
def test_default_order_is_dc_load_ripple_frequency() -> None:
    plan = plan_from(
        with_sweep(
            'dc = ["4.5 V", "5 V"]\nload = ["0 A", "20 mA"]\n'
            'ripple = ["100 mVpp", "35 mVrms"]\nfrequency = ["1 kHz", "2 kHz", "3 kHz"]'
        )
    )
    sweep = plan.expand()
    assert plan.axes == ("dc", "load", "ripple", "frequency")
    assert len(sweep) == 2 * 2 * 2 * 3
    first = [
        (sweep.dc_level[i], sweep.load_current[i], sweep.ripple_peak[i], sweep.frequency[i])
        for i in range(4)
    ]
    peak_rms = 0.035 * math.sqrt(2)
    assert first == [
        (4.5, 0.0, 0.05, 1e3),
        (4.5, 0.0, 0.05, 2e3),
        (4.5, 0.0, 0.05, 3e3),
        (4.5, 0.0, pytest.approx(peak_rms), 1e3),
    ]
    assert sweep.ripple_convention[:4] == ("pp", "pp", "pp", "rms")
    assert sweep.load_current[6] == 0.02 and sweep.dc_level[12] == 5.0


def test_order_frequency_outermost() -> None:
    plan = plan_from(
        with_sweep(
            'order = ["frequency", "ripple", "dc"]\ndc = ["4.5 V", "5 V"]\n'
            'ripple = "50 mVpk"\nfrequency = ["1 kHz", "10 kHz"]'
        )
    )
    sweep = plan.expand()
    assert list(sweep.frequency) == [1e3, 1e3, 1e4, 1e4]
    assert list(sweep.dc_level) == [4.5, 5.0, 4.5, 5.0]


def test_dc_levels_keep_the_written_order() -> None:
    plan = plan_from(with_sweep('dc = ["5.5 V", "4.2 V"]\nripple = "100 mVpp"\nfrequency = 1000'))
    assert list(plan.expand().dc_level) == [5.5, 4.2]


@pytest.mark.parametrize(
    ("start", "stop", "per_decade", "count"),
    [
        (10.0, 1e6, 10, 51),  # 5 decades x 10 + 1
        (10.0, 1e6, 3, 16),  # 5 x 3 + 1
        (10.0, 1e6, 4, 21),
        (100.0, 1e3, 1, 2),
        (20.0, 1e6, 10, 48),  # 20 Hz x 10^(k/10), k = 0..46 (796 kHz), then 1 MHz
        (10.0, 5e5, 10, 48),  # 10 Hz ... 398 kHz (k = 0..46), then 500 kHz
        (1e3, 1e3, 10, 1),
    ],
)
def test_log_sweep_keeps_both_ends_and_spacing(
    start: float, stop: float, per_decade: int, count: int
) -> None:
    plan = plan_from(
        with_sweep(
            f'dc = "5 V"\nripple = "100 mVpp"\n'
            f"frequency = {{ from = {start}, to = {stop}, per_decade = {per_decade} }}"
        )
    )
    f = plan.frequencies
    assert f.size == count
    assert f[0] == start and f[-1] == stop
    if count > 1:
        steps = np.diff(np.log10(f))
        # a grid anchored at `from`; `to` closes it, so only the last step may be shorter
        assert np.allclose(steps[:-1], 1 / per_decade, rtol=1e-9)
        assert 0 < steps[-1] <= 1 / per_decade * (1 + 1e-9)


@pytest.mark.parametrize("stop", ["1 MHz", "500 kHz", "1.2 MHz"])
def test_decade_points_come_out_exact(stop: str) -> None:
    """At 10 per decade from 10 Hz, every 10th point is an exact decade: 100 Hz, 1 kHz...,
    wherever the band ends."""
    plan = plan_from(
        with_sweep(
            'dc = "5 V"\nripple = "100 mVpp"\n'
            f'frequency = {{ from = "10 Hz", to = "{stop}", per_decade = 10 }}'
        )
    )
    assert list(plan.frequencies[:41:10]) == [10.0, 100.0, 1e3, 1e4, 1e5]


@pytest.mark.parametrize(
    ("band", "expected"),
    [
        ('{ from = "1 kHz", to = "5 kHz", step = "1 kHz" }', [1e3, 2e3, 3e3, 4e3, 5e3]),
        ('{ from = "1 kHz", to = "10 kHz", step = "4 kHz" }', [1e3, 5e3, 9e3, 10e3]),
        ('{ from = "1 kHz", to = "2 kHz", points = 3 }', [1e3, 1.5e3, 2e3]),
        ('{ at = ["120 Hz", "100 Hz", "120 Hz"] }', [100.0, 120.0]),
        ('["3 kHz", "1 kHz"]', [1e3, 3e3]),
        ("2500", [2500.0]),
        ('{ from = "0.1 Hz", to = "0.3 Hz", step = "0.1 Hz" }', [0.1, 0.2, 0.3]),
    ],
)
def test_linear_and_listed_frequencies(band: str, expected: list[float]) -> None:
    plan = plan_from(with_sweep(f'dc = "5 V"\nripple = "100 mVpp"\nfrequency = {band}'))
    assert list(plan.frequencies) == expected


def test_union_of_bands_is_sorted_without_duplicates() -> None:
    plan = plan_from(
        with_sweep(
            'dc = "5 V"\nripple = "100 mVpp"\nfrequency = [\n'
            '  { from = "10 Hz", to = "1 kHz", per_decade = 1 },\n'
            '  { at = ["100 Hz", "50 Hz"] },\n'
            '  "1 kHz",\n'
            '  { from = "600 Hz", to = "800 Hz", step = "100 Hz" },\n'
            "]"
        )
    )
    assert list(plan.frequencies) == [10.0, 50.0, 100.0, 600.0, 700.0, 800.0, 1000.0]


def test_array_of_tables_is_a_union_too() -> None:
    text = with_sweep(
        'dc = "5 V"\nripple = "100 mVpp"\n'
        '[[sweep.frequency]]\nfrom = "10 Hz"\nto = "100 Hz"\nper_decade = 2\n'
        '[[sweep.frequency]]\nat = ["1 MHz"]\n'
    )
    assert list(plan_from(text).frequencies) == pytest.approx([10.0, 10**1.5, 100.0, 1e6])


def test_dc_range_table() -> None:
    plan = plan_from(
        with_sweep(
            'dc = { from = "4 V", to = "5 V", step = "0.25 V" }\nripple = "100 mVpp"\nfrequency = 1e3'
        )
    )
    assert list(plan.dc_levels) == [4.0, 4.25, 4.5, 4.75, 5.0]


def test_sweep_is_consistent() -> None:
    sweep = load_plan(PLANS / "overnight.toml").expand()
    assert isinstance(sweep, Sweep)
    n = len(sweep)
    for array in (sweep.frequency, sweep.ripple_peak, sweep.dc_level, sweep.load_current):
        assert array.shape == (n,) and array.dtype == float
    assert len(sweep.ripple_convention) == n


# -- the other tables --------------------------------------------------------------------
def test_defaults_when_optional_tables_are_absent() -> None:
    plan = plan_from(MINIMAL)
    assert (plan.settle.fixed_s, plan.settle.time_constants) == (0.0, 5.0)
    assert plan.settle.rule == "transient"
    fixed = plan_from(MINIMAL + "[settle]\ntime_constants = 6\n")  # written for the fixed rule
    assert (fixed.settle.rule, fixed.settle.time_constants) == ("time-constants", 6.0)
    assert plan.settle.wait_s(0.1) == pytest.approx(0.5)
    assert plan.capture.min_cycles == 10 and plan.capture.max_averages == 64
    assert plan.capture.target_uncertainty_db == 0.1 and plan.capture.max_time_s == 10.0
    assert plan.watch.action("current_limit") == "stop" and plan.watch.action("pin_dc") == "stop"
    assert plan.watch.distortion == 0.05 and plan.watch.action("distortion") == "flag"
    assert plan.watch.model_mismatch_db == 2.0 and plan.watch.action("model_mismatch") == "flag"
    assert plan.mask is None and plan.linearity is None and plan.floor is None
    with pytest.raises(ValueError):
        plan.watch.action("thermal")


def test_watch_rules_in_both_forms() -> None:
    plan = plan_from(
        MINIMAL
        + '[watch]\ncurrent_limit = "flag"\ndistortion = "2.5 %"\n'
        + 'model_mismatch = { above = "1 dB", then = "stop" }\n'
    )
    assert plan.watch.action("current_limit") == "flag"
    assert plan.watch.distortion == pytest.approx(0.025)
    assert plan.watch.action("distortion") == "flag"
    assert plan.watch.model_mismatch_db == 1.0 and plan.watch.action("model_mismatch") == "stop"


def test_mask_interpolates_in_db_over_log_frequency() -> None:
    """Half way (in log f) between 10 kHz/40 dB and 100 kHz/25 dB, i.e. at 31.62 kHz, the
    limit is 32.5 dB (computed); no limit outside the mask's span."""
    plan = load_plan(PLANS / "demo.toml")
    assert plan.mask is not None
    limits = plan.mask.limit_at([10.0, 1e4 * math.sqrt(10), 1e6, 5.0, 2e6])
    assert limits[:3] == pytest.approx([40.0, 32.5, 10.0])
    assert np.isnan(limits[3]) and np.isnan(limits[4])
    assert list(plan.mask.passes([1e3, 1e3, 2e6], [41.0, 39.0, -5.0])) == [True, False, True]
    assert plan.mask.margin_db(1e3, 45.0) == pytest.approx(5.0)


def test_linearity_and_floor_options() -> None:
    text = with_sweep(
        'dc = "5 V"\nripple = "100 mVpp"\nfrequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }',
        '[linearity]\nat = ["1 kHz", "21.544 Hz"]\nfactors = [0.5, 2, 4]\ntolerance = "0.3 dB"\n'
        '[floor]\nat = "every point"\n',
    )
    plan = plan_from(text)
    assert plan.linearity is not None and plan.floor is not None
    # 21.544 Hz matches the planned 10^(4/3) Hz = 21.5443 Hz within 0.1 %
    assert plan.linearity.frequencies == pytest.approx([10 ** (4 / 3), 1e3])
    assert plan.linearity.factors == (0.5, 2.0, 4.0) and plan.linearity.tolerance_db == 0.3
    assert plan.floor.every_point


def test_dc_outside_the_device_limits_is_left_to_the_feasibility_check() -> None:
    plan = plan_from(with_sweep('dc = ["7 V", "3 V"]\nripple = "100 mVpp"\nfrequency = 1e3'))
    assert list(plan.dc_levels) == [7.0, 3.0]


# -- errors ------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("text", "key", "fragment"),
    [
        (
            with_sweep('dc = "5 V"\nripple = ["100 mVpp", "100 mA"]\nfrequency = 1e3'),
            "sweep.ripple[1]",
            "'100 mA' where a voltage is expected (that is a current)",
        ),
        (
            with_sweep('dc = "5 V"\nripples = "100 mVpp"\nfrequency = 1e3'),
            "sweep.ripples",
            'did you mean "ripple"?',
        ),
        (MINIMAL + "[mask]\npoint = []\n", "mask.point", 'did you mean "points"?'),
        (MINIMAL + '[setle]\nwait = "1 s"\n', "setle", 'did you mean "settle"?'),
        (
            with_sweep('dc = "5 V"\nripple = "100 mVpp"\nfrequency = ["1 kHz", "0 Hz"]'),
            "sweep.frequency[1]",
            "greater than zero",
        ),
        (
            with_sweep('dc = "5 V"\nripple = "100 mVpp"\nfrequency = "-5 Hz"'),
            "sweep.frequency",
            "greater than zero",
        ),
        (
            with_sweep(
                'dc = "5 V"\nripple = "100 mVpp"\n'
                'frequency = { from = "1 MHz", to = "10 Hz", per_decade = 10 }'
            ),
            "sweep.frequency.to",
            "below from",
        ),
        (
            with_sweep(
                'dc = "5 V"\nripple = "100 mVpp"\n'
                'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 0.5 }'
            ),
            "sweep.frequency.per_decade",
            "outside the sensible range",
        ),
        (
            with_sweep(
                'dc = "5 V"\nripple = "100 mVpp"\n'
                'frequency = [{ from = "10 Hz", to = "1 MHz", per_decade = nan }]'
            ),
            "sweep.frequency[0].per_decade",
            "finite",
        ),
        (
            with_sweep(
                'dc = "5 V"\nripple = "100 mVpp"\n'
                'frequency = { from = "10 Hz", to = "1 MHz", step = "1 Hz", per_decade = 3 }'
            ),
            "sweep.frequency",
            "exactly one of",
        ),
        (
            with_sweep('dc = "5 V"\nripple = "100 mVpp"\nfrequency = { at = [], from = 1 }'),
            "sweep.frequency.from",
            "drop this key",
        ),
        (
            '[device]\nabsolute_max = "6 V"\nmin_operating = "6 V"\n'
            '[sweep]\ndc = "5 V"\nripple = "100 mVpp"\nfrequency = 1e3',
            "device.min_operating",
            "not below absolute_max",
        ),
        (
            with_sweep('dc = ["5 V", "0 V"]\nripple = "100 mVpp"\nfrequency = 1e3'),
            "sweep.dc[1]",
            "greater than zero",
        ),
        (
            with_sweep('dc = ["5 V", "5000 mV"]\nripple = "100 mVpp"\nfrequency = 1e3'),
            "sweep.dc[1]",
            "listed twice",
        ),
        (
            with_sweep('dc = "5 V"\nripple = "100 mVpp"\nfrequency = 1e3\nload = "-1 mA"'),
            "sweep.load[0]",
            "negative",
        ),
        (
            with_sweep('dc = "5 V"\nripple = "0 mVpp"\nfrequency = 1e3'),
            "sweep.ripple[0]",
            "greater than zero",
        ),
        (
            with_sweep('dc = "5 V"\nripple = "100 mV"\nfrequency = 1e3'),
            "sweep.ripple[0]",
            "Vpp, Vpk or Vrms",
        ),
        (
            with_sweep(
                'dc = "5 V"\nripple = "100 mVpp"\nfrequency = 1e3\norder = ["dc", "ripple"]'
            ),
            "sweep.order",
            "missing: frequency",
        ),
        (
            with_sweep(
                'dc = "5 V"\nripple = "100 mVpp"\nfrequency = 1e3\n'
                'order = ["dc", "load", "ripple", "frequency"]'
            ),
            "sweep.order[1]",
            "no sweep.load",
        ),
        (
            with_sweep('dc = "5 V"\nripple = "100 mVpp"\nfrequency = 1e3\norder = ["dc", "temp"]'),
            "sweep.order[1]",
            "not an axis",
        ),
        (
            with_sweep('dc = "5 V"\nripple = "100 mVpp"'),
            "sweep.frequency",
            "missing",
        ),
        ('[sweep]\ndc = "5 V"\nripple = "100 mVpp"\nfrequency = 1e3', "device", "missing"),
        (
            MINIMAL + '[settle]\nrule = "time-constants"\nwait = 0\ntime_constants = 0\n',
            "settle",
            "both zero",
        ),
        (
            MINIMAL + '[settle]\nrule = "transient"\ntime_constants = 6\n',
            "settle.time_constants",
            "rule",
        ),
        (MINIMAL + '[settle]\nrule = "fixed"\n', "settle.rule", "not one of"),
        (MINIMAL + '[settle]\nwait = "-1 s"\n', "settle.wait", "negative"),
        (MINIMAL + "[capture]\nmin_cycles = 0\n", "capture.min_cycles", "below the minimum"),
        (MINIMAL + "[capture]\nmax_averages = 2.5\n", "capture.max_averages", "whole number"),
        (MINIMAL + '[capture]\nmax_time = "10 Hz"\n', "capture.max_time", "a time is expected"),
        (
            MINIMAL + '[capture]\nfrequency_tolerance = "20 %"\n',
            "capture.frequency_tolerance",
            "from '0 %' to '10 %'",
        ),
        (
            MINIMAL + "[capture]\nfrequency_tolerance = 0.001\n",
            "capture.frequency_tolerance",
            "percentage",
        ),
        (
            MINIMAL.replace('"3.8 V"', '"3.8 V"\ngain = -10'),
            "device.gain",
            "positive ratio",
        ),
        (MINIMAL.replace('"3.8 V"', '"3.8 V"\ngain = "20 dBm"'), "device.gain", "dB"),
        (MINIMAL + '[watch]\npin_dc = "halt"\n', "watch.pin_dc", "'flag' or 'stop'"),
        (MINIMAL + '[watch]\ndistortion = "5"\n', "watch.distortion", "percentage"),
        (
            MINIMAL + '[watch]\ndistortion = { above = "5 %", when = "stop" }\n',
            "watch.distortion.when",
            'did you mean "then"?',
        ),
        (
            MINIMAL + '[mask]\npoints = [["10 kHz", "40 dB"], ["1 kHz", "30 dB"]]\n',
            "mask.points[1][0]",
            "must increase",
        ),
        (MINIMAL + '[mask]\npoints = [["10 kHz", "40 dB"]]\n', "mask.points", "at least two"),
        (
            MINIMAL + '[mask]\npoints = [["10 kHz", "40 dB"], ["20 kHz", "40 V"]]\n',
            "mask.points[1][1]",
            "a level in dB is expected",
        ),
        (MINIMAL + '[mask]\npoints = ["10 kHz"]\n', "mask.points[0]", "a pair"),
        (MINIMAL + '[linearity]\nat = "2 kHz"\n', "linearity.at[0]", "nearest is 1 kHz"),
        (MINIMAL + '[linearity]\nat = "1 kHz"\nfactors = [1]\n', "linearity.factors[0]", "not 1"),
        (MINIMAL + '[floor]\nat = "everywhere"\n', "floor.at", "every point"),
        (MINIMAL + "[device]\n", "", "not valid TOML"),
        ("title = 5\n" + MINIMAL, "title", "expected text"),
        (
            MINIMAL.replace('"3.8 V"', '"3.8 V"\nmax_load = "50 mA"')
            + '[sweep.load]\nfrom = "0 A"\nto = "100 mA"\nstep = "50 mA"\n',
            "sweep.load",
            "above device.max_load",
        ),
    ],
)
def test_errors_name_file_key_and_problem(text: str, key: str, fragment: str) -> None:
    error = error_of(text)
    message = str(error)
    assert message.startswith("bay2.toml")
    assert error.key == key
    assert fragment in message, message
    assert isinstance(error, BadInput)


@pytest.mark.parametrize(
    ("written", "gain_db"),
    [('"20 dB"', 20.0), ("10", 20.0), ('"10 V/V"', 20.0), ('"-6 dB"', -6.0), ("1", 0.0)],
)
def test_device_gain_in_db_or_as_a_ratio(written: str, gain_db: float) -> None:
    """20·log10(10) = 20 dB (the decibel of a voltage ratio, common practice)."""
    plan = plan_from(MINIMAL.replace('"3.8 V"', f'"3.8 V"\ngain = {written}'))
    assert plan.device.gain_db == pytest.approx(gain_db, abs=1e-12)
    assert plan_from(MINIMAL).device.gain_db is None


def test_frequency_tolerance_default_and_zero() -> None:
    assert plan_from(MINIMAL).capture.frequency_tolerance == pytest.approx(1e-3)
    zero = plan_from(MINIMAL + '[capture]\nfrequency_tolerance = "0 %"\n')
    assert zero.capture.frequency_tolerance == 0.0
    half = plan_from(MINIMAL + '[capture]\nfrequency_tolerance = "0.5 %"\n')
    assert half.capture.frequency_tolerance == pytest.approx(5e-3)


def test_too_many_points_is_refused_before_expansion() -> None:
    text = with_sweep(
        'dc = { from = "4 V", to = "5 V", points = 21 }\nripple = "100 mVpp"\n'
        'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 10000 }'
    )
    error = error_of(text)
    assert error.key == "sweep" and f"{MAX_POINTS:,}" in str(error)


def test_missing_file_and_bad_bytes(tmp_path: Path) -> None:
    with pytest.raises(FileKeyError, match="file not found"):
        load_plan(tmp_path / "nope.toml")
    bad = tmp_path / "latin.toml"
    bad.write_bytes(b'title = "caf\xe9"\n')
    with pytest.raises(FileKeyError, match=r"latin\.toml: not UTF-8"):
        load_plan(bad)


# -- robustness: random and corrupted plans ----------------------------------------------
_KEYS = [
    "title", "operator", "notes", "device", "sweep", "settle", "capture", "watch", "mask",
    "linearity", "floor", "name", "absolute_max", "min_operating", "max_load", "order",
    "frequency", "ripple", "dc", "load", "from", "to", "per_decade", "step", "points", "at",
    "wait", "time_constants", "after_operating_point", "rule", "min_cycles", "max_time",
    "target_uncertainty", "max_averages", "current_limit", "pin_dc", "distortion",
    "model_mismatch", "above", "then", "factors", "tolerance", "zzz", "frequency_tolerance",
    "gain",
]  # fmt: skip
_TEXTS = [
    "5 V", "100 mVpp", "35 mVrms", "10 Hz", "1 MHz", "0 Hz", "-3 Hz", "1e300 Hz", "5 %",
    "2 dB", "flag", "stop", "every point", "dc", "ripple", "frequency", "load", "4k7", "",
    "100 mA", "nan", "1 s", "10 uF", "µ", "inf V", "0.1 %", "20 dB", "10 V/V",
]  # fmt: skip
_SCALARS = st.one_of(
    st.sampled_from(_TEXTS),
    st.text(max_size=8),
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
)
_TREES = st.recursive(
    _SCALARS,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4),
        st.dictionaries(st.sampled_from(_KEYS), inner, max_size=5),
    ),
    max_leaves=25,
)


def _never_a_traceback(data: Any) -> None:
    try:
        plan = parse_plan(data, "fuzz.toml", "")
    except BadInput as exc:
        assert "fuzz.toml" in str(exc)
    else:
        assert len(plan.expand()) == plan.point_count


@FAST
@given(st.dictionaries(st.sampled_from(_KEYS), _TREES, max_size=8))
def test_random_toml_trees_give_a_plan_or_a_bad_input(data: dict[str, Any]) -> None:
    _never_a_traceback(data)


@st.composite
def _mutated_example(draw: st.DrawFn) -> dict[str, Any]:
    """An example plan with a few random deletions, replacements and misspelt keys."""
    name = draw(st.sampled_from(["demo.toml", "overnight.toml"]))
    data = tomllib.loads((PLANS / name).read_text(encoding="utf-8"))
    return mutate(draw, data, _TREES)


@FAST
@given(_mutated_example())
def test_corrupted_example_plans_give_a_plan_or_a_bad_input(data: dict[str, Any]) -> None:
    _never_a_traceback(data)


@FAST
@given(st.binary(max_size=200))
def test_random_bytes_give_a_bad_input_naming_the_file(raw: bytes) -> None:
    try:
        text, data = parse_toml_text(raw, "fuzz.toml")
        parse_plan(data, "fuzz.toml", text)
    except BadInput as exc:
        assert "fuzz.toml" in str(exc)


@FAST
@given(st.data())
def test_example_text_with_lines_dropped_or_cut(data: st.DataObject) -> None:
    lines = (PLANS / "overnight.toml").read_text(encoding="utf-8").splitlines(keepends=True)
    drop = data.draw(st.sets(st.integers(min_value=0, max_value=len(lines) - 1), max_size=6))
    text = "".join(line for i, line in enumerate(lines) if i not in drop)
    cut = data.draw(st.integers(min_value=0, max_value=len(text)))
    try:
        parsed_text, parsed = parse_toml_text(text[:cut], "overnight.toml")
        plan = parse_plan(parsed, "overnight.toml", parsed_text)
    except BadInput as exc:
        assert "overnight.toml" in str(exc)
    else:
        assert len(plan.expand()) == plan.point_count
