"""The bench time left that the run shows: learnt from the points measured.

Reference: the bench time the run actually spent on the points still to come (the stored
rows' bench_time), on the simulated bench (Fernhollow bay 2, FV-33 board, two input
levels so the second block repeats the first one's frequencies)."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from benchseq.plan import parse_plan
from benchseq.runner import start_run
from benchseq.sequencer import BenchTimeLeft
from benchseq.store import read_results
from benchseq.tomlfile import parse_toml_text

PLAN = """
title = "FV-33 two levels, low frequencies (bench time left)"
operator = "T. Varga-Ellison"
[device]
name = "FV-33 regulator evaluation board"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
order = ["dc", "ripple", "frequency"]
dc = ["4.5 V", "5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["20 Hz", "60 Hz", "200 Hz", "2 kHz", "20 kHz"] }
[settle]
after_operating_point = "0.5 s"
[capture]
min_cycles = 10
max_time = "10 s"
target_uncertainty = "0.1 dB"
"""


def _plan():
    text, data = parse_toml_text(PLAN, "eta.toml")
    return parse_plan(data, "eta.toml", text)


def test_estimates_learn_from_measured_points() -> None:
    plan = _plan()
    sweep = plan.expand()
    eta = BenchTimeLeft(plan, sweep, 0.1)
    everything = set(range(len(sweep)))
    assert eta.left(everything) == pytest.approx(float(np.sum(eta.estimate)))
    eta.learn(0, 10 * float(eta.estimate[0]))  # 20 Hz took ten times its estimate
    later_20hz = int(np.nonzero(np.isclose(sweep.frequency, 20.0))[0][1])
    near, far = 1, 4  # 60 Hz, half a decade away; 20 kHz, three decades away
    assert eta.left({later_20hz}) == pytest.approx(10 * float(eta.estimate[0]))
    # a neighbour leans towards the ratio learnt; a far frequency keeps the check's prior
    assert float(eta.estimate[near]) < eta.left({near}) < 10 * float(eta.estimate[near])
    assert eta.left({far}) == pytest.approx(float(eta.estimate[far]), rel=0.02)


def _row(rejection_db: float) -> dict[str, Any]:
    """A stored row's noise and rejection fields (what a measured point shows)."""
    return {
        "output_floor": 1e-7, "output_noise": 3e-5, "pin_sigma": 1e-6,
        "sample_interval": 1e-4, "record_length": 10_000, "averages": 4,
        "rejection_db": rejection_db, "bound_db": float("nan"), "is_bound": False,
    }  # fmt: skip


def test_a_measured_frequency_re_plans_its_other_points() -> None:
    """A stand-in planner (by frequency: 2 s at 20 Hz under what the 20 Hz point showed,
    4 s at 60 Hz, 1 s elsewhere) against priors of 0.5 s (0.25 s for the later 20 Hz
    point). The later 20 Hz point takes the re-planned 2 s times what the measured point
    took over its own re-planned estimate (3 s against 2 s: 1.5), so 3 s - not its prior
    times the measured/prior ratio (0.25 × 6 = 1.5 s); 60 Hz, half a decade away, leans
    from its prior towards its re-plan; 20 kHz, three decades away, keeps its prior."""
    plan = _plan()
    sweep = plan.expand()
    later = int(np.nonzero(np.isclose(sweep.frequency, 20.0))[0][1])
    seen: list[float] = []

    def replan(i: int, noise: Any, rejection_db: float) -> float:
        assert noise.white_sigma == pytest.approx(3e-5)  # the row's noise, as shown
        seen.append(rejection_db)
        return {20.0: 2.0, 60.0: 4.0}.get(round(float(sweep.frequency[i]), 6), 1.0)

    prior = np.full(len(sweep), 0.5)
    prior[later] = 0.25
    eta = BenchTimeLeft(plan, sweep, 0.0, prior, replan=replan)
    eta.begin(list(range(len(sweep))))
    eta.learn(0, 3.0, _row(71.0))
    assert eta.left({later}) == pytest.approx(3.0)
    assert seen and set(seen) == {71.0}  # the rejection the row showed
    assert 0.5 < eta.left({1}) < 4.0 * 1.5  # 60 Hz
    assert eta.left({4}) == pytest.approx(0.5, rel=0.02)  # 20 kHz: the prior
    eta.learn(later, 2.0, None)  # a point without a row learns its ratio only: 2 s / 2 s
    # the ratio at a frequency is the geometric mean over its points: √(1.5 × 1) × 2 s
    assert eta.left({later}) == pytest.approx(2.0 * 1.5**0.5)


def test_the_first_point_has_no_operating_change_of_its_own() -> None:
    """The power-up ramps to the first point's DC level and waits after_operating_point
    before that point starts, so its bench time holds none of it: 2 s against a 1 s prior
    is a ratio of 2 at its frequency whatever the operating-point part (5 s) is."""
    plan = _plan()
    sweep = plan.expand()
    later = int(np.nonzero(np.isclose(sweep.frequency, 20.0))[0][1])
    operating = np.zeros(len(sweep))
    operating[0] = 5.0
    eta = BenchTimeLeft(plan, sweep, 0.0, np.ones(len(sweep)), operating)
    eta.begin(list(range(len(sweep))))
    eta.learn(0, 2.0)
    assert eta.left({later}) == pytest.approx(2.0 + operating[later])


SEEDS = [1, 2, 3, 4]
K = 4.0  # coverage factor of the limit


@pytest.mark.slow
def test_shown_bench_time_left_follows_what_the_rest_took(tmp_path: Path) -> None:
    """After the first block the figure shown predicts the bench time the second block then
    takes. What a block takes varies from run to run (its captures top up on noise), so no
    prediction can beat that scatter: its standard deviation s over the seeds (sample
    standard deviation) is the stated uncertainty of one block's time, and the prediction
    (learnt from one block) and the outcome (another) differ by √2·s at k = 1; each seed
    must be within K·√2·s. The check's cycle-bound estimate of the same points, which
    ignores top-ups and settling overheads, is far below what they took."""
    (tmp_path / "eta.toml").write_text(PLAN, encoding="utf-8")
    shown: list[float] = []
    actual: list[float] = []
    for seed in SEEDS:
        events: list[Any] = []
        outcome, path = start_run(
            str(tmp_path / "eta.toml"), None, str(tmp_path / f"eta-{seed}.h5"),
            emit=events.append, seed=seed,
        )  # fmt: skip
        assert outcome.status == "complete"
        rows = read_results(path).sort_values("point_id")
        stored = [e for e in events if e.kind == "point_stored"]
        assert len(stored) == 10
        assert stored[-1].bench_time_left == 0.0
        shown.append(float(stored[4].bench_time_left))  # after the 4.5 V block
        actual.append(float(rows["bench_time"].iloc[5:].sum()))
    u = math.sqrt(2.0) * float(np.std(actual, ddof=1))
    for seed, predicted, took in zip(SEEDS, shown, actual, strict=True):
        assert abs(predicted - took) <= K * u, (seed, predicted, took, u)
    eta = BenchTimeLeft(_plan(), _plan().expand(), 0.1)
    assert float(np.sum(eta.estimate[5:])) < 0.8 * min(actual)
