"""The demo's wall time against an older checkout, side by side (a script, not a test).

    python tests/perf/demo_wall.py [--base /work/wt/base14] [--repeats 3] [--seed 0]
    python tests/perf/demo_wall.py --agreement 6 --base CHECKOUT

Prints, for this checkout and for ``--base`` (another checkout of benchseq with its own
``.venv``, e.g. one made before the software was made cheaper), interleaved run by run:

- the wall time of a fresh `benchseq run plans/demo.toml` (each checkout's own command line
  in its own interpreter: imports, the check, the run, the file; the command line sets its
  own BLAS threads, see ``benchseq.cli.one_blas_thread``);
- the wall time of the demo run in process (a child interpreter imports benchseq, runs the
  demo once cold, then times a second run), with the BLAS threads each checkout's command
  line would use (one for this checkout, the library's default for a base without that
  setting), and that run's wall split into record synthesis (the simulator's own work),
  fits (measure_point and capture planning), store (journal, fsync, HDF5) and the rest;
- medians over ``--repeats`` runs of each, their ratio this/base, and the software time per
  point that a real bench would wait for in series with its own time (the wall time without
  the simulator's synthesis, encoding and circuit solve).

With ``--agreement N`` it instead runs the demo on seeds 0…N−1 in both checkouts and
compares the result files point by point: the rejection's difference d over its standard
uncertainty (u of this checkout, and u_c = √(u² + u_base²) since the two runs' noise is
independent), and each checkout's coverage of the simulator's truth (share within ±1.96u,
rms of error/u; bounds at or below the truth). Use it with ``--base`` set to the commit
before a change that should not move any number beyond its uncertainty.

The simulated bench runs on a virtual clock, so all of a run's wall time is software. The
machine's load average is printed before and after: on a shared machine take the medians of
several interleaved runs, as here.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve()
ROOT = HERE.parents[2]

SYNTH, FITS, STORE = "synthesis", "fits", "store"
# (module, owner attribute or "", function name, category); patched only where present, so
# an older checkout is profiled the same way
_PATCHES = (
    ("benchseq.sim.instruments", "", "acquire_channel", SYNTH),
    ("benchseq.sim.instruments", "", "format_codes", SYNTH),
    ("benchseq.sim.instruments", "", "format_block", SYNTH),
    ("benchseq.sim.world", "", "solve_point", SYNTH),
    ("benchseq.sim.world", "SimulatedBench", "truth", SYNTH),
    ("benchseq.analysis", "", "measure_point", FITS),
    ("benchseq.analysis", "", "plan_capture", FITS),
    ("benchseq.analysis", "", "suggest_range", FITS),
    ("benchseq.journal", "JournalWriter", "append", STORE),
    ("benchseq.journal", "", "fsync_fd", STORE),
    ("benchseq.journal", "", "fsync_directory", STORE),
    ("benchseq.store", "", "_fsync_file", STORE),
    ("benchseq.store", "RunWriter", "_consolidate", STORE),
    ("benchseq.store", "RunWriter", "append", STORE),
    ("benchseq.store", "RunWriter", "finish", STORE),
)


def _child(root: Path, seed: int) -> None:
    """In-process demo run of whichever benchseq this interpreter imports; prints JSON."""
    import functools
    import importlib

    totals: dict[str, float] = {SYNTH: 0.0, FITS: 0.0, STORE: 0.0}
    stack: list[float] = []

    def wrap(category: str, fn):  # exclusive time, as tests/perf/_runbench.Profiler
        @functools.wraps(fn)
        def timed(*args, **kwargs):
            start = time.perf_counter()
            stack.append(0.0)
            try:
                return fn(*args, **kwargs)
            finally:
                elapsed = time.perf_counter() - start
                inner = stack.pop()
                totals[category] += elapsed - inner
                if stack:
                    stack[-1] += elapsed

        return timed

    for module_name, owner_name, name, category in _PATCHES:
        try:
            module = importlib.import_module(module_name)
        except ImportError:
            continue
        owner = getattr(module, owner_name, None) if owner_name else module
        if owner is None or not hasattr(owner, name):
            continue
        original = owner.__dict__[name] if isinstance(owner, type) else getattr(owner, name)
        setattr(owner, name, wrap(category, original))

    from benchseq.runner import start_run

    plan = str(root / "plans" / "demo.toml")
    with tempfile.TemporaryDirectory() as folder:
        out = str(Path(folder) / "demo.h5")
        start_run(plan, None, out, force=True, seed=seed)  # cold: caches, first imports
        for key in totals:
            totals[key] = 0.0
        start = time.perf_counter()
        outcome, _ = start_run(plan, None, out, force=True, seed=seed)
        wall = time.perf_counter() - start
    print(
        json.dumps(
            {
                "wall": wall,
                "points": outcome.measured,
                "bench_time": outcome.bench_time,
                "split": totals,
            }
        )
    )


def _python(tree: Path) -> str:
    venv = tree / ".venv" / "bin" / "python"
    return str(venv) if venv.exists() else sys.executable


def _cli_wall(tree: Path, seed: int, keep: Path | None = None) -> float:
    with tempfile.TemporaryDirectory() as folder:
        out = keep if keep is not None else Path(folder) / "demo.h5"
        command = [
            _python(tree),
            "-m",
            "benchseq",
            "run",
            str(tree / "plans" / "demo.toml"),
            "--out",
            str(out),
            "--force",
            "--seed",
            str(seed),
        ]
        env = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS",)}
        start = time.perf_counter()
        done = subprocess.run(
            command, cwd=tree, env=env, capture_output=True, text=True, timeout=600
        )
        wall = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(f"{tree}: benchseq run exited {done.returncode}: {done.stderr[-2000:]}")
    return wall


def _in_process(tree: Path, seed: int, one_thread: bool) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS",)}
    if one_thread:
        env["OPENBLAS_NUM_THREADS"] = "1"
    command = [_python(tree), str(HERE), "--child", "--root", str(tree), "--seed", str(seed)]
    done = subprocess.run(command, cwd=tree, env=env, capture_output=True, text=True, timeout=900)
    if done.returncode != 0:
        raise SystemExit(f"{tree}: in-process demo failed: {done.stderr[-2000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def _sets_one_thread(tree: Path) -> bool:
    """Whether that checkout's command line loads numpy with one BLAS thread."""
    cli = tree / "benchseq" / "cli.py"
    return cli.exists() and "def one_blas_thread" in cli.read_text(encoding="utf-8")


