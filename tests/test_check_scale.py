"""`check` at scale judges every point as the point-by-point path does.

At a million points `check` judges blocks of points, keeps verdict bits instead of the
per-point figures, computes settle waits once per distinct change and the injector's
transfer once per frequency. Here small random plans (hypothesis: axes, order, linearity
and floor drawn) are checked both ways, the reference being the existing, separately
tested point-by-point code: ``Plan.expand`` (tests/test_plan.py), ``InjectorModel.feasibility``
on every point at once (tests/test_injector*.py) and ``Settling.change`` per point
(tests/test_settling.py, against scipy). One figure from a handbook formula as well.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from unittest import mock

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import benchseq.check as check
from benchseq.bench import embedded_bench_text, parse_bench
from benchseq.feasibility import REASON_TITLES, REASONS
from benchseq.injector import InjectorModel
from benchseq.plan import SettleRule, parse_plan
from benchseq.settling import Settling, previous_in

PLANS = Path(__file__).resolve().parent.parent / "plans"
FAST = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
LOAD_TABLE = '\n[load]\naddress = "SIM::load"\nprofile = "scpi-load"\nmax_current = "500 mA"\n'
FREQUENCIES = ["10 Hz", "50 Hz", "1 kHz", "20 kHz", "300 kHz", "2 MHz", "5 MHz", "15 MHz"]
RIPPLES = ["5 mVpp", "100 mVpp", "1 Vpp", "2 Vpp", "500 mVrms"]
LEVELS = ["3.7 V", "4 V", "5 V", "5.5 V"]
LOADS = ["0 mA", "100 mA", "250 mA"]


def _bench():
    text = embedded_bench_text() + LOAD_TABLE
    return parse_bench(tomllib.loads(text), "bench-with-load.toml", text)


BENCH = _bench()


@st.composite
def _plans(draw: st.DrawFn):
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    data["device"]["min_operating"] = "3.6 V"
    data["device"]["max_load"] = "300 mA"
    data.pop("mask", None)
    frequencies = draw(st.lists(st.sampled_from(FREQUENCIES), min_size=1, max_size=5, unique=True))
    sweep = {
        "frequency": {"at": frequencies},
        "ripple": draw(st.lists(st.sampled_from(RIPPLES), min_size=1, max_size=3, unique=True)),
        "dc": draw(st.lists(st.sampled_from(LEVELS), min_size=1, max_size=3, unique=True)),
    }
    axes = ["dc", "ripple", "frequency"]
    if draw(st.booleans()):
        sweep["load"] = draw(st.lists(st.sampled_from(LOADS), min_size=1, max_size=3, unique=True))
        axes.append("load")
    sweep["order"] = draw(st.permutations(axes))
    data["sweep"] = sweep
    if draw(st.booleans()):
        data["linearity"] = {"at": draw(st.lists(st.sampled_from(frequencies), min_size=1))}
    if draw(st.booleans()):
        data["floor"] = {"at": draw(st.lists(st.sampled_from(frequencies), min_size=1))}
    return parse_plan(data, "scale-variant.toml", text)


def _reference_groups(feas, n_checked: int) -> list[tuple]:
    """The reasons as the point-by-point check listed them: per severity and reason, the
    count, the first 20 points and the first point of the largest severity (NaN lowest)."""
    out = []
    for severity in ("refused", "marginal"):
        for code in REASONS:
            ids = feas.indices(code, severity)
            if ids.size == 0:
                continue
            worst = int(ids[np.argmax(np.nan_to_num(feas.severity[code][ids], nan=-np.inf))])
            text = next(
                (
                    m
                    for (c, _), m in zip(feas.reasons(worst), feas.messages(worst), strict=True)
                    if c == code
                ),
                REASON_TITLES[code],
            )
            out.append((code, severity, int(ids.size), worst, text, tuple(ids[:20].tolist())))
    return out


@FAST
@given(_plans(), st.sampled_from([1, 3, 7, 1 << 16]))
def test_blocks_judge_every_point_as_all_at_once(plan, block) -> None:
    sweep = plan.expand()
    values = plan.point_values()
    for name in ("frequency", "ripple_peak", "dc_level", "load_current"):
        ours, theirs = getattr(values, name), getattr(sweep, name)
        assert ours.dtype == theirs.dtype
        assert np.array_equal(ours, theirs, equal_nan=True), name
    with mock.patch.object(check, "CHECK_BLOCK", block):
        report = check.check_plan(plan, BENCH)
    repeats = check._linearity_points(plan, sweep)
    model = InjectorModel(BENCH.injector, BENCH.generator, BENCH.pin)
    device = check._Limits(plan.device.absolute_max_v, plan.device.min_operating_v, 0.3)
    full = model.feasibility(
        *(
            np.concatenate([getattr(sweep, name), repeats[name]])
            for name in ("frequency", "ripple_peak", "dc_level", "load_current")
        ),
        device=device,
        supply_protection_v=BENCH.supply.overvoltage_protection,
    )
    kept = report.feasibility
    assert len(kept) == len(full)
    assert kept.refused_bits.tolist() == full.refused_bits.tolist()
    assert kept.marginal_bits.tolist() == full.marginal_bits.tolist()
    assert kept.verdict.tolist() == full.verdict.tolist()
    assert (report.ok_count, report.marginal_count, report.refused_count) == (
        int(full.ok.sum()),
        int(full.marginal.sum()),
        int(full.refused.sum()),
    )
    groups = [
        (g.code, g.severity, g.count, g.worst_point, g.worst_text, g.first_points)
        for g in report.groups
    ]
    assert groups == _reference_groups(full, len(full))
    for point in report.worst:
        assert list(point.messages) == full.messages(point.index)
        assert point.generator_pp == float(full.generator_pp[point.index])


@FAST
@given(
    st.lists(
        st.tuples(st.sampled_from([10.0, 50.0, 1e3, 2e4, 3e5]), st.sampled_from([0.005, 0.05])),
        min_size=1,
        max_size=30,
    ),
    st.randoms(use_true_random=False),
)
def test_settle_waits_once_per_change_equal_point_by_point(points, rng) -> None:
    model = InjectorModel(BENCH.injector, BENCH.generator, BENCH.pin)
    settling = Settling(SettleRule(), model, 0.1)
    f = np.array([p[0] for p in points])
    pin = np.array([p[1] for p in points])
    order = list(range(f.size))
    rng.shuffle(order)
    previous = previous_in(order, f.size)
    waits = settling.planned(f, pin, previous)
    emf = settling.emf_for(f, pin)
    for k in range(f.size):
        j = int(previous[k])
        one = settling.change(
            f[j] if j >= 0 else f[k], emf[j] if j >= 0 else 0.0, f[k], emf[k], pin[k]
        )
        assert waits[k] == float(one[()]), k


@FAST
@given(
    st.lists(
        st.tuples(
            st.sampled_from([1e-3, 1e-3 * (1 + 1e-10), 10.0, 10.0000000001, 1e6]),
            st.sampled_from([0.05, 0.05 * (1 + 1e-13), 0.5]),
        ),
        min_size=1,
        max_size=40,
    )
)
def test_planner_keys_round_as_python_does(points) -> None:
    """The capture estimate runs once per (frequency to 1 µHz, ripple to 1 pV) and takes
    the first point's; near-equal values share a key exactly when Python's round says."""
    f = np.array([p[0] for p in points])
    pin = np.array([p[1] for p in points])
    rep, key = check._first_of_keys(f, pin)
    first: dict[tuple[float, float], int] = {}
    for k, (a, b) in enumerate(points):
        first.setdefault((round(a, 6), round(b, 12)), k)
    assert sorted(rep.tolist()) == sorted(first.values())
    for k, (a, b) in enumerate(points):
        assert rep[key[k]] == first[(round(a, 6), round(b, 12))]


def test_slew_limit_refuses_every_operating_point_across_blocks() -> None:
    """2 Vpp (1 Vpk) at 5 MHz needs 2π·f·Vpk = 31 V/µs, over the demo op-amp's 10 V/µs
    (full-power bandwidth SR/(2π·Vpk) = 1.6 MHz; Horowitz & Hill, The Art of Electronics,
    3rd ed., §4.2.3); at 1 kHz it needs 6.3 mV/µs. Judged three points at a time, every DC
    level and load at 5 MHz is refused for it, none at 1 kHz."""
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    data["device"].update(min_operating="3 V", max_load="300 mA", absolute_max="6.5 V")
    data["sweep"] = {
        "frequency": {"at": ["1 kHz", "5 MHz"]},
        "ripple": ["2 Vpp"],
        "dc": ["4.5 V", "5 V", "5.4 V"],
        "load": ["0 mA", "50 mA"],
    }
    plan = parse_plan(data, "slew.toml", text)
    with mock.patch.object(check, "CHECK_BLOCK", 3):
        report = check.check_plan(plan, BENCH)
    assert 2 * math.pi * 5e6 * 1.0 > 10e6 > 2 * math.pi * 1e3 * 1.0
    slew = next(g for g in report.groups if (g.code, g.severity) == ("slew-rate", "refused"))
    sweep = plan.expand()
    assert slew.count == 6
    assert {float(sweep.frequency[i]) for i in slew.first_points} == {5e6}
    assert not report.feasibility.refused[sweep.frequency == 1e3].any() or all(
        "slew" not in m
        for i in np.flatnonzero(sweep.frequency == 1e3)
        for m in report.feasibility.messages(int(i))
    )
