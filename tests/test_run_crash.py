"""Crash safety of a whole run: `benchseq run` killed with SIGKILL at random moments.

Each time the result file opens, every stored point equals the same point of an
uninterrupted run with the same seed (so none is damaged), and resume completes the run
with no duplicates and the same numbers."""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from benchseq.runner import resume_run, start_run
from benchseq.store import read_meta, read_results

PLANS = Path(__file__).resolve().parent.parent / "plans"
KILLS = 10


@pytest.mark.slow
# a kill leaves notices (a torn last record, an HDF5 file behind its journal, then repaired)
@pytest.mark.filterwarnings("ignore::benchseq.results.ResultWarning")
def test_sigkill_at_random_moments_then_resume(tmp_path: Path) -> None:
    reference_path = tmp_path / "reference.h5"
    outcome, _ = start_run(str(PLANS / "demo.toml"), None, str(reference_path), seed=5)
    assert outcome.status == "complete"
    reference = read_results(reference_path).set_index("point_id").sort_index()
    columns = ["rejection_db", "bound_db", "generator_pp", "frequency", "record_length"]
    rng = random.Random(20261202)

    def command(out: Path) -> list[str]:
        demo = str(PLANS / "demo.toml")
        return [sys.executable, "-m", "benchseq", "run", demo, "--out", str(out), "--seed", "5"]

    # kill moments spread over what a whole run takes on this machine now (not a check:
    # only where the kills land), so they interrupt runs however fast the software is
    started = time.perf_counter()
    subprocess.run(command(tmp_path / "timed.h5"), capture_output=True, cwd=tmp_path, timeout=300)
    whole = time.perf_counter() - started
    partial_seen = 0
    for k in range(KILLS):
        out = tmp_path / f"killed-{k}.h5"
        proc = subprocess.Popen(
            command(out),
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            cwd=tmp_path,
        )
        time.sleep(rng.uniform(0.3, 0.9) * whole)
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        if not out.exists():
            continue  # killed before the file was created: nothing was reported stored
        stored = read_results(out).set_index("point_id").sort_index()
        assert not stored.index.duplicated().any()
        np.testing.assert_allclose(
            stored[columns].to_numpy(dtype=float),
            reference.loc[stored.index, columns].to_numpy(dtype=float),
            rtol=0,
            atol=1e-9,
            equal_nan=True,
        )
        if read_meta(out)["status"] != "complete":
            partial_seen += 1
            again, _ = resume_run(str(out))
            assert again is not None and again.status == "complete"
        final = read_results(out).set_index("point_id").sort_index()
        assert list(final.index) == list(range(len(reference)))
        np.testing.assert_allclose(
            final[columns].to_numpy(dtype=float),
            reference[columns].to_numpy(dtype=float),
            rtol=0,
            atol=1e-9,
            equal_nan=True,
        )
    assert partial_seen >= KILLS // 2  # most kills must really interrupt a run