def _load(when: str) -> None:
    one, five, fifteen = os.getloadavg()
    print(f"load average {when}: {one:.2f} {five:.2f} {fifteen:.2f} ({os.cpu_count()} CPUs)")


def _agreement(trees: dict[str, Path], seeds: int) -> None:
    import numpy as np
    import pandas as pd

    from benchseq.store import read_results, read_truth

    frames = []
    with tempfile.TemporaryDirectory() as folder:
        for seed in range(seeds):
            both = {}
            for name, tree in trees.items():
                out = Path(folder) / f"{name}-{seed}.h5"
                _cli_wall(tree, seed, keep=out)
                both[name] = read_results(out).merge(
                    read_truth(out), on="point_id", suffixes=("", "_true")
                )
            merged = both["this"].merge(both["base"], on="point_id", suffixes=("", "_base"))
            merged["seed"] = seed
            frames.append(merged)
    frame = pd.concat(frames, ignore_index=True)
    values = frame[~frame["is_bound"] & ~frame["is_bound_base"]]
    d = values["rejection_db"] - values["rejection_db_base"]
    u, ub = values["uncertainty_db"], values["uncertainty_db_base"]
    uc = np.sqrt(u**2 + ub**2)
    print(
        f"\nagreement over seeds 0–{seeds - 1}: {len(frame)} points, {len(values)} values in both"
    )
    print(f"  |d|/u   max {np.max(np.abs(d / u)):.2f}, beyond 4: {int(np.sum(np.abs(d / u) > 4))}")
    print(
        f"  |d|/u_c max {np.max(np.abs(d / uc)):.2f}, beyond 2: {int(np.sum(np.abs(d / uc) > 2))}"
        f" (5 % of {len(values)} expected ≈ {0.05 * len(values):.1f}), beyond 4: "
        f"{int(np.sum(np.abs(d / uc) > 4))}; rms(d/u_c) {np.sqrt(np.mean((d / uc) ** 2)):.2f}"
    )
    print(f"  median u: this {np.median(u):.4f} dB, base {np.median(ub):.4f} dB")
    changed = int(np.sum(frame["is_bound"] != frame["is_bound_base"]))
    print(f"  points a value in one and a bound in the other: {changed}")
    for name, suffix in (("this", ""), ("base", "_base")):
        val = frame[~frame["is_bound" + suffix]]
        z = (val["rejection_db" + suffix] - val["rejection_db_true" + suffix]) / val[
            "uncertainty_db" + suffix
        ]
        bounds = frame[frame["is_bound" + suffix]]
        le = np.mean(bounds["bound_db" + suffix] <= bounds["rejection_db_true" + suffix])
        print(
            f"  {name}: truth within ±1.96u {100 * np.mean(np.abs(z) <= 1.96):.1f} % of "
            f"{len(val)} values, beyond 4u {int(np.sum(np.abs(z) > 4))}, rms(err/u) "
            f"{np.sqrt(np.mean(z**2)):.2f}; bounds ≤ truth "
            + (f"{100 * le:.0f} % of {len(bounds)}" if len(bounds) else "(none)")
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--base", default="/work/wt/base14", help="checkout to compare with")
    parser.add_argument("--repeats", type=int, default=3, help="runs of each kind per checkout")
    parser.add_argument("--seed", type=int, default=0, help="simulated bench seed")
    parser.add_argument(
        "--agreement", type=int, default=0, help="compare result files on seeds 0…N−1 instead"
    )
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--root", default=str(ROOT), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        _child(Path(args.root), args.seed)
        return
    base = Path(args.base).resolve()
    trees = {"this": ROOT, "base": base}
    if args.agreement:
        _agreement(trees, args.agreement)
        return
    threads = {name: _sets_one_thread(tree) for name, tree in trees.items()}
    _load("at start")
    print(f"this: {ROOT} (one BLAS thread: {threads['this']})")
    print(f"base: {base} (one BLAS thread: {threads['base']})")
    cli: dict[str, list[float]] = {name: [] for name in trees}
    inproc: dict[str, list[dict]] = {name: [] for name in trees}
    started = time.perf_counter()
    for k in range(max(1, args.repeats)):
        order = ("base", "this") if k % 2 == 0 else ("this", "base")
        for name in order:
            cli[name].append(_cli_wall(trees[name], args.seed))
            inproc[name].append(_in_process(trees[name], args.seed, threads[name]))
        print(
            f"repeat {k + 1}: command line this {cli['this'][-1]:.2f} s, base "
            f"{cli['base'][-1]:.2f} s; in process this {inproc['this'][-1]['wall']:.2f} s, "
            f"base {inproc['base'][-1]['wall']:.2f} s",
            flush=True,
        )
    med = statistics.median
    print(f"\nmedians of {args.repeats} interleaved runs (seed {args.seed}):")
    print(f"{'':<44}{'this':>10}{'base':>10}{'this/base':>11}")
    a, b = med(cli["this"]), med(cli["base"])
    print(f"{'`benchseq run plans/demo.toml` wall (s)':<44}{a:>10.2f}{b:>10.2f}{a / b:>11.3f}")
    a, b = med(r["wall"] for r in inproc["this"]), med(r["wall"] for r in inproc["base"])
    print(f"{'demo run in process, warm, wall (s)':<44}{a:>10.2f}{b:>10.2f}{a / b:>11.3f}")
    for name in trees:
        runs = inproc[name]
        points = runs[0]["points"]
        bench = med(r["bench_time"] for r in runs)
        print(
            f"\n{name}: {points} points, simulated bench time {bench:.2f} s; in-process wall "
            "per point (median ms):"
        )
        parts = {
            c: med(1e3 * r["split"][c] / r["points"] for r in runs) for c in (SYNTH, FITS, STORE)
        }
        wall = med(1e3 * r["wall"] / r["points"] for r in runs)
        rest = med(1e3 * (r["wall"] - sum(r["split"].values())) / r["points"] for r in runs)
        for c, v in parts.items():
            print(f"  {c:<38}{v:9.1f}")
        print(f"  {'rest (SCPI, drivers, sequencer)':<38}{rest:9.1f}")
        print(f"  {'wall':<38}{wall:9.1f}")
        series = med(1e3 * (r["wall"] - r["split"][SYNTH]) / r["points"] for r in runs)
        print(
            f"  software in series with a real bench (wall without the simulator's own "
            f"work): {series:.1f} ms/point"
        )
    print(f"\nscript wall time {time.perf_counter() - started:.0f} s")
    _load("at end")


if __name__ == "__main__":
    main()
