"""Points measured after the model's settle waits keep the truth inside their uncertainty.

The simulated bench (its scenario's injector_transients switched on) rings after every
change of the generator through the injector's own natural modes (sim/transient.py, solved
from the netlist, not from benchseq.injector), so a
wait too short for the transient shows up as an error against the simulator's truth. Judged
over several seeds: a complete standard uncertainty u puts a normal error within ±1.96u with
probability 95 % (JCGM 100 §G.3, Table G.1); the number of values outside is then at most
Binomial(n, 0.05), judged at its 99.9th percentile with scipy.stats.binom; none may lie
beyond 4u (probability 6e-5 for a normal error). The plan keeps to the low decades, where
the injector's coupling mode (Rg·Cc ≈ 10 ms) is slowest against the test frequency, and
steps frequency and ripple both ways so each wait follows a different change.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import binom

from benchseq.runner import start_run
from benchseq.store import read_results, read_truth

SEEDS = range(1, 5)
SCENARIOS = Path(__file__).resolve().parent.parent / "sim" / "scenarios"

PLAN = """
title = "FV-33 settle check"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp", "40 mVpp"]
order = ["dc", "frequency", "ripple"]
frequency = {{ at = [{frequencies}] }}
[settle]
{settle}
[capture]
max_time = "2 s"
target_uncertainty = "0.1 dB"
"""


def _frequencies(seed: int) -> str:
    shift = 10 ** ((seed % 4) / 8)  # each seed an eighth of a decade further up
    return ", ".join(f'"{12 * shift * 10 ** (k / 2):.6g} Hz"' for k in range(5))


def _ringing_bench(folder: Path) -> Path:
    """The demo bench on the demo scenario with injector_transients switched on (a scenario
    file beside the bench file)."""
    scenario = (SCENARIOS / "demo.toml").read_text(encoding="utf-8")
    scenario = scenario.replace("injector_transients = false", "injector_transients = true")
    assert "injector_transients = true" in scenario
    (folder / "ringing-demo.toml").write_text(scenario, encoding="utf-8")
    bench = (SCENARIOS / "demo.bench.toml").read_text(encoding="utf-8")
    bench = bench.replace('simulation = "demo"', 'simulation = "ringing-demo.toml"')
    assert "ringing-demo.toml" in bench
    (folder / "ringing.bench.toml").write_text(bench, encoding="utf-8")
    return folder / "ringing.bench.toml"


def _run(folder: Path, seed: int, settle: str) -> pd.DataFrame:
    plan = folder / f"settle-{seed}.toml"
    plan.write_text(PLAN.format(frequencies=_frequencies(seed), settle=settle), encoding="utf-8")
    bench = str(_ringing_bench(folder))
    outcome, path = start_run(str(plan), bench, str(folder / f"settle-{seed}.h5"), seed=seed)
    assert outcome.status == "complete", outcome.reason
    frame = read_results(path).merge(read_truth(path), on="point_id", suffixes=("", "_true"))
    return frame[~frame["is_bound"]]


def _normalised(frames: list[pd.DataFrame]) -> np.ndarray:
    values = pd.concat(frames)
    return (
        (values["rejection_db"] - values["rejection_db_true"]) / values["uncertainty_db"]
    ).to_numpy()


@pytest.mark.slow
def test_model_settle_keeps_coverage(tmp_path: Path) -> None:
    z = _normalised([_run(tmp_path, seed, "") for seed in SEEDS])
    assert z.size >= 30
    outside = int(np.sum(np.abs(z) > 1.96))
    assert outside <= int(binom.ppf(0.999, z.size, 0.05)), (outside, z.size, np.round(z, 2))
    assert np.all(np.abs(z) <= 4), np.round(z, 2)
