"""SIGKILL campaign on whole runs (a benchmark script, not a test).

Runs `benchseq run` on the simulated demo bench (a four-frequency cut of plans/demo.toml)
and kills it with SIGKILL at random moments (seeded), each time followed by
`benchseq run --resume` until the run is complete. Kill moments, drawn per trial:

- random:  at a random time during the run (mostly once its file exists: power-up, points,
           updates; some while it starts);
- final:   during the HDF5 update after "complete" is in the journal (the store's fault
           hook kills the process once the temporary copy is written, before the rename);
- resume:  a random kill of the run, then a random kill of the first resume as well.

After every kill it notes the points stored (what a reader loads), whether the HDF5 file
needs repair (it lags its journal, or an update left a temporary copy) and, once resumed
to completion, whether it was repaired, whether every point stored at a kill is still
there with the same value, and whether the final file equals an uninterrupted run's.

    python tests/perf/kill_campaign.py [--kills 20] [--seed 1] [--time-limit 900] [--dir D]

Prints kills, points lost, files needing repair and files repaired (target: 0 lost, all
repaired). Bounded: at most --kills kills and --time-limit seconds.
"""

from __future__ import annotations

import argparse
import os
import random
import signal
import subprocess
import sys
import tempfile
import time
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from benchseq.errors import BadInput
from benchseq.results import mirror_lag
from benchseq.store import FAULT_ENV, read_meta, read_results, stale_temporaries

ROOT = Path(__file__).resolve().parents[2]
DEMO_FREQUENCIES = 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }'
FREQUENCIES = 'frequency = ["1 kHz", "20 kHz", "100 kHz", "500 kHz"]'
SEED = 7  # the simulated bench's seed: every run measures the same numbers
COLUMNS = ["rejection_db", "bound_db", "frequency"]
RESUME_ATTEMPTS = 6


def _plan(folder: Path) -> Path:
    text = (ROOT / "plans" / "demo.toml").read_text(encoding="utf-8")
    path = folder / "campaign.toml"
    path.write_text(text.replace(DEMO_FREQUENCIES, FREQUENCIES), encoding="utf-8")
    return path


def _env(fault: str = "") -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != FAULT_ENV}
    if fault:
        env[FAULT_ENV] = fault
    return env


def _run_argv(plan: Path, out: Path) -> list[str]:
    return [sys.executable, "-m", "benchseq", "run", str(plan), "--out", str(out),
            "--seed", str(SEED)]  # fmt: skip


def _resume_argv(out: Path) -> list[str]:
    return [sys.executable, "-m", "benchseq", "run", "--resume", str(out)]


def _run_and_kill(
    argv: list[str], delay: float | None, fault: str = "", after: Path | None = None
) -> bool:
    """Run ``argv``; SIGKILL it ``delay`` s after ``after`` exists (or after the start; None:
    let the fault hook or the end come). True when the process died by SIGKILL."""
    proc = subprocess.Popen(
        argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=_env(fault), cwd=ROOT
    )
    try:
        if delay is not None and after is not None:
            deadline = time.monotonic() + 120
            while not after.exists() and proc.poll() is None and time.monotonic() < deadline:
                time.sleep(0.005)
        proc.wait(timeout=delay)
    except subprocess.TimeoutExpired:
        os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=300)
    return proc.returncode == -signal.SIGKILL


def _table(path: Path) -> dict[int, tuple[float, ...]]:
    frame = read_results(path)
    return {
        int(row["point_id"]): tuple(float(row[c]) for c in COLUMNS) for _, row in frame.iterrows()
    }


def _readable(path: Path) -> bool:
    """True once the run's header is stored (a result a reader can open)."""
    try:
        read_meta(path)
    except BadInput:
        return False
    return True


def _needs_repair(path: Path) -> bool:
    return bool(mirror_lag(path)) or bool(stale_temporaries(path))


def _plain_h5py(path: Path) -> tuple[str, int]:
    with h5py.File(path, "r", locking=False) as h5:
        return str(h5.attrs["status"]), int(h5["points/point_id"].shape[0])


def _same(a: tuple[float, ...], b: tuple[float, ...]) -> bool:
    return bool(np.allclose(a, b, rtol=0, atol=1e-9, equal_nan=True))


class Tally:
    def __init__(self) -> None:
        self.kills = 0
        self.moments: Counter[str] = Counter()
        self.before_file = 0
        self.points_at_kills = 0
        self.lost = 0
        self.changed = 0
        self.needing_repair = 0
        self.repaired = 0
        self.resumes = 0
        self.failed_resumes = 0
        self.unlike_reference = 0
        self.trials = 0


def _note_kill(tally: Tally, out: Path, moment: str, seen: dict[int, tuple]) -> bool:
    """Record one kill; True when the file needs repair."""
    tally.kills += 1
    tally.moments[moment] += 1
    if not _readable(out):
        tally.before_file += 1
        return False
    stored = _table(out)
    tally.points_at_kills += len(stored)
    for pid, values in seen.items():  # what an earlier kill had stored must still be there
        if pid not in stored:
            tally.lost += 1
        elif not _same(values, stored[pid]):
            tally.changed += 1
    seen.update(stored)
    return _needs_repair(out)


