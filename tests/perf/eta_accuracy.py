"""How honest the bench time estimates are, on the simulated bench (in-process).

For each plan: `check`'s estimate (its range and middle, from the stated assumptions, from
the simulated bench's scenario, and with --like a previous run of the same plan at another
seed) beside the simulated
bench time the run took, and the running estimate's error (bench time left shown against
what the rest of the run then took) once 10 %, 25 % and 50 % of the points are stored.
Plans: plans/demo.toml, plans/overnight.toml (on the demo bench with an electronic load;
``--points N`` runs its first N points in run order, default 102: both ripples at the first
load and DC level; ``--stratified`` spreads them over frequency as tests/perf/run_speed.py
does, which jumps frequency from point to point far more than a run does), a
high-frequency-only plan and a multi-operating-point plan. Also prints each plan's bench
time split by activity (first seed) beside the scenario estimate's breakdown.

    .venv/bin/python tests/perf/eta_accuracy.py [--points 102] [--stratified] [--seeds 0 1]
        [--assumed-prior]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _runbench import BenchClock, run_sweep, stratified
from run_speed import overnight_bench

from benchseq.bench import load_bench
from benchseq.check import check_plan, load_likeness
from benchseq.plan import load_plan, parse_plan
from benchseq.tomlfile import parse_toml_text

ROOT = Path(__file__).resolve().parents[2]
HEAD = """
operator = "T. Varga-Ellison"
[device]
name = "FV-33 regulator evaluation board (3.3 V out, 0.25 V dropout)"
absolute_max = "6 V"
min_operating = "3.8 V"
[capture]
target_uncertainty = "0.2 dB"
max_time = "5 s"
"""
HIGH_ONLY = (
    'title = "FV-33 high frequencies only"\n' + HEAD + '[sweep]\ndc = ["5 V"]\n'
    'ripple = ["100 mVpp"]\nfrequency = { from = "10 kHz", to = "2 MHz", per_decade = 6 }\n'
)
OPERATING = (
    'title = "FV-33 three DC levels, two ripples"\n' + HEAD + "[sweep]\n"
    'dc = ["4.5 V", "5 V", "5.5 V"]\nripple = ["50 mVpp", "100 mVpp"]\n'
    'frequency = { from = "30 Hz", to = "300 kHz", per_decade = 2 }\n'
    '[settle]\nafter_operating_point = "1 s"\n'
)


def _own(text: str, name: str) -> Any:
    parsed, data = parse_toml_text(text, name)
    return parse_plan(data, name, parsed)


class Watch:
    """Attached to the Sequencer: the bench clock at each stored point and the figure shown."""

    def __init__(self, sequencer: Any) -> None:
        self.clock = sequencer.session.clock
        sequencer._eta = sequencer.time_left()  # for the subset restrict() left it
        self.shown: list[tuple[int, int, float, float]] = []  # done, total, clock, left
        self.split = BenchClock(sequencer)
        self.end = float("nan")
        emit = sequencer.emit

        def watch(event: Any) -> None:
            if event.kind == "point_stored":
                self.shown.append(
                    (event.done, event.total, self.clock.now(), event.bench_time_left)
                )
            if event.kind == "finished":
                self.end = self.clock.now()
            emit(event)

        sequencer.emit = watch


def _run(
    plan: Any, bench: Any, folder: Path, name: str, keep: Any, seed: int, assumed: bool = False
) -> tuple[Any, Watch]:
    """One run; ``assumed``: its time left starts from the stated assumptions (as on a
    real bench) instead of the simulated bench's scenario."""
    import benchseq.check as check

    path = folder / f"{name}-{seed}.h5"
    stated = check.scenario_likeness
    if assumed:
        check.scenario_likeness = lambda plan, bench: None  # type: ignore[assignment]
    try:
        outcome, watch = run_sweep(plan, bench, path, keep=keep, seed=seed, attach=Watch)
    finally:
        check.scenario_likeness = stated  # type: ignore[assignment]
    return outcome, watch, path


