"""Which stored point guides the capture of the next: the nearest in log frequency.

References: the simulator's truth for what a point's uncertainty should reach (the plan's
target), and an uninterrupted run with the same seed for what a resumed one must give
(every value identical: the guide is rebuilt from the stored rows only).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from benchseq.runner import resume_run, start_run
from benchseq.sequencer import INITIAL_REJECTION_GUESS_DB, CarryGuide
from benchseq.stopping import StopControl
from benchseq.store import read_results


def _row(frequency: float, rejection: float, repeat_of: int = -1) -> dict[str, Any]:
    return {
        "frequency": frequency,
        "repeat_of": repeat_of,
        "rejection_db": rejection,
        "is_bound": False,
        "bound_db": float("nan"),
        "pin": 0.05 + 0j,
        "pin_model": 0.05 + 0j,
        "output_floor": 1e-7,
        "output_range": 0.01,
        "output_noise": 1e-4,
        "pin_sigma": 1e-4,
        "sample_interval": 1e-6,
        "record_length": 100_000,
        "averages": 1,
    }


def test_the_nearest_frequency_guides_and_the_latest_of_equals() -> None:
    guide = CarryGuide()
    assert guide.for_frequency(50.0).rejection_db == INITIAL_REJECTION_GUESS_DB
    for f, rej in ((20.0, 80.0), (200.0, 70.0), (2000.0, 60.0), (20000.0, 40.0)):
        guide.add(_row(f, rej))
    # the sweep starts again at 20 Hz: the 20 Hz point guides it, not the last (20 kHz) one
    assert guide.for_frequency(20.0).rejection_db == 80.0
    assert guide.for_frequency(60.0).rejection_db == 80.0  # 0.48 decade vs 0.52 decade
    assert guide.for_frequency(70.0).rejection_db == 70.0
    assert guide.for_frequency(1e6).rejection_db == 40.0
    guide.add(_row(20.0, 78.0))  # measured again (another operating point): the latest wins
    assert guide.for_frequency(20.0).rejection_db == 78.0
    guide.add(_row(200.0, 10.0, repeat_of=5))  # a linearity repeat does not guide
    assert guide.for_frequency(200.0).rejection_db == 70.0


TWO_LEVELS = """
title = "two input levels, the second block repeating the first one's frequencies"
[device]
name = "FV-33 regulator evaluation board"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
order = ["dc", "ripple", "frequency"]
dc = ["4.5 V", "5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["100 Hz", "3 kHz", "100 kHz"] }
[capture]
max_time = "2 s"
target_uncertainty = "0.2 dB"
"""


def test_a_resumed_run_is_guided_as_an_uninterrupted_one(tmp_path: Path) -> None:
    """Stopped after the first block and one point of the second, then resumed: the second
    block's points are guided by the first block's (nearest frequency) as in one go, so
    every stored number is the same; and the second block's first point (100 Hz after
    100 kHz) meets the plan's target as the first block's 100 Hz point does (planned from
    100 kHz's rejection, as when the last point guided, it expected an output 30 dB too
    large and took 1,000-sample records: u 0.55 dB against a 0.2 dB target)."""
    plan = tmp_path / "two.toml"
    plan.write_text(TWO_LEVELS, encoding="utf-8")
    whole_outcome, whole_path = start_run(
        str(plan), None, str(tmp_path / "whole.h5"), emit=lambda e: None, seed=7
    )
    assert whole_outcome.status == "complete"
    stop = StopControl()

    def emit(event: Any) -> None:
        if event.kind == "point_stored" and event.done >= 4:
            stop.request("test stop")

    part, path = start_run(str(plan), None, str(tmp_path / "part.h5"), emit=emit, seed=7, stop=stop)
    assert part.status == "stopped" and part.measured == 4
    again, _ = resume_run(str(path))
    assert again is not None and again.status == "complete"
    resumed = read_results(path).sort_values("point_id").reset_index(drop=True)
    whole = read_results(whole_path).sort_values("point_id").reset_index(drop=True)
    for column in ("rejection_db", "uncertainty_db", "record_length", "sample_interval"):
        np.testing.assert_array_equal(resumed[column], whole[column], err_msg=column)
    u = whole["uncertainty_db"].to_numpy()
    target = 0.2
    assert u[3] <= max(u[0], target), u  # 100 Hz at 5 V: 0.55 dB when the last point guided