def _complete(out: Path, tally: Tally) -> bool:
    for _ in range(RESUME_ATTEMPTS):
        done = subprocess.run(_resume_argv(out), capture_output=True, env=_env(), cwd=ROOT)
        tally.resumes += 1
        if done.returncode == 0 and read_meta(out).get("status") == "complete":
            return True
        tally.failed_resumes += 1
    return False


@dataclass(frozen=True)
class Span:
    """How long an uninterrupted run takes to create its file, and then to finish (s)."""

    start: float
    body: float


def _measure_span(plan: Path, out: Path) -> Span:
    journal = Path(str(out) + ".journal")
    t0 = time.monotonic()
    proc = subprocess.Popen(
        _run_argv(plan, out), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=_env()
    )
    deadline = t0 + 300
    while not journal.exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)
    t1 = time.monotonic()
    if proc.wait(timeout=300) != 0:
        raise SystemExit(f"the uninterrupted run failed (exit {proc.returncode})")
    return Span(t1 - t0, time.monotonic() - t1)


def trial(k: int, rng: random.Random, plan: Path, folder: Path, span: Span, tally: Tally) -> None:
    out = folder / f"trial-{k}.h5"
    moment = rng.choice(["random", "random", "final", "resume"])
    seen: dict[int, tuple] = {}
    needs = False
    journal = Path(str(out) + ".journal")
    if moment == "final":
        killed = _run_and_kill(_run_argv(plan, out), None, "kill:final-written")
    elif rng.random() < 0.15:  # some while starting (imports, checks, creating the file)
        killed = _run_and_kill(_run_argv(plan, out), rng.uniform(0.0, span.start))
    else:
        killed = _run_and_kill(_run_argv(plan, out), rng.uniform(0.0, span.body), after=journal)
    if killed:
        needs |= _note_kill(tally, out, "final update" if moment == "final" else "run", seen)
    resume_killed = (
        moment == "resume"
        and killed
        and _readable(out)
        and _run_and_kill(_resume_argv(out), rng.uniform(0.0, span.start + span.body))
    )
    if resume_killed:
        needs |= _note_kill(tally, out, "resume", seen)
    if not _readable(out):
        return  # killed before the run's header was stored: nothing was stored
    tally.trials += 1
    tally.needing_repair += int(needs)
    unfinished = read_meta(out).get("status") != "complete" or _needs_repair(out)
    if unfinished and not _complete(out, tally):
        return
    final = _table(out)
    for pid, values in seen.items():
        if pid not in final:
            tally.lost += 1
        elif not _same(values, final[pid]):
            tally.changed += 1
    repaired = not _needs_repair(out) and _plain_h5py(out) == ("complete", len(final))
    tally.repaired += int(needs and repaired)
    reference = trial.reference  # type: ignore[attr-defined]
    if set(final) != set(reference) or not all(_same(final[p], reference[p]) for p in final):
        tally.unlike_reference += 1


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--kills", type=int, default=20, help="kills to make (default 20)")
    parser.add_argument("--seed", type=int, default=1, help="seed of the kill moments")
    parser.add_argument("--time-limit", type=float, default=900.0, help="seconds at most")
    parser.add_argument("--dir", type=Path, default=None, help="folder for the files")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="kill-campaign-", dir=args.dir))
    plan = _plan(folder)
    started = time.monotonic()
    reference_path = folder / "reference.h5"
    span = _measure_span(plan, reference_path)
    trial.reference = _table(reference_path)  # type: ignore[attr-defined]
    print(f"uninterrupted run: {len(trial.reference)} points; file created after "  # type: ignore[attr-defined]
          f"{span.start:.1f} s, run {span.body:.1f} s more; load average "
          f"{os.getloadavg()[0]:.2f}")  # fmt: skip
    rng = random.Random(args.seed)
    tally = Tally()
    k = 0
    while tally.kills < args.kills and time.monotonic() - started < args.time_limit:
        trial(k, rng, plan, folder, span, tally)
        k += 1
    took = time.monotonic() - started
    moments = ", ".join(f"{n} {m}" for m, n in sorted(tally.moments.items()))
    print(f"kills: {tally.kills} ({moments}; {tally.before_file} before the file existed)")
    print(
        f"trials with a result file: {tally.trials}; points stored at kills: {tally.points_at_kills}"
    )
    print(f"points lost: {tally.lost}; stored values changed: {tally.changed}")
    print(f"files needing repair: {tally.needing_repair}; files repaired: {tally.repaired}")
    print(f"resumes: {tally.resumes} ({tally.failed_resumes} not completing)")
    print(f"final files unlike the uninterrupted run: {tally.unlike_reference}")
    print(f"wall time {took:.0f} s; files in {folder}")


if __name__ == "__main__":
    main()