def _running_errors(watch: Watch) -> dict[int, tuple[float, float]]:
    """At 10, 25 and 50 % of the points: (shown − what the rest took) relative, and in s."""
    out = {}
    total = watch.shown[-1][1] if watch.shown else 0
    for share in (10, 25, 50):
        need = max(1, int(np.ceil(total * share / 100)))
        hit = next((s for s in watch.shown if s[0] >= need), None)
        if hit is None:
            continue
        actual = watch.end - hit[2]
        out[share] = (
            (hit[3] - actual) / actual if actual > 0 else float("nan"),
            hit[3] - actual,
        )
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--points", type=int, default=102, help="overnight points to run (832 = all)"
    )
    parser.add_argument(
        "--stratified",
        action="store_true",
        help="spread the overnight points over frequency (as run_speed.py) instead of "
        "the first ones in run order (whose frequency rises point to point, as in a run)",
    )
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1])
    parser.add_argument(
        "--assumed-prior",
        action="store_true",
        help="the running estimate starts from the stated assumptions, as on a real bench "
        "(default: from the simulated bench's scenario, as a run on it does)",
    )
    args = parser.parse_args()
    print(f"load average: {' '.join(f'{x:.2f}' for x in __import__('os').getloadavg())}")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        demo_bench = load_bench(None)
        overnight = load_plan(ROOT / "plans" / "overnight.toml")
        everything = len(overnight.expand())
        keep = (
            stratified(overnight.expand().frequency, args.points)
            if args.stratified
            else np.arange(min(args.points, everything))
        )
        cases = [
            ("demo", load_plan(ROOT / "plans" / "demo.toml"), demo_bench, None),
            (f"overnight ({keep.size} pts)", overnight,
             overnight_bench(folder), keep),
            ("high-frequency only", _own(HIGH_ONLY, "high.toml"), demo_bench, None),
            ("three DC x two ripples", _own(OPERATING, "operating.toml"), demo_bench, None),
        ]  # fmt: skip
        print(
            f"{'plan':28s} {'seed':>4s} {'bench s':>8s} {'assumed low–high (mid)':>24s} {'mid err':>8s}"
            f" {'scenario low–high (mid)':>24s} {'mid err':>8s}"
            f" {'--like low–high (mid)':>24s} {'mid err':>8s}  running err @10/25/50 %"
        )
        for name, plan, bench, subset in cases:
            previous = None
            for seed in args.seeds:
                wall = time.perf_counter()
                outcome, watch, path = _run(
                    plan, bench, folder, name.split()[0], subset, seed, args.assumed_prior
                )
                took = outcome.bench_time
                report = check_plan(_subset_plan(plan, subset), bench, scenario=False)
                lo, hi = report.estimated_range_s
                mid = report.estimated_time_s
                stated = check_plan(_subset_plan(plan, subset), bench)
                slo, shi = stated.estimated_range_s
                smid = stated.estimated_time_s
                like_text = "—"
                like_err = "—"
                if previous is not None:
                    liked = check_plan(
                        _subset_plan(plan, subset), bench, load_likeness(previous, plan, bench)
                    )
                    llo, lhi = liked.estimated_range_s
                    like_text = f"{llo:.1f}–{lhi:.1f} ({liked.estimated_time_s:.1f})"
                    like_text = (
                        like_text if len(like_text) <= 24 else f"({liked.estimated_time_s:.1f})"
                    )
                    like_err = f"{(liked.estimated_time_s / took - 1) * 100:+.0f} %"
                running = _running_errors(watch)
                print(
                    f"{name:28s} {seed:4d} {took:8.1f} "
                    f"{f'{lo:.1f}–{hi:.1f} ({mid:.1f})':>24s} {(mid / took - 1) * 100:+7.0f} %"
                    f" {f'{slo:.1f}–{shi:.1f} ({smid:.1f})':>24s} {(smid / took - 1) * 100:+7.0f} %"
                    f" {like_text:>24s} {like_err:>8s}  "
                    + " / ".join(
                        f"{running[s][0] * 100:+.0f} % ({running[s][1]:+.1f} s)"
                        for s in (10, 25, 50)
                        if s in running
                    )
                    + f"   [{time.perf_counter() - wall:.0f} s wall]"
                )
                if seed == args.seeds[0]:
                    split = {k: round(v, 2) for k, v in watch.split.totals().items() if v}
                    outside = {k: round(v, 2) for k, v in watch.split.outside.items()}
                    n = len(watch.shown)
                    print(
                        f"  split by activity over {n} points: {split}; outside points: {outside};"
                        f" scenario's estimate: {_rounded(stated.range_breakdown)}"
                    )
                previous = path


def _rounded(ends: dict[str, dict[str, float]]) -> str:
    """check's breakdown, low end – high end per activity (s), non-zero parts only."""
    low, high = ends.get("low", {}), ends.get("high", {})
    return ", ".join(
        f"{k} {low[k]:.2f}" + (f"–{high[k]:.2f}" if abs(high[k] - low[k]) > 5e-3 else "")
        for k in low
        if low[k] or high.get(k)
    )


def _subset_plan(plan: Any, keep: Any) -> Any:
    """The plan restricted to ``keep`` for the check (its expand() and point_values() give
    those points)."""
    if keep is None:
        return plan
    from _runbench import subset_sweep

    sweep = subset_sweep(plan.expand(), keep)

    class Subset:
        def __getattr__(self, name: str) -> Any:
            return getattr(plan, name)

        def expand(self) -> Any:
            return sweep

        def point_values(self) -> Any:  # what check expands since it works over arrays
            from benchseq.plan import PointValues

            return PointValues(
                frequency=sweep.frequency,
                ripple_peak=sweep.ripple_peak,
                dc_level=sweep.dc_level,
                load_current=sweep.load_current,
            )

        @property
        def point_count(self) -> int:
            return len(sweep)

    return Subset()


if __name__ == "__main__":
    main()
