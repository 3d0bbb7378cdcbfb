"""The stated uncertainty against the simulator's truth, pooled over seeds.

The simulator (sim/) solves the circuit on its own and knows the scope's real channel
mismatch and probe attenuations; the run knows only the bench file. A standard uncertainty
u that is complete puts the truth within ±1.96u for about 95 % of values (normal
distribution, JCGM 100 §G.3 and Table G.1: k = 1.96 for 95 %); the check below asks for
≥ 93 % pooled over six seeds (that 95 % less an allowance for the sampling of a few dozen
values) and for no value beyond 4u (a normal error lies there with probability 6e-5).
A lower bound is one-sided 95 % (z = 1.645): at least 95 % of bounds are at or below the
truth. Each seed uses other frequencies (a fifth of a decade apart), so the pool spreads
over the band rather than repeating one sweep.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from benchseq.runner import start_run
from benchseq.store import read_results, read_truth

SEEDS = range(1, 7)
DB = 20.0 / math.log(10.0)

DEMO_PLAN = """
title = "FV-33 coverage check"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = {{ at = [{frequencies}] }}
[settle]
after_operating_point = "0.5 s"
[capture]
max_time = "2 s"
target_uncertainty = "0.2 dB"
"""

AMPLIFIER_PLAN = """
title = "AB-10 coverage check"
[device]
name = "AB-10 gain-of-10 amplifier board (simulated)"
absolute_max = "5.5 V"
min_operating = "3 V"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp", "10 mVpp"]
frequency = {{ at = [{frequencies}] }}
[settle]
after_operating_point = "0.5 s"
[capture]
max_time = "1 s"
target_uncertainty = "0.1 dB"
"""

BUFFER_PLAN = """
title = "QB-1 near the ceiling"
[device]
name = "QB-1 unity-gain reference buffer (simulated)"
absolute_max = "5.5 V"
min_operating = "3.5 V"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp"]
frequency = {{ at = [{frequencies}] }}
[settle]
after_operating_point = "0.5 s"
[capture]
max_time = "{max_time}"
target_uncertainty = "0.2 dB"
"""


def _frequencies(low: float, count: int, seed: int, per_decade: int = 1) -> str:
    """``count`` frequencies ``per_decade`` from ``low``, shifted by a fifth of a decade per
    seed."""
    shift = 10 ** ((seed % 5) / 5)
    return ", ".join(f'"{low * shift * 10 ** (k / per_decade):.6g} Hz"' for k in range(count))


def _run(folder: Path, name: str, plan_text: str, bench: str | None, seed: int) -> pd.DataFrame:
    plan = folder / f"{name}-{seed}.toml"
    plan.write_text(plan_text, encoding="utf-8")
    outcome, path = start_run(str(plan), bench, str(folder / f"{name}-{seed}.h5"), seed=seed)
    assert outcome.status == "complete", outcome.reason
    frame = read_results(path).merge(read_truth(path), on="point_id", suffixes=("", "_true"))
    frame["seed"] = seed
    return frame


def _normalised(frame: pd.DataFrame) -> np.ndarray:
    values = frame[~frame["is_bound"]]
    return (
        (values["rejection_db"] - values["rejection_db_true"]) / values["uncertainty_db"]
    ).to_numpy()


def _assert_coverage(frame: pd.DataFrame, at_least: int) -> None:
    z = _normalised(frame)
    assert z.size >= at_least
    inside = float(np.mean(np.abs(z) <= 1.96))
    assert inside >= 0.93, (inside, np.round(z, 2))
    assert np.all(np.abs(z) <= 4), np.round(z, 2)


def _assert_bounds_hold(bounds: pd.DataFrame) -> None:
    """Each bound is one-sided at ≥ 95 %: the number above the truth is at most
    Binomial(n, 0.05); fail beyond its 99.9th percentile (scipy.stats.binom as the reference),
    so a handful of bounds is judged by what 95 % coverage allows, not by all-or-nothing."""
    from scipy.stats import binom

    above = int(np.sum(bounds["bound_db"] > bounds["rejection_db_true"]))
    allowed = int(binom.ppf(0.999, len(bounds), 0.05))
    assert above <= allowed, (above, len(bounds), allowed)


def _rebuilt_u(frame: pd.DataFrame) -> np.ndarray:
    """u from the stored columns alone, by the formula the uncertainty_db column states."""
    pin = np.abs(frame["pin"].to_numpy())
    out = np.abs(frame["output"].to_numpy())
    sigma = frame["output_sigma"].to_numpy()
    a = np.sqrt(out**2 - 2 * sigma**2)
    return DB * np.sqrt(
        (frame["pin_sigma"].to_numpy() / pin) ** 2
        + (sigma / a) ** 2
        + frame["match_uncertainty"].to_numpy() ** 2
    )


@pytest.mark.slow
def test_demo_without_calibration_covers_the_truth(tmp_path: Path) -> None:
    """The demo bench's scope reads channel 2 0.3 % high and its pin probe is 10.02, not 10:
    without a calibration the tolerance term must cover that (before it did not: 10 of 16
    points inside ±1.96u). Every point says it is uncalibrated, output_sigma is the noise
    at f, and u rebuilt from the stored columns is the stated u."""
    frames = [
        _run(tmp_path, "demo", DEMO_PLAN.format(frequencies=_frequencies(20.0, 5, s)), None, s)
        for s in SEEDS
    ]
    frame = pd.concat(frames)
    _assert_coverage(frame, at_least=25)
    assert all("uncalibrated" in str(f).split() for f in frame["flags"])
    np.testing.assert_array_equal(frame["output_sigma"], frame["output_floor"])
    values = frame[~frame["is_bound"]]
    np.testing.assert_allclose(_rebuilt_u(values), values["uncertainty_db"], rtol=1e-9)


@pytest.mark.slow
def test_amplifier_scenario_covers_the_truth(tmp_path: Path) -> None:
    """The amplifier bench (channel 2 −0.2 %, −0.3°), two ripple levels, so that the small
    one brings points near the floor: values cover the truth, bounds sit below it."""
    frames = [
        _run(
            tmp_path,
            "amp",
            AMPLIFIER_PLAN.format(frequencies=_frequencies(30.0, 3, s, per_decade=1)),
            "sim:amplifier",
            s,
        )
        for s in SEEDS
    ]
    frame = pd.concat(frames)
    _assert_coverage(frame, at_least=24)
    bounds = frame[frame["is_bound"]]
    _assert_bounds_hold(bounds)


@pytest.mark.slow
def test_near_the_ceiling_values_are_true_and_bounds_hold(tmp_path: Path) -> None:
    """The reference-buffer scenario: true rejection 130 dB below 1 kHz, 110 dB at 10 kHz.
    Around the scope's floor (near 118 dB with 1 s per point) a value is reported only where
    it is well above the noise: every value within 4u of the truth, ≥ 95 % of bounds at or
    below it (before, values 3.6–4.8u off came through near the ceiling). Each bound holds
    with ≥ 95 % probability whatever the true amplitude; most here lie far under the floor,
    where it holds nearly always."""
    frames = [
        _run(
            tmp_path,
            "buffer",
            BUFFER_PLAN.format(frequencies=_frequencies(200.0, 4, s, per_decade=2), max_time="1 s"),
            "sim:buffer",
            s,
        )
        for s in SEEDS
    ]
    frame = pd.concat(frames)
    assert np.any(frame["rejection_db_true"] > 110) and np.any(frame["rejection_db_true"] < 110)
    assert frame["is_bound"].any() and (~frame["is_bound"]).any()
    z = _normalised(frame)
    assert np.all(np.abs(z) <= 4), np.round(z, 2)
    bounds = frame[frame["is_bound"]]
    assert np.mean(bounds["bound_db"] <= bounds["rejection_db_true"]) >= 0.95


@pytest.mark.slow
def test_a_high_rejection_point_measured_first_uses_the_plans_time(tmp_path: Path) -> None:
    """A single point with nothing measured before it (the run's first guess is 40 dB):
    at 5.6 kHz (truth 115 dB) it is found and reported as a value within 4u; at 1 kHz
    (truth 127 dB, under the floor) the bound comes only after the plan's max_time was
    spent, and says so (bound_time_limited)."""
    found = _run(
        tmp_path,
        "one",
        BUFFER_PLAN.format(frequencies='"5.6 kHz"', max_time="2 s"),
        "sim:buffer",
        4,
    ).iloc[0]
    assert not found["is_bound"], found["flags"]
    assert abs(found["rejection_db"] - found["rejection_db_true"]) <= 4 * found["uncertainty_db"]
    under = _run(
        tmp_path,
        "under",
        BUFFER_PLAN.format(frequencies='"1 kHz"', max_time="1 s"),
        "sim:buffer",
        4,
    ).iloc[0]
    assert under["is_bound"] and "bound_time_limited" in under["flags"].split()
    assert under["bound_db"] <= under["rejection_db_true"]
    # every triggered record costs its duration plus the re-arm time (2 ms, the simulated
    # scope's profile): the pool fills the second of max_time but for under one record of
    # room and one record lost to equal averages in the two waveforms read (≤ 64 each)
    cost = under["record_length"] * under["sample_interval"] + 0.002
    assert 1.0 - 2 * cost < under["averages"] * cost <= 1.0 + 1e-9
