"""Durability figures of the results store (a benchmark script, not a test).

Prints: the cost of making one point durable (journal append + fsync) and of one HDF5
consolidation (copy + append + fsync + rename) at 1, 100, 1,000 and 10,000 points; a
SIGKILL loop (random moments and just after appends) with its survival tally; memory
while writing 10,000 points with the default consolidation policy.

    python tests/perf/durability.py [--kills 50] [--points 10000] [--dir /path/on/target/disk]

Run it on the disk the results will live on: fsync cost is the disk's, not the code's.
"""

from __future__ import annotations

import argparse
import os
import random
import resource
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import textwrap
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

from benchseq.store import Column, Consolidation, RunWriter, read_results

KINDS = ["f8"] * 24 + ["c16"] * 4 + ["i8"] * 4 + ["bool", "str", "str", "f8"]
COLUMNS = [Column("point_id", "i8", "", "index")] + [
    Column(f"c{n}_{kind}", kind, "V", "benchmark column") for n, kind in enumerate(KINDS)
]
NEVER = Consolidation(min_interval_s=1e12)


def row(i: int) -> dict:
    values: dict = {"point_id": i}
    for column in COLUMNS[1:]:
        values[column.name] = {
            "f8": 1e-3 * i + 0.1,
            "c16": complex(i, -i) * 1e-4,
            "i8": i * 3,
            "bool": bool(i % 2),
            "str": "bound model_mismatch" if i % 3 == 0 else "",
        }[column.kind]
    return values


def rss_mb() -> float:
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def per_point_costs(folder: Path, sizes: list[int]) -> None:
    print("== cost of one durable point (median of 20 appends / 5 consolidations at each size)")
    path = folder / "cost.h5"
    writer = RunWriter.create(path, {"run_id": "cost"}, COLUMNS, policy=NEVER)
    done = 0
    print(
        f"{'points':>8} {'append+fsync ms':>16} {'consolidate ms':>15} {'rebuild ms':>11} {'file kB':>8}"
    )
    for size in sizes:
        while done < size:
            writer.append(done, row(done))
            done += 1
        writer._consolidate()
        appends, merges = [], []
        for _ in range(20):
            t = time.perf_counter()
            writer.append(done, row(done))
            appends.append(time.perf_counter() - t)
            done += 1
        for _ in range(5):
            writer.append(done, row(done))
            done += 1
            t = time.perf_counter()
            writer._consolidate()
            merges.append(time.perf_counter() - t)
        writer._h5_valid = False  # a full rebuild from the journal, for comparison
        t = time.perf_counter()
        writer._consolidate()
        rebuild = time.perf_counter() - t
        print(
            f"{size:>8} {1e3 * statistics.median(appends):>16.2f} "
            f"{1e3 * statistics.median(merges):>15.2f} {1e3 * rebuild:>11.1f} "
            f"{path.stat().st_size / 1024:>8.0f}"
        )
    writer.finish("complete")


