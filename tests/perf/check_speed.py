"""How long `check` takes and how much memory it holds, at 1 k, 100 k and 1 M points, beside
an earlier version of the program; and the feasibility model alone on 10,000 points (prints
its figures).

Run: python tests/perf/check_speed.py [--base WORKTREE] [--sizes 1000,100000,1000000]

Each size is checked by `benchseq check PLAN --bench BENCH --json` in a fresh Python process
(this worktree's, and the base worktree's own .venv when --base is given), which reports the
seconds from importing the command line to its exit and its peak resident memory (VmHWM of
/proc/self/status); every process has a time limit. The plan steps 5 DC levels x 4 loads x
5 ripple levels x n/100 frequencies (10 Hz - 1 MHz, log spaced), with linearity repeats at
the two ends and a floor capture at 10 Hz; the bench is the embedded simulated one with an
electronic load.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from benchseq.bench import embedded_bench_text, load_bench
from benchseq.injector import InjectorModel
from benchseq.plan import DeviceLimits

HERE = Path(__file__).resolve().parents[2]
LIMIT_S = 600.0  # per checked size and version
SIZES = (1_000, 100_000, 1_000_000)

CHILD = r"""
import contextlib, json, os, sys, time
start = time.perf_counter()
from benchseq.cli import main
with open(os.devnull, "w") as sink, contextlib.redirect_stdout(sink):
    code = main(["check", sys.argv[1], "--bench", sys.argv[2], "--json"])
seconds = time.perf_counter() - start
status = open("/proc/self/status").read()
peak_kib = int(status.split("VmHWM:")[1].split()[0])
print(json.dumps({"seconds": seconds, "peak_mib": peak_kib / 1024, "exit": code}))
"""


def write_case(folder: Path, points: int) -> tuple[Path, Path]:
    """A plan of about ``points`` points (5 DC x 4 loads x 5 ripples x points/100
    frequencies) and the simulated bench with a load."""
    folder.mkdir(parents=True, exist_ok=True)
    bench = folder / "bench.toml"
    bench.write_text(
        embedded_bench_text()
        + '\n[load]\naddress = "SIM::load"\nprofile = "scpi-load"\nmax_current = "500 mA"\n'
    )
    frequencies = max(points // 100, 2)
    plan = folder / "plan.toml"
    plan.write_text(
        f"""title = "FV-33 check at {points:,} points"
[device]
name = "FV-33 regulator evaluation board"
absolute_max = "6 V"
min_operating = "3.6 V"
max_load = "300 mA"
[sweep]
dc = {{ from = "4 V", to = "5 V", points = 5 }}
ripple = ["10 mVpp", "50 mVpp", "100 mVpp", "200 mVpp", "1 Vpp"]
load = ["0 mA", "50 mA", "100 mA", "250 mA"]
frequency = {{ from = "10 Hz", to = "1 MHz", per_decade = {(frequencies - 1) / 5!r} }}
[settle]
after_operating_point = "0.5 s"
[linearity]
at = ["10 Hz", "1 MHz"]
[floor]
at = ["10 Hz"]
"""
    )
    return plan, bench


def run_check(python: Path, plan: Path, bench: Path) -> dict:
    """One `check` in a fresh process: seconds, peak MiB, exit code (or the failure)."""
    try:
        done = subprocess.run(
            [str(python), "-c", CHILD, str(plan), str(bench)],
            cwd=plan.parent,
            capture_output=True,
            text=True,
            timeout=LIMIT_S,
        )
    except subprocess.TimeoutExpired:
        return {"error": f"over {LIMIT_S:.0f} s"}
    lines = done.stdout.strip().splitlines()
    if done.returncode != 0 or not lines:
        return {"error": (done.stderr.strip().splitlines() or ["failed"])[-1][:60]}
    return json.loads(lines[-1])


def cell(result: dict) -> str:
    if "error" in result:
        return f"{result['error']:>22}"
    return f"{result['seconds']:7.2f} s {result['peak_mib']:7.1f} MiB"


def compare(base: Path | None, sizes: tuple[int, ...]) -> None:
    now_python = HERE / ".venv" / "bin" / "python"
    if not now_python.exists():
        now_python = Path(sys.executable)
    versions = [("now", now_python)]
    if base is not None:
        versions.append((f"base ({base.name})", base / ".venv" / "bin" / "python"))
    print("`benchseq check --json`, one fresh process per cell (import to exit; peak VmHWM)")
    print(f"{'points':>10} " + " ".join(f"{name:>22}" for name, _ in versions) + "   ratio")
    with tempfile.TemporaryDirectory() as tmp:
        for points in sizes:
            plan, bench = write_case(Path(tmp) / str(points), points)
            results = [run_check(python, plan, bench) for _, python in versions]
            line = f"{points:>10,} " + " ".join(cell(r) for r in results)
            if len(results) == 2 and not any("error" in r for r in results):
                line += (
                    f"   time x{results[0]['seconds'] / results[1]['seconds']:.2f}, "
                    f"memory x{results[0]['peak_mib'] / results[1]['peak_mib']:.2f}"
                )
            print(line, flush=True)


def feasibility_alone() -> None:
    bench = load_bench(None)
    model = InjectorModel(bench.injector, bench.generator, bench.pin)
    device = DeviceLimits(absolute_max_v=6.0, min_operating_v=3.6, max_load_current=0.5)
    rng = np.random.default_rng(1)
    n = 10_000
    frequency = 10 ** rng.uniform(1, 7, n)
    ripple = rng.uniform(0.005, 0.5, n)
    dc = rng.uniform(3.5, 6.0, n)
    load = rng.uniform(0.0, 0.3, n)
    model.feasibility(frequency[:10], ripple[:10], dc[:10], load[:10], device=device)  # warm-up
    times = []
    for _ in range(20):
        start = time.perf_counter()
        result = model.feasibility(frequency, ripple, dc, load, device=device)
        times.append(time.perf_counter() - start)
    start = time.perf_counter()
    corners = model.corners()
    corners_s = time.perf_counter() - start
    print(
        f"feasibility of {n} points (all frequencies distinct): median "
        f"{1e3 * np.median(times):.2f} ms, best {1e3 * min(times):.2f} ms, "
        f"worst {1e3 * max(times):.2f} ms (20 runs)"
    )
    print(
        f"verdicts: ok {int(result.ok.sum())}, marginal {int(result.marginal.sum())}, "
        f"refused {int(result.refused.sum())}"
    )
    print(
        f"corners(): {1e3 * corners_s:.1f} ms (usable band {corners.usable_band[0]:.3g}"
        f"-{corners.usable_band[1]:.3g} Hz)"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--base", type=Path, help="an earlier worktree with its own .venv")
    parser.add_argument("--sizes", default=",".join(str(s) for s in SIZES))
    args = parser.parse_args()
    feasibility_alone()
    compare(args.base, tuple(int(s) for s in args.sizes.split(",")))


if __name__ == "__main__":
    main()
