"""Coverage of the stated uncertainty against the simulator's truth (a script: prints figures).

    python tests/perf/coverage.py [--seeds 6] [--cases demo,demo-cal,amplifier,buffer]
                                  [--dir /tmp/coverage]

For each case, runs the plan on the simulated bench over several seeds and pools, per
decade of frequency:
  values  points reported as a value; "in 1.96u": the share whose truth lies within
          ±1.96u (u the stated standard uncertainty: about 95 % for a normal result,
          JCGM 100 §G.3), "> 4u": how many lie beyond 4u, rms(err/u) (about 1 when u is
          right, well under 1 when a Type B term is larger than the error it covers);
  bounds  points reported as a lower bound; "≤ truth": the share at or below the truth
          (the bound rule is one-sided 95 %), and the median bound minus truth.
Cases: demo (plans/demo.toml, no calibration), demo-cal (the same after a channel-match
calibration of the bench, made once), amplifier (the amplifier scenario, two ripple
levels), buffer (the reference-buffer scenario, true rejection past 110 dB below 10 kHz).
The simulated bench runs on a virtual clock; the wall time printed is software time.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[2]
PLANS = ROOT / "plans"

AMPLIFIER_PLAN = """
title = "AB-10 amplifier board: rejection at 5 V, two ripple levels"
[device]
name = "AB-10 gain-of-10 amplifier board (simulated)"
absolute_max = "5.5 V"
min_operating = "3 V"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp", "10 mVpp"]
frequency = { from = "20 Hz", to = "200 kHz", per_decade = 2 }
[settle]
after_operating_point = "0.5 s"
[capture]
max_time = "2 s"
target_uncertainty = "0.1 dB"
"""

BUFFER_PLAN = """
title = "QB-1 reference buffer: rejection near the ceiling"
[device]
name = "QB-1 unity-gain reference buffer (simulated)"
absolute_max = "5.5 V"
min_operating = "3.5 V"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp"]
frequency = { from = "100 Hz", to = "1 MHz", per_decade = 4 }
[settle]
after_operating_point = "0.5 s"
[capture]
max_time = "2 s"
target_uncertainty = "0.2 dB"
"""

BENCHES = {"demo": None, "amplifier": "sim:amplifier", "buffer": "sim:buffer"}


def write_plan(folder: Path, name: str) -> Path:
    if name == "demo":
        return PLANS / "demo.toml"
    path = folder / f"{name}.toml"
    path.write_text(AMPLIFIER_PLAN if name == "amplifier" else BUFFER_PLAN, encoding="utf-8")
    return path


def calibrated_bench(folder: Path) -> Path:
    """The embedded demo bench naming a channel-match calibration made on it (seed 101)."""
    from benchseq import calibrate
    from benchseq.bench import embedded_bench_text

    text = embedded_bench_text("demo").replace("\n[scope]\n", '\n[scope]\ncalibration = "cal.h5"\n')
    bench = folder / "cal-bench.toml"
    bench.write_text(text, encoding="utf-8")
    if not (folder / "cal.h5").exists():
        calibrate.run_calibration(None, bench, None, seed=101)
    return bench


def run_case(case: str, seed: int, folder: Path) -> pd.DataFrame:
    from benchseq.runner import start_run
    from benchseq.store import read_results, read_truth

    scenario = "demo" if case.startswith("demo") else case
    plan = write_plan(folder, scenario)
    bench = str(calibrated_bench(folder)) if case == "demo-cal" else BENCHES[scenario]
    out = folder / f"{case}-{seed}.h5"
    if out.exists():
        out.unlink()
    outcome, path = start_run(str(plan), bench, str(out), seed=seed)
    if outcome.status != "complete":
        raise SystemExit(f"{case} seed {seed}: run {outcome.status}: {outcome.reason}")
    frame = read_results(path).merge(read_truth(path), on="point_id", suffixes=("", "_true"))
    frame["seed"] = seed
    return frame


def band_of(frequency: float) -> str:
    low = 10 ** math.floor(math.log10(frequency) + 1e-9)
    return f"{_hz(low)}–{_hz(10 * low)}"


def _hz(f: float) -> str:
    for scale, unit in ((1e6, "MHz"), (1e3, "kHz"), (1.0, "Hz")):
        if f >= scale:
            return f"{f / scale:g} {unit}"
    return f"{f:g} Hz"


def summarise(frame: pd.DataFrame) -> list[dict[str, Any]]:
    frame = frame.copy()
    frame["band"] = [band_of(f) for f in frame["frequency_planned"]]
    frame["decade"] = np.floor(np.log10(frame["frequency_planned"]) + 1e-9)
    rows = []
    groups = [(band, part) for _, (band, part) in _ordered(frame)]
    groups.append(("all", frame))
    for band, part in groups:
        values = part[~part["is_bound"]]
        bounds = part[part["is_bound"]]
        z = (values["rejection_db"] - values["rejection_db_true"]) / values["uncertainty_db"]
        rows.append(
            {
                "band": band,
                "values": len(values),
                "in_1.96u": float(np.mean(np.abs(z) <= 1.96)) if len(values) else math.nan,
                "beyond_4u": int(np.sum(np.abs(z) > 4)),
                "rms_err_u": float(np.sqrt(np.mean(z**2))) if len(values) else math.nan,
                "median_u_db": float(np.median(values["uncertainty_db"]))
                if len(values)
                else math.nan,
                "bounds": len(bounds),
                "bound_le_truth": float(np.mean(bounds["bound_db"] <= bounds["rejection_db_true"]))
                if len(bounds)
                else math.nan,
                "median_bound_gap_db": float(
                    np.median(bounds["rejection_db_true"] - bounds["bound_db"])
                )
                if len(bounds)
                else math.nan,
            }
        )
    return rows


def _ordered(frame: pd.DataFrame) -> list[tuple[float, tuple[str, pd.DataFrame]]]:
    out = []
    for decade, part in frame.groupby("decade"):
        out.append((float(decade), (str(part["band"].iloc[0]), part)))
    return sorted(out, key=lambda item: item[0])


def _fmt(value: float, spec: str) -> str:
    return "—" if isinstance(value, float) and math.isnan(value) else format(value, spec)


def print_table(case: str, rows: list[dict[str, Any]], seeds: int, seconds: float) -> None:
    print(f"\n{case}: {seeds} seeds, {seconds:.0f} s wall")
    print(
        f"  {'band':<18}{'values':>7}{'in 1.96u':>10}{'> 4u':>6}{'rms(err/u)':>12}"
        f"{'median u':>10}{'bounds':>8}{'≤ truth':>9}{'truth−bound':>13}"
    )
    for r in rows:
        print(
            f"  {r['band']:<18}{r['values']:>7}{_fmt(100 * r['in_1.96u'], '9.1f')}%"
            f"{r['beyond_4u']:>6}{_fmt(r['rms_err_u'], '12.2f')}"
            f"{_fmt(r['median_u_db'], '8.3f')} dB{r['bounds']:>6}"
            f"{_fmt(100 * r['bound_le_truth'], '8.0f')}%{_fmt(r['median_bound_gap_db'], '10.1f')} dB"
        )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, default=6)
    parser.add_argument("--first-seed", type=int, default=1)
    parser.add_argument("--cases", default="demo,demo-cal,amplifier,buffer")
    parser.add_argument("--dir", default=None)
    args = parser.parse_args(argv)
    folder = Path(args.dir or tempfile.mkdtemp(prefix="coverage-"))
    folder.mkdir(parents=True, exist_ok=True)
    print(f"results in {folder}")
    seeds = range(args.first_seed, args.first_seed + max(1, min(args.seeds, 50)))
    for case in [c.strip() for c in args.cases.split(",") if c.strip()]:
        if case not in ("demo", "demo-cal", "amplifier", "buffer"):
            print(f"unknown case {case!r}", file=sys.stderr)
            return 2
        start = time.perf_counter()
        frames = [run_case(case, seed, folder) for seed in seeds]
        print_table(case, summarise(pd.concat(frames)), len(seeds), time.perf_counter() - start)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
