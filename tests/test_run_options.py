"""The plan's optional checks in a run: linearity repeats and generator-off floor captures.

Reference: the simulator's truth. Its devices are linear in the ripple (small-signal), so a
repeat at half or twice the ripple must give the same rejection within the uncertainties;
with the generator off the output carries only noise, so the amplitude fitted at the test
frequency is a Rayleigh draw whose scale is the per-quadrature floor σ_c (P(A > 4.5 σ_c) =
exp(-4.5²/2) ≈ 4e-5, standard result for the envelope of Gaussian noise)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from benchseq.records import FLAG_TEXT
from benchseq.runner import start_run
from benchseq.store import read_meta, read_results, read_truth

PLAN = """
title = "FV-33 linearity and floor look"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["1 kHz", "10 kHz", "100 kHz"] }
[capture]
max_time = "2 s"
target_uncertainty = "0.1 dB"
[linearity]
at = ["10 kHz", "100 kHz"]
tolerance = "TOL"
[floor]
at = "every point"
"""


def _run(folder: Path, tolerance: str) -> Path:
    plan = folder / f"options-{tolerance.replace(' ', '')}.toml"
    plan.write_text(PLAN.replace("TOL", tolerance), encoding="utf-8")
    outcome, path = start_run(str(plan), None, str(folder / f"{plan.stem}.h5"), seed=2)
    assert outcome.status == "complete"
    return path


@pytest.fixture(scope="module")
def options_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _run(tmp_path_factory.mktemp("options"), "0.5 dB")


def test_repeats_follow_their_point_at_the_other_ripple_levels(options_run: Path) -> None:
    frame = read_results(options_run)
    assert len(frame) == 3 + 2 * 2 and read_meta(options_run)["status"] == "complete"
    assert sorted(frame["point_id"]) == list(range(7))
    repeats = frame[frame["repeat_of"] >= 0]
    bases = frame.set_index("point_id")
    for _, row in repeats.iterrows():
        base = bases.loc[int(row["repeat_of"])]
        assert row["frequency_planned"] == base["frequency_planned"]
        assert row["ripple_target"] == pytest.approx(base["ripple_target"] * row["ripple_factor"])
    assert sorted(repeats["ripple_factor"]) == [0.5, 0.5, 2.0, 2.0]
    # run order: each repeat straight after its point (nothing drifts in between)
    order = list(frame.sort_values("started_at")["point_id"])
    assert order == [0, 1, 3, 4, 2, 5, 6]


def test_a_linear_device_is_not_flagged_and_matches_the_truth(options_run: Path) -> None:
    frame = read_results(options_run).merge(
        read_truth(options_run), on="point_id", suffixes=("", "_t")
    )
    assert not frame["flags"].str.contains("nonlinear").any()
    error = frame["rejection_db"] - frame["rejection_db_t"]
    assert np.all(np.abs(error) < 0.3), error.to_numpy()


def test_a_tolerance_below_the_noise_flags_repeats(tmp_path: Path) -> None:
    """The rule itself: with a 0.001 dB tolerance, measurement scatter (~0.02-0.1 dB here)
    exceeds it, so the repeats are flagged; the flag is explained in the glossary."""
    frame = read_results(_run(tmp_path, "0.001 dB"))
    repeats = frame[frame["repeat_of"] >= 0]
    flagged = repeats["flags"].str.contains("nonlinear")
    assert flagged.sum() >= 3
    assert not frame[frame["repeat_of"] < 0]["flags"].str.contains("nonlinear").any()
    assert "nonlinear" in FLAG_TEXT


def test_floor_captures_show_noise_only(options_run: Path) -> None:
    frame = read_results(options_run)
    sweep = frame[frame["repeat_of"] < 0]
    repeats = frame[frame["repeat_of"] >= 0]
    assert repeats["floor_output"].isna().all()  # floor captures belong to sweep points
    assert np.isfinite(sweep["floor_output"]).all() and np.isfinite(sweep["floor_pin"]).all()
    # generator off: far below the ripple, within the Rayleigh tail of the measured σ_c
    assert np.all(sweep["floor_output"] < 4.5 * sweep["output_floor"])
    assert np.all(sweep["floor_pin"] < 1e-3 * sweep["ripple_target"])