def memory_and_policy(folder: Path, points: int) -> None:
    print(
        f"== writing {points} points with the default policy (HDF5 updates within 5 % of "
        "the time and 1.5 x the journal's cost)"
    )
    path = folder / "memory.h5"
    writer = RunWriter.create(path, {"run_id": "memory"}, COLUMNS)
    merges, merge_time = 0, 0.0
    original = writer._consolidate

    def counted(*args: Any, **kwargs: Any) -> None:
        nonlocal merges, merge_time
        merges += 1
        t = time.perf_counter()
        original(*args, **kwargs)
        merge_time += time.perf_counter() - t

    writer._consolidate = counted  # type: ignore[method-assign]
    start = time.perf_counter()
    marks = []
    for i in range(points):
        writer.append(i, row(i))
        if (i + 1) % max(1, points // 10) == 0:
            marks.append((i + 1, rss_mb()))
    elapsed = time.perf_counter() - start
    writer.finish("complete")
    print("RSS MB after n points: " + ", ".join(f"{n}: {mb:.1f}" for n, mb in marks))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak RSS of this process so far {peak:.1f} MB")
    print(
        f"{points} points in {elapsed:.1f} s ({1e3 * elapsed / points:.2f} ms/point), "
        f"{merges} consolidations during the run taking {merge_time:.2f} s; file {path.stat().st_size / 1e6:.1f} MB; "
        f"read back {len(read_results(path))} rows"
    )


WRITER = textwrap.dedent(
    """
    import sys
    from benchseq.store import Column, Consolidation, RunWriter
    path, total, mode, policy = sys.argv[1], int(sys.argv[2]), sys.argv[3], sys.argv[4]
    cols = [Column("point_id", "i8", "", ""), Column("value", "f8", "V", ""),
            Column("phasor", "c16", "V", ""), Column("flags", "str", "", "")]
    chosen = Consolidation(every_point=True) if policy == "every" else Consolidation()
    w = (RunWriter.create(path, {"run_id": "k"}, cols, policy=chosen) if mode == "create"
         else RunWriter.resume(path, policy=chosen))
    print("ready", flush=True)
    for i in range(total):
        if i not in w.stored_ids:
            w.append(i, {"point_id": i, "value": i * 0.5, "phasor": complex(i, 1), "flags": str(i)})
            print("stored", i, flush=True)
    w.finish("complete")
    """
)


def _collect(stream, reported: set[int]) -> None:
    for line in stream:
        if line.startswith("stored"):
            reported.add(int(line.split()[1]))


def kill_loop(folder: Path, kills: int) -> None:
    print(f"== {kills} SIGKILLs of a writer (random moments and just after an append)")
    script = folder / "writer.py"
    script.write_text(WRITER)
    path = folder / "killed.h5"
    total = 100_000
    rng = random.Random(1)
    acknowledged: set[int] = set()
    tally = {"kills": 0, "opened": 0, "lost": 0, "damaged": 0, "duplicates": 0, "resumed": 0}
    for k in range(kills):
        mode = "create" if k == 0 else "resume"
        proc = subprocess.Popen(
            [sys.executable, str(script), str(path), str(total), mode, rng.choice(["every", "auto"])],
            stdout=subprocess.PIPE, text=True,
        )  # fmt: skip
        assert proc.stdout is not None
        if proc.stdout.readline().strip() != "ready":
            proc.kill()
            proc.wait()
            raise SystemExit("writer did not start")
        tally["resumed"] += k > 0
        reported: set[int] = set()
        reader = threading.Thread(target=_collect, args=(proc.stdout, reported), daemon=True)
        reader.start()
        if k % 2 == 0:  # just after the n-th append returned
            stop_after, deadline = rng.randint(1, 40), time.monotonic() + 30
            while len(reported) < stop_after and time.monotonic() < deadline:
                time.sleep(0.0002)
        else:  # a random moment
            time.sleep(rng.uniform(0.0, 0.3))
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        reader.join(timeout=10)
        proc.stdout.close()
        tally["kills"] += 1
        acknowledged |= reported
        frame = read_results(path)
        tally["opened"] += 1
        ids = [int(i) for i in frame["point_id"]]
        tally["duplicates"] += len(ids) - len(set(ids))
        tally["lost"] += len(acknowledged - set(ids))
        ok = np.array(ids) * 0.5 == frame["value"].to_numpy()
        tally["damaged"] += int((~ok).sum())
    print(
        f"acknowledged points: {len(acknowledged)}; "
        + ", ".join(f"{k} {v}" for k, v in tally.items())
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--kills", type=int, default=50)
    parser.add_argument("--points", type=int, default=10_000)
    parser.add_argument("--dir", default=None, help="folder on the disk to measure")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="benchseq-durability-", dir=args.dir))
    try:
        sizes = [s for s in (1, 100, 1_000, 10_000) if s <= args.points]
        per_point_costs(folder, sizes)
        memory_and_policy(folder, args.points)
        kill_loop(folder, args.kills)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
