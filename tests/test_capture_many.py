"""The capture planner over arrays of points (check's bench-time estimate at a million
points) against the planner called point by point, ``plan_capture`` and
``predicted_plan`` (checked themselves in tests/test_analysis_capture.py and
tests/test_batches.py): the same bench time, recorded time and cycle bound, exactly, on
random points, timebases and rules drawn by hypothesis; and two figures from the formulas
the planner rests on.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from benchseq import batches
from benchseq.analysis import AnalysisError, ScopeTimebase, plan_capture
from benchseq.analysis.capture_many import plan_capture_many

PROFILE = Path(__file__).resolve().parents[1] / "drivers" / "profiles" / "scpi-scope.toml"
CAPS = tomllib.loads(PROFILE.read_text())["capabilities"]
FAST = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _log(low: float, high: float) -> st.SearchStrategy[float]:
    return st.floats(math.log10(low), math.log10(high)).map(lambda x: 10.0**x)


@st.composite
def _scopes(draw: st.DrawFn) -> ScopeTimebase:
    intervals = draw(
        st.lists(st.sampled_from(CAPS["sample_intervals"]), min_size=1, max_size=8, unique=True)
    )
    lengths = draw(
        st.lists(st.sampled_from(CAPS["record_lengths"]), min_size=1, max_size=6, unique=True)
    )
    return ScopeTimebase(
        intervals,
        lengths,
        draw(st.integers(1, 128)),
        draw(st.sampled_from([0.0, 1e-4, 2e-3, 0.05])),
    )


@st.composite
def _points(draw: st.DrawFn, count: int) -> dict[str, list[float]]:
    out: dict[str, list[float]] = {k: [] for k in ("f", "pin", "out", "sigma", "col", "psig")}
    for _ in range(count):
        pin = draw(_log(1e-4, 2.0))
        out["f"].append(draw(_log(0.5, 5e6)))
        out["pin"].append(pin)
        out["out"].append(pin * 10 ** (-draw(st.floats(-10.0, 130.0)) / 20))
        out["sigma"].append(draw(_log(1e-7, 1e-2)))
        out["col"].append(draw(st.one_of(st.just(0.0), _log(1e-20, 1e-10))))
        out["psig"].append(draw(st.one_of(st.just(math.nan), _log(1e-7, 1e-2))))
    return out


RULES = st.fixed_dictionaries(
    {
        "target": st.sampled_from([0.01, 0.05, 0.1, 0.2, 1.0]),
        "min_cycles": st.integers(1, 50),
        "max_time": st.sampled_from([0.01, 0.2, 1.0, 10.0, 100.0]),
        "lean": st.booleans(),
        "longest": st.one_of(st.just(math.nan), _log(1e-4, 5.0)),
    }
)


def _scalar(scope: ScopeTimebase, p: dict, k: int, rules: dict):
    psig = p["psig"][k]
    longest = rules["longest"]
    return plan_capture(
        scope,
        p["f"][k],
        p["pin"][k],
        p["out"][k],
        rules["target"],
        min_cycles=rules["min_cycles"],
        max_time_s=rules["max_time"],
        noise_sigma=p["sigma"][k],
        density_at_f=p["col"][k],
        pin_noise_sigma=None if math.isnan(psig) else psig,
        max_record_time=None if math.isnan(longest) else longest,
        lean=rules["lean"],
    )


@FAST
@given(_scopes(), _points(12), RULES)
def test_many_points_choose_as_one_point_at_a_time(scope, points, rules) -> None:
    scalar = []
    for k in range(len(points["f"])):
        try:
            scalar.append(_scalar(scope, points, k, rules))
        except AnalysisError:
            scalar.append(None)
    reach = [k for k, plan in enumerate(scalar) if plan is not None]
    if len(reach) < len(scalar):  # an unreachable point is refused by both
        with pytest.raises(AnalysisError, match="out of this scope's reach"):
            _many(scope, points, rules, range(len(scalar)))
    if not reach:
        return
    many = _many(scope, points, rules, reach)
    for j, k in enumerate(reach):
        plan = scalar[k]
        assert many.bench_time[j] == plan.bench_time, (k, plan)
        assert many.capture_time[j] == plan.capture_time, (k, plan)
        assert bool(many.cycles_bound[j]) == (plan.limited_by == "cycles"), (k, plan)


def _many(scope: ScopeTimebase, p: dict, rules: dict, keep) -> object:
    idx = list(keep)
    pick = {key: np.asarray(values)[idx] for key, values in p.items()}
    return plan_capture_many(
        scope,
        pick["f"],
        pick["pin"],
        pick["out"],
        rules["target"],
        rules["min_cycles"],
        rules["max_time"],
        noise_sigma=pick["sigma"],
        density_at_f=pick["col"],
        pin_noise_sigma=pick["psig"],
        max_record_time=rules["longest"],
        lean=rules["lean"],
    )


@FAST
@given(_scopes(), _points(10), RULES, st.booleans())
def test_predicted_bench_times_match_predicted_plan(scope, points, rules, per_point) -> None:
    """Also with one target per point (check aims each point's noise at what its frequency's
    channel match leaves of the target)."""
    n = len(points["f"])
    targets = [
        rules["target"] * (1.0 + 0.5 * (k % 3)) if per_point else rules["target"] for k in range(n)
    ]
    expected = []
    for k in range(len(points["f"])):
        psig = points["psig"][k]
        guess = batches.NoiseGuess(
            points["sigma"][k], points["col"][k], None if math.isnan(psig) else psig
        )
        try:
            plan = batches.predicted_plan(
                scope,
                points["f"][k],
                points["pin"][k],
                points["out"][k],
                guess,
                targets[k],
                rules["min_cycles"],
                rules["max_time"],
                lean=rules["lean"],
            )
        except AnalysisError:
            return  # the unreachable case is covered above
        expected.append(plan.bench_time)
    got = batches.predicted_bench_times(
        scope,
        np.array(points["f"]),
        np.array(points["pin"]),
        np.array(points["out"]),
        np.array(points["sigma"]),
        np.array(points["col"]),
        np.array(points["psig"]),
        np.array(targets) if per_point else rules["target"],
        rules["min_cycles"],
        rules["max_time"],
        lean=rules["lean"],
    )
    assert got.tolist() == expected


def _profile_scope() -> ScopeTimebase:
    return ScopeTimebase(
        CAPS["sample_intervals"], CAPS["record_lengths"], CAPS["max_averages"], 0.0
    )


def test_cycle_bound_point_records_its_cycles() -> None:
    """10 cycles of 10 Hz are 1 s (T = N/f); with a strong output the noise asks for less,
    so min_cycles sets the record (common practice: whole periods for a sine fit)."""
    many = plan_capture_many(_profile_scope(), [10.0], [0.1], [0.01], 0.1, 10, 10.0, 1e-6)
    assert bool(many.cycles_bound[0])
    assert many.capture_time[0] == pytest.approx(1.0, rel=1e-12)


def test_noise_bound_time_follows_the_amplitude_bound() -> None:
    """A white noise of σ per sample at Δt has a one-sided density 2σ²Δt, and a fitted
    amplitude's variance is S/T (Kay, Fundamentals of Statistical Signal Processing:
    Estimation Theory, 1993, example 3.14: var(Â) ≥ 2σ²/N): both channels together need
    T = (20/ln 10)²·2σ²Δt·(1/A_pin² + 1/A_out²)/u². 1 mV at the output, 100 mV at the pin,
    σ = 1 mV, u = 0.1 dB: at Δt = 1 µs, T = 15.1 ms (computed); the plan records at
    least that, and not twice that (whole records of the offered lengths)."""
    scope = ScopeTimebase([1e-6], CAPS["record_lengths"], 1, 0.0)
    many = plan_capture_many(scope, [1e3], [0.1], [1e-3], 0.1, 10, 100.0, 1e-3)
    need = (20 / math.log(10)) ** 2 * 2 * 1e-3**2 * 1e-6 * (1 / 0.1**2 + 1 / 1e-3**2) / 0.1**2
    assert need == pytest.approx(0.01509, rel=1e-3)
    assert need <= many.capture_time[0] < 2 * need
