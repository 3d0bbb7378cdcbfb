"""Benchmarks of the run on the embedded simulated bench (a script, not a test): prints figures.

    python tests/perf/run_speed.py [--points 96] [--parts abcde] [--full] [--dir /tmp]
                                     [--baseline OTHER/.venv/bin/python]

(a) the demo sweep (plans/demo.toml): wall time per point, split into record synthesis,
    circuit solve, analysis, storage and the rest (time.perf_counter around the package's
    functions, nothing edited). The simulated bench runs on a virtual clock, so all of the
    wall time is software.
(b) plans/overnight.toml: the check's planned bench time and the sequencer's simulated bench
    time (on --points points, a stratified subset; 832 = all) against a lower bound from the
    simulator's truth (settle + least capture meeting the target by the Cramér–Rao bound of
    a known-frequency sine fit) and against a fixed-capture sequencer; what the sequencer
    spends that the bound does not (ranging, re-ranging, trims, extensions) is counted apart.
(c) the cost of making one point durable under each consolidation policy (HDF5 at finish
    only, the default with points back to back and at 2 s of bench time per point on a
    stepped clock, an update after every point): per point (mean, median, p95) and as the
    ratio of the mean to a bare write + fsync of the same record bytes; with --baseline
    PYTHON (another worktree's venv) that code is measured too, alternating policy by
    policy, and both are printed side by side.
(d) memory of sequencer + store against points (500, 1000, 2000; --full adds 10,000), each
    size in a fresh subprocess with a timeout: peak RSS (VmHWM), RSS during the run,
    tracemalloc peak, and journal/HDF5 bytes per point.
(e) plans/overnight.toml under the two settle rules side by side (settle.rule =
    "time-constants" with 6 time constants, as the plan was written before, and the default
    "transient" rule): the check's planned bench time, the sequencer's bench time per decade
    on the same --points points, and coverage of the simulator's truth per decade.

Wall-time figures mean something only on a quiet machine: the load average is printed at
the start and the end.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _runbench as rb

ROOT = Path(__file__).resolve().parents[2]
PLANS = ROOT / "plans"
FULL_SIZE = 10_000


def load_line(when: str) -> None:
    one, five, fifteen = os.getloadavg()
    print(f"load average {when}: {one:.2f} {five:.2f} {fifteen:.2f} ({os.cpu_count()} CPUs)")


def ms(seconds: float) -> str:
    return f"{1e3 * seconds:9.1f}"


# -- (a) the demo sweep ------------------------------------------------------------------------
def part_a(folder: Path, repeats: int) -> None:
    from benchseq.runner import start_run

    print("\n== (a) demo sweep (plans/demo.toml) on the embedded simulated bench")
    profiler = rb.Profiler()
    rb.install_run_profiler(profiler)
    runs = []
    try:
        for k in range(repeats):
            profiler.reset()
            out = folder / f"demo-{k}.h5"
            start = time.perf_counter()
            outcome, _ = start_run(str(PLANS / "demo.toml"), None, str(out), force=True, seed=0)
            wall = time.perf_counter() - start
            runs.append((wall, outcome, dict(profiler.totals), dict(profiler.calls)))
    finally:
        profiler.undo()
    points = runs[0][1].measured
    print(
        f"{points} points, status {runs[0][1].status}, simulated bench time "
        f"{runs[0][1].bench_time:.2f} s ({runs[0][1].bench_time / points:.2f} s/point); "
        "in-process (imports done), run k=1 is cold"
    )
    categories = sorted({c for run in runs for c in run[2]}, key=lambda c: -runs[-1][2].get(c, 0))
    head = "".join(f"{'run ' + str(k + 1) + ' ms/pt':>14}" for k in range(len(runs)))
    print(f"{'part of the wall time':<40}{head}{'calls/run':>11}")
    for c in categories:
        cells = "".join(f"{1e3 * run[2].get(c, 0.0) / points:>14.1f}" for run in runs)
        print(f"{c:<40}{cells}{runs[-1][3].get(c, 0):>11}")
    rest = "".join(f"{1e3 * (run[0] - sum(run[2].values())) / points:>14.1f}" for run in runs)
    print(f"{'rest (SCPI, drivers, sequencer, setup)':<40}{rest}")
    total = "".join(f"{1e3 * run[0] / points:>14.1f}" for run in runs)
    print(f"{'wall per point':<40}{total}")
    walls = ", ".join(f"{run[0]:.2f}" for run in runs)
    print(
        f"wall per run: {walls} s; bench time / wall = {runs[-1][1].bench_time / runs[-1][0]:.1f}x"
    )
    storage = sum(v for c, v in runs[-1][2].items() if c.startswith("store"))
    print(
        f"overhead per point beyond the simulated bench (last run): synthesis "
        f"{ms(runs[-1][2].get(rb.SIM_SYNTH, 0) / points)} ms, analysis "
        f"{ms((runs[-1][2].get(rb.FITS, 0) + runs[-1][2].get(rb.PLANNING, 0)) / points)} ms, "
        f"storage {ms(storage / points)} ms"
    )
    last_wall, _, last, _ = runs[-1]
    simulated = sum(last.get(c, 0.0) for c in (rb.SIM_SYNTH, rb.SIM_FORMAT, rb.SIM_PHYSICS))
    print(
        f"the virtual clock costs no wall time, so all {1e3 * last_wall / points:.0f} ms/point is "
        f"software; without the simulator's own work ({1e3 * simulated / points:.0f} ms/point) a "
        f"real bench would add {1e3 * (last_wall - simulated) / points:.0f} ms/point of software "
        "to its bench time (instrument I/O not included)"
    )
    out = folder / "demo-cli.h5"
    command = [
        sys.executable,
        "-m",
        "benchseq",
        "run",
        str(PLANS / "demo.toml"),
        "--out",
        str(out),
        "--force",
        "--json",
    ]
    start = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True, timeout=300, cwd=ROOT)
    wall = time.perf_counter() - start
    print(
        f"fresh process `benchseq run plans/demo.toml` (imports included): {wall:.2f} s, "
        f"exit {done.returncode}"
    )


# -- (b) overnight plan: planned, run and least bench time -----------------------------------------
def _scope_limits() -> Any:
    from benchseq.sim.world import scope_capabilities

    return SimpleNamespace(**scope_capabilities())


def lower_bounds(plan: Any, bench: Any, frequency, dc, ripple) -> list[rb.LeastCapture]:
    """Least capture of each point from the simulator's truth (cached per state)."""
    truth = rb.TruthBench(bench, rb_fill())
    scope = _scope_limits()
    rules = plan.capture
    cache: dict[tuple, rb.LeastCapture] = {}
    out = []
    for f, d, r in zip(frequency, dc, ripple, strict=True):
        key = (float(f), float(d), float(r))
        if key not in cache:
            cache[key] = rb.least_capture(
                truth.point(key[1], key[0], key[2]),
                scope,
                rules.target_uncertainty_db,
                rules.min_cycles,
                rules.max_time_s,
            )
        out.append(cache[key])
    return out


def rb_fill() -> float:
    from benchseq.sequencer import RANGE_FILL

    return RANGE_FILL


def plan_points(plan: Any) -> dict[str, np.ndarray]:
    """Every point a run of ``plan`` measures, as the sequencer lists them: the sweep, then
    the linearity repeats (ids n, n+1, ...); ``floor`` marks the plan's [floor] captures."""
    try:
        from benchseq.sequencer import with_repeats
    except ImportError:  # a sequencer without repeats: the check's list of them
        from benchseq.check import _linearity_points

        sweep = plan.expand()
        rep = _linearity_points(plan, sweep)
        n, m = len(sweep), rep["frequency"].size
        points = {
            "id": np.arange(n + m),
            "frequency": np.concatenate([sweep.frequency, rep["frequency"]]),
            "dc": np.concatenate([sweep.dc_level, rep["dc_level"]]),
            "ripple": np.concatenate([sweep.ripple_peak, rep["ripple_peak"]]),
            "repeat": np.arange(n + m) >= n,
        }
    else:
        sweep, repeat_of, _ = with_repeats(plan)
        points = {
            "id": np.asarray(sweep.index),
            "frequency": np.asarray(sweep.frequency),
            "dc": np.asarray(sweep.dc_level),
            "ripple": np.asarray(sweep.ripple_peak),
            "repeat": np.asarray(repeat_of) >= 0,
        }
    floor = np.zeros(points["id"].size, dtype=bool)
    rules = getattr(plan, "floor", None)
    if rules is not None:
        floor = ~points["repeat"] & (
            True
            if rules.every_point
            else np.isclose(
                points["frequency"][:, None], rules.frequencies[None, :], rtol=1e-3
            ).any(axis=1)
        )
    points["floor"] = floor
    return points


def overnight_bench(folder: Path, ringing: bool = False) -> Any:
    """The embedded demo bench with an electronic load (the overnight plan steps the load):
    sim/scenarios/demo.bench.toml plus a [load] table, written into ``folder``; ``ringing``:
    on the demo scenario with injector_transients switched on."""
    from benchseq.bench import load_bench

    text = (ROOT / "sim" / "scenarios" / "demo.bench.toml").read_text(encoding="utf-8")
    load = '[load]\naddress = "SIM::load"\nprofile = "scpi-load"\nmax_current = "300 mA"\n\n'
    text = text.replace("[injector]", load + "[injector]", 1)
    if ringing:  # the demo scenario with generator changes ringing through the injector
        scenario = (ROOT / "sim" / "scenarios" / "demo.toml").read_text(encoding="utf-8")
        scenario = scenario.replace("injector_transients = false", "injector_transients = true")
        (folder / "ringing-demo.toml").write_text(scenario, encoding="utf-8")
        text = text.replace('simulation = "demo"', 'simulation = "ringing-demo.toml"')
    path = folder / f"{'ringing' if ringing else 'demo'}-with-load.bench.toml"
    path.write_text(text, encoding="utf-8")
    return load_bench(path)


def planned_waits(plan: Any, bench: Any, every: dict[str, np.ndarray]) -> tuple[Any, Any]:
    """Per point (as plan_points lists them, in the sequencer's run order): the settle wait
    after the change from the point before it, and the wait after switching off for a floor
    capture, by the plan's settle rule (benchseq.settling, as the run waits)."""
    from benchseq.injector import InjectorModel
    from benchseq.settling import Settling, previous_in

    model = InjectorModel(bench.injector, bench.generator, bench.pin)
    settling = Settling(plan.settle, model, plan.capture.target_uncertainty_db)
    try:
        from benchseq.sequencer import run_order, with_repeats

        order = run_order(with_repeats(plan)[1])
    except ImportError:
        order = list(range(every["id"].size))
    f, pin = every["frequency"], every["ripple"]
    settle = settling.planned(f, pin, previous_in(order, f.size))
    off_wait = settling.switch_off(f, settling.emf_for(f, pin), pin)
    return np.asarray(settle, dtype=float), np.asarray(off_wait, dtype=float)


def part_b(folder: Path, points: int, noise_trials: int) -> None:
    from benchseq.check import check_plan
    from benchseq.plan import load_plan
    from benchseq.store import read_results, read_truth

    print("\n== (b) plans/overnight.toml: planned bench time against its lower bound")
    plan = load_plan(PLANS / "overnight.toml")
    bench = overnight_bench(folder)
    report = check_plan(plan, bench)
    every = plan_points(plan)
    n_all = every["id"].size
    sweep_pos = np.nonzero(~every["repeat"])[0]
    settle, off_wait = planned_waits(plan, bench, every)
    start = time.perf_counter()
    bound = lower_bounds(plan, bench, every["frequency"], every["dc"], every["ripple"])
    truth_s = time.perf_counter() - start
    cap = np.array([x.bench_time for x in bound])
    floor = every["floor"]
    b = report.time_breakdown
    operating = b.get("dc_ramps", 0.0) + b.get("bias_filter", 0.0)
    unmet = sum(not x.meets_target for x in bound)
    lb_total = settle.sum() + cap.sum() + (off_wait * floor + cap * floor).sum() + operating
    print(
        f"{sweep_pos.size} points + {n_all - sweep_pos.size} linearity repeats + "
        f"{int(floor.sum())} floor captures; settle (rule {plan.settle.rule!r}, "
        "benchseq.settling, each point after the one before it in run order) "
        f"{settle.sum():.1f} s in all, {settle.min():.3g}-{settle.max():.3g} s per point, "
        f"{off_wait[floor].sum():.3f} s before the floor captures; truth + least captures "
        f"computed in {truth_s:.2f} s"
    )
    print(
        f"check_plan estimated_time_s = {report.estimated_time_s:.1f} s: "
        + ", ".join(f"{k} {v:.1f}" for k, v in b.items())
    )
    print(
        f"lower bound (per point and floor capture: settle + least capture meeting "
        f"{plan.capture.target_uncertainty_db:g} dB; + DC ramps and bias-filter waits "
        f"{operating:.1f} s) = {lb_total:.1f} s; captures {cap.sum() + cap[floor].sum():.1f} s; "
        f"{unmet} points cannot meet the target within max_time {plan.capture.max_time_s:g} s "
        "(their bound is the most accurate capture within it)"
    )
    print(
        f"ratio check estimate / lower bound = {report.estimated_time_s / lb_total:.3f} "
        f"(the check's captures are cycle-bound, {b.get('captures', 0.0):.1f} s against "
        f"{cap.sum():.1f} s; it adds after_operating_point waits the bound leaves out)"
    )
    worst = float(cap.max())
    meetable = max(x.bench_time for x in bound if x.meets_target)
    captures_total = n_all + int(floor.sum())
    waits = settle.sum() + off_wait[floor].sum() + operating
    fixed_total = captures_total * worst + waits
    fixed_meet = captures_total * meetable + waits
    print(
        f"fixed-capture sequencer (one capture for every point, long enough for the worst): "
        f"{worst:.3f} s each -> {fixed_total:.0f} s = {fixed_total / lb_total:.2f}x the bound; "
        f"sized for the worst point that can meet the target ({meetable:.3f} s): "
        f"{fixed_meet:.0f} s = {fixed_meet / lb_total:.2f}x"
    )
    print(
        f"{'decade':>16} {'points':>6} {'bound capture s':>16} {'check capture s':>16} "
        f"{'noise-bound':>11} {'unmet':>6}"
    )
    freq = every["frequency"]
    check_caps = np.minimum(
        np.maximum(plan.capture.min_cycles / freq, 1e-3), plan.capture.max_time_s
    )
    decades = np.floor(np.log10(freq) + 1e-9)
    for d in np.unique(decades):
        sel = np.nonzero(decades == d)[0]
        noise_bound = sum(
            bound[i].record_length * bound[i].sample_interval * bound[i].records
            > plan.capture.min_cycles / freq[i] * 1.5
            for i in sel
        )
        print(
            f"{10**d:>9.0f} Hz .. {sel.size:>6} {cap[sel].sum():>16.2f} "
            f"{check_caps[sel].sum():>16.2f} {noise_bound:>11} "
            f"{sum(not bound[i].meets_target for i in sel):>6}"
        )

    if noise_trials:
        print(
            f"noise model of the bound against the simulator ({noise_trials} synthesised records "
            "each, amplitude fitted at the true frequency; ratio 1 ± "
            f"{1 / math.sqrt(2 * (noise_trials - 1)):.2f} expected):"
        )
        checker = rb.TruthBench(bench, rb_fill())
        for f, dt, length in ((100.0, 1e-6, 200_000), (10e3, 1e-8, 200_000)):
            found = rb.check_noise_model(checker, 4.2, f, 0.05, dt, length, noise_trials)
            print(
                f"  {f:g} Hz, {dt:g} s x {length}: "
                + "; ".join(
                    f"{name} predicted σ_A {p:.3g} V, empirical {e:.3g} V (ratio {e / p:.3f})"
                    for name, p, e in found
                )
            )

    keep = sweep_pos[rb.stratified(every["frequency"][sweep_pos], points)]
    label = "all points" if keep.size == sweep_pos.size else "a subset stratified over frequency"
    print(
        f"\nsequencer on {keep.size} of {sweep_pos.size} points ({label}; --points {points}) and "
        f"their linearity repeats: {np.unique(freq[keep]).size} distinct frequencies "
        f"{freq[keep].min():.3g}-{freq[keep].max():.3g} Hz, {np.unique(every['dc'][keep]).size} "
        "DC levels"
    )
    out = folder / "overnight-subset.h5"
    start = time.perf_counter()
    outcome, clock = rb.run_sweep(plan, bench, out, keep=keep, attach=rb.BenchClock)
    wall = time.perf_counter() - start
    rows = read_results(out).merge(read_truth(out), on="point_id", suffixes=("", "_true"))
    totals = clock.totals()
    spent = sum(totals.values())
    position = {int(i): k for k, i in enumerate(every["id"])}
    run_pos = np.array([position[p.point_id] for p in clock.points], dtype=np.int64)
    ramps = totals.get(rb.RAMP, 0.0)  # the plan's DC steps: the bound takes them too
    lb_caps = cap[run_pos].sum() + cap[run_pos][floor[run_pos]].sum()
    lb_settle = settle[run_pos].sum() + off_wait[run_pos][floor[run_pos]].sum()
    lb_sub_total = lb_settle + lb_caps + ramps
    print(
        f"run {outcome.status}: {len(clock.points)} points measured "
        f"({int(every['repeat'][run_pos].sum())} repeats, {int(floor[run_pos].sum())} with a "
        f"floor capture); wall {wall:.1f} s ({wall / len(clock.points):.2f} s/point); bench "
        f"time {outcome.bench_time:.1f} s (points {spent:.1f} s + power-up "
        f"{sum(clock.outside.values()):.1f} s)"
    )
    print(f"{'bench time by activity':<26}{'s':>9}{'s/point':>9}{'share':>8}")
    for tag in rb.ACTIVITIES:
        if totals.get(tag, 0.0) > 0:
            v = totals[tag]
            print(f"{tag:<26}{v:>9.2f}{v / len(clock.points):>9.3f}{v / spent:>8.1%}")
    overhead = sum(
        totals.get(t, 0.0)
        for t in (rb.RANGING, rb.RERANGE, rb.TRIM_CAPTURE, rb.TRIM_SETTLE, rb.PIN_DC)
    )
    planned = totals.get(rb.PLANNED, 0.0) + totals.get(rb.EXTENSION, 0.0)
    print(
        f"lower bound on the same points: {lb_sub_total:.2f} s (settle {lb_settle:.2f} + captures "
        f"{lb_caps:.2f} + the same DC ramps/bias waits {ramps:.2f}); sequencer {spent:.2f} s -> "
        f"ratio {spent / lb_sub_total:.3f} (goal <= 1.15)"
    )
    print(
        f"  explained: planned + extension captures {planned:.2f} s (extensions "
        f"{totals.get(rb.EXTENSION, 0.0):.2f}) against the bound's point captures "
        f"{cap[run_pos].sum():.2f} s ({planned - cap[run_pos].sum():+.2f} s); ranging, "
        f"re-ranging, trims and pin DC checks, which the bound does not spend, {overhead:.2f} s; "
        f"floor captures {totals.get(rb.FLOOR, 0.0):.2f} s against "
        f"{(off_wait * floor)[run_pos].sum() + cap[run_pos][floor[run_pos]].sum():.2f} s"
    )
    flags = rows["flags"].fillna("")
    err = (rows["rejection_db"] - rows["rejection_db_true"]).abs()
    detected = ~rows["is_bound"]
    print(
        f"  quality: {int(detected.sum())} detected, {int(rows['is_bound'].sum())} bounds, "
        f"{int(flags.str.contains('target_unmet').sum())} target_unmet; reported uncertainty "
        f"median {rows.loc[detected, 'uncertainty_db'].median():.3f} dB, max "
        f"{rows.loc[detected, 'uncertainty_db'].max():.3f} dB; |error vs truth| median "
        f"{err[detected].median():.3f} dB, p95 {np.nanpercentile(err[detected], 95):.3f} dB; "
        f"captures per point {rows['captures'].mean():.2f}, trims {rows['trims'].mean():.2f}"
    )
    over = detected & (rows["uncertainty_db"] > plan.capture.target_uncertainty_db * (1 + 1e-9))
    print(
        f"  {int(over.sum())} detected points report an uncertainty above the "
        f"{plan.capture.target_uncertainty_db:g} dB target, "
        f"{int((over & flags.str.contains('target_unmet')).sum())} of them flagged target_unmet"
    )
    print(
        f"{'decade':>12} {'pts':>4} {'seq s/pt':>9} {'bound s/pt':>10} {'ratio':>6} "
        f"{'captures':>8} {'planned cap/bound cap':>22}"
    )
    per_decade: dict[float, list] = {}
    for p, k in zip(clock.points, run_pos, strict=True):
        per_decade.setdefault(float(decades[k]), []).append((p, k))
    ratios = {}
    captures = dict(zip(rows["point_id"], rows["captures"], strict=True))
    for d in sorted(per_decade):
        group = per_decade[d]
        seq = sum(sum(p.seconds.values()) - p.seconds.get(rb.RAMP, 0.0) for p, _ in group)
        plan_cap = sum(p.seconds.get(rb.PLANNED, 0.0) for p, _ in group)
        lb = sum(settle[k] + off_wait[k] * floor[k] + cap[k] * (1 + floor[k]) for _, k in group)
        print(
            f"{10**d:>9.0f} Hz {len(group):>4} {seq / len(group):>9.3f} {lb / len(group):>10.3f} "
            f"{seq / lb:>6.2f} {np.mean([captures[p.point_id] for p, _ in group]):>8.2f} "
            f"{plan_cap / max(sum(cap[k] for _, k in group), 1e-12):>22.2f}"
        )
        ratios[d] = seq / lb
    if set(ratios) == {float(d) for d in np.unique(decades)}:
        full = sum(
            ratios[float(d)]
            * (
                (settle * (decades == d) + off_wait * floor * (decades == d)).sum()
                + (cap * ((decades == d) + floor * (decades == d))).sum()
            )
            for d in np.unique(decades)
        )
        print(
            f"extrapolated to the whole plan (each decade's ratio x its bound, DC ramps apart): "
            f"sequencer ~{full + operating:.0f} s against the bound's {lb_total:.0f} s "
            f"({(full + operating) / lb_total:.2f}x)"
        )


# -- (e) settle rules side by side -----------------------------------------------------------------
def part_e(folder: Path, points: int) -> None:
    """The overnight plan under the fixed rule (settle.rule = "time-constants", 6 slowest
    time constants, as the plan was written before) and under the model's transient rule:
    the check's planned bench time, the sequencer's simulated bench time per decade, and
    coverage of the truth per decade, in one process on the same points."""
    import dataclasses

    from benchseq.check import check_plan
    from benchseq.plan import load_plan
    from benchseq.store import read_results, read_truth

    print("\n== (e) plans/overnight.toml: settle rules side by side (same points, seed 0)")
    plan = load_plan(PLANS / "overnight.toml")
    bench = overnight_bench(folder, ringing=True)
    rules = {
        "time-constants x6": dataclasses.replace(
            plan,
            settle=dataclasses.replace(plan.settle, rule="time-constants", time_constants=6.0),
        ),
        "transient": plan,
    }
    every = plan_points(plan)
    sweep_pos = np.nonzero(~every["repeat"])[0]
    keep = sweep_pos[rb.stratified(every["frequency"][sweep_pos], points)]
    decades = np.floor(np.log10(every["frequency"]) + 1e-9)
    results: dict[str, dict[str, Any]] = {}
    for name, variant in rules.items():
        report = check_plan(variant, bench)
        settle, _ = planned_waits(variant, bench, every)
        start = time.perf_counter()
        outcome, clock = rb.run_sweep(
            variant, bench, folder / f"rules-{len(results)}.h5", keep=keep, attach=rb.BenchClock
        )
        wall = time.perf_counter() - start
        rows = read_results(folder / f"rules-{len(results)}.h5").merge(
            read_truth(folder / f"rules-{len(results)}.h5"), on="point_id", suffixes=("", "_true")
        )
        position = {int(i): k for k, i in enumerate(every["id"])}
        per_point = {  # the plan's operating-point steps apart (a subset takes more of them)
            position[p.point_id]: sum(p.seconds.values())
            - p.seconds.get(rb.RAMP, 0.0)
            - p.seconds.get(rb.OPERATING, 0.0)
            for p in clock.points
        }
        settled = {position[p.point_id]: p.seconds.get(rb.SETTLE, 0.0) for p in clock.points}
        rows["pos"] = [position[int(i)] for i in rows["point_id"]]
        results[name] = {
            "check": report.estimated_time_s,
            "check_settling": report.time_breakdown["settling"],
            "planned_settle": float(settle.sum()),
            "operating": report.time_breakdown["dc_ramps"]
            + report.time_breakdown["bias_filter"]
            + report.time_breakdown["operating_point_waits"],
            "bench": outcome.bench_time,
            "status": outcome.status,
            "per_point": per_point,
            "settled": settled,
            "rows": rows,
            "wall": wall,
        }
    names = list(rules)
    old, new = (results[n] for n in names)
    print(
        f"check's planned bench time (all {every['id'].size} points): {old['check']:.0f} s -> "
        f"{new['check']:.0f} s (ratio {new['check'] / old['check']:.3f}); its settling "
        f"{old['check_settling']:.0f} s -> {new['check_settling']:.1f} s"
    )
    print(
        f"sequencer on {keep.size} of {sweep_pos.size} points (+ repeats; --points {points}): "
        f"bench time {old['bench']:.1f} s ({old['status']}, wall {old['wall']:.0f} s) -> "
        f"{new['bench']:.1f} s ({new['status']}, wall {new['wall']:.0f} s), ratio "
        f"{new['bench'] / old['bench']:.3f}"
    )
    header = (
        f"{'decade':>12} {'pts':>4} {'old s/pt':>9} {'new s/pt':>9} {'ratio':>6} "
        f"{'old settle':>10} {'new settle':>10}   coverage old | new: values, within 1.96u, "
        "beyond 4u, bounds above truth"
    )
    print(header)

    def coverage(rows: Any, sel: Any) -> str:
        part = rows[rows["pos"].isin(sel)]
        values = part[~part["is_bound"]]
        z = (values["rejection_db"] - values["rejection_db_true"]) / values["uncertainty_db"]
        bounds = part[part["is_bound"]]
        above = int((bounds["bound_db"] > bounds["rejection_db_true"]).sum())
        inside = float(np.mean(np.abs(z) <= 1.96)) if len(z) else math.nan
        return f"{len(z):>3}, {inside:>6.1%}, {int((np.abs(z) > 4).sum())}, {above}/{len(bounds)}"

    total_old = total_new = 0.0
    extrapolated_old = extrapolated_new = 0.0
    for d in np.unique(decades):
        sel = [k for k in old["per_point"] if decades[k] == d]
        if not sel:
            continue
        o = sum(old["per_point"][k] for k in sel)
        n = sum(new["per_point"][k] for k in sel)
        total_old, total_new = total_old + o, total_new + n
        weight = int(np.sum(decades == d)) / len(sel)  # the decade's points in the whole plan
        extrapolated_old += o * weight
        extrapolated_new += n * weight
        print(
            f"{10**d:>9.0f} Hz {len(sel):>4} {o / len(sel):>9.3f} {n / len(sel):>9.3f} "
            f"{n / o:>6.3f} {sum(old['settled'][k] for k in sel) / len(sel):>10.4f} "
            f"{sum(new['settled'][k] for k in sel) / len(sel):>10.4f}   "
            f"{coverage(old['rows'], sel)} | {coverage(new['rows'], sel)}"
        )
    operating = new["operating"]
    print(
        f"points' bench time (DC ramps, bias-filter and after_operating_point waits apart) "
        f"{total_old:.1f} s -> {total_new:.1f} s, ratio {total_new / total_old:.3f}; "
        f"extrapolated to the whole plan by decade, plus its {operating:.0f} s of operating-point "
        f"steps (the check's): {extrapolated_old + operating:.0f} s -> "
        f"{extrapolated_new + operating:.0f} s, ratio "
        f"{(extrapolated_new + operating) / (extrapolated_old + operating):.3f}"
    )
    print(f"all bands: old {coverage(old['rows'], list(old['per_point']))}")
    print(f"           new {coverage(new['rows'], list(new['per_point']))}")


# -- (c) cost of a durable point -------------------------------------------------------------
def _rows(count: int) -> tuple[list[dict], list[dict]]:
    from benchseq.records import POINT_COLUMNS

    rng = np.random.default_rng(7)
    rows, truths = [], []
    for i in range(count):
        row: dict[str, Any] = {}
        for column in POINT_COLUMNS:
            row[column.name] = {
                "f8": float(rng.normal()),
                "c16": complex(rng.normal(), rng.normal()),
                "i8": int(rng.integers(0, 1000)),
                "bool": bool(i % 5 == 0),
                "str": "bound target_unmet" if i % 7 == 0 else "",
            }[column.kind]
        row["point_id"] = i
        row["ripple_convention"] = "pp"
        rows.append(row)
        truths.append(
            {
                "point_id": i,
                "pin": complex(0.05, 0.001),
                "output": 1e-5j,
                "rejection_db": 73.9,
                "pin_dc": 5.0,
            }
        )
    return rows, truths


BENCH_PACE_S = 2.0  # bench time per point the paced policy row simulates (a typical point)
DURABLE_POLICIES = (
    ("journal + fsync only (HDF5 at finish)", {"min_interval_s": 1e12}, 0.0),
    ("default policy, points back to back", {}, 0.0),
    (f"default policy, {BENCH_PACE_S:g} s of bench per point", {}, BENCH_PACE_S),
    ("HDF5 update after every point", {"every_point": True}, 0.0),
)


class _BenchClock:
    """The store's ``time`` module with a bench's pace added to ``monotonic``: each point
    moves it on by the bench time a point would take, so the consolidation policy decides as
    on a real bench while the costs measured stay real (perf_counter is untouched)."""

    def __init__(self) -> None:
        self.offset = 0.0

    def monotonic(self) -> float:
        return time.monotonic() + self.offset

    def __getattr__(self, name: str) -> Any:
        return getattr(time, name)


def _bare_write_fsync(path: Path, records: list[bytes]) -> list[float]:
    """Each record written with one os.write and fsync'd: the least a durable point costs."""
    times = []
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        for record in records:
            start = time.perf_counter()
            os.write(fd, record)
            os.fsync(fd)
            times.append(time.perf_counter() - start)
    finally:
        os.close(fd)
    return times


def durability_child(folder: Path, count: int, policy: int) -> dict[str, Any]:
    """(c) measured with the benchseq this interpreter imports (this tree's, or another
    worktree's when run by its venv's Python): for policy number ``policy``, the cost of
    each append beside a bare write + fsync of the same record bytes, measured just before."""
    import benchseq.store as store
    from benchseq import journal
    from benchseq.records import POINT_COLUMNS, TRUTH_COLUMNS
    from benchseq.store import Consolidation, RunWriter, _encode_row

    rows, truths = _rows(count)
    records = [
        journal.encode_record(
            {
                "kind": "point",
                "id": i,
                "row": _encode_row(POINT_COLUMNS, row, i, "p"),
                "truth": _encode_row(TRUTH_COLUMNS, truths[i], i, "t"),
            }
        )
        for i, row in enumerate(rows)
    ]
    out: dict[str, Any] = {"code": str(Path(store.__file__).resolve().parents[1]), "rows": []}
    times = []
    for i, row in enumerate(rows):
        start = time.perf_counter()
        body = {"kind": "point", "id": i, "row": _encode_row(POINT_COLUMNS, row, i, "p")}
        journal.encode_record(body, b"")
        times.append(time.perf_counter() - start)
    out["encode_ms"] = 1e3 * statistics.median(times)
    for n, (name, options, pace) in [(policy, DURABLE_POLICIES[policy])]:
        bare = _bare_write_fsync(folder / f"bare-{n}.bin", records)
        path = folder / f"durable-{n}.h5"
        writer = RunWriter.create(
            path,
            {"run_id": name},
            POINT_COLUMNS,
            force=True,
            truth_columns=TRUTH_COLUMNS,
            policy=Consolidation(**options),
        )
        updates = [0]
        original = writer._consolidate

        def counted(
            *args: Any, original: Any = original, updates: Any = updates, **kw: Any
        ) -> None:
            updates[0] += 1
            original(*args, **kw)

        writer._consolidate = counted  # type: ignore[method-assign]
        clock = _BenchClock()
        real_time, store.time = store.time, clock  # type: ignore[assignment]
        try:
            times = []
            for i, row in enumerate(rows):
                start = time.perf_counter()
                writer.append(i, row, truth=truths[i])
                times.append(time.perf_counter() - start)
                clock.offset += pace
            journal_bytes = writer.journal_file.stat().st_size
            start = time.perf_counter()
            writer.finish("complete")
            finish = time.perf_counter() - start
        finally:
            store.time = real_time
        out["rows"].append(
            {
                "name": name,
                "bare_ms": 1e3 * statistics.fmean(bare),
                "median_ms": 1e3 * statistics.median(times),
                "mean_ms": 1e3 * statistics.fmean(times),
                "p95_ms": 1e3 * rb.percentile(times, 95),
                "max_ms": 1e3 * max(times),
                "updates": updates[0] - 1,  # the finish's own update apart
                "finish_ms": 1e3 * finish,
                "journal_b": journal_bytes / count,
                "h5_b": path.stat().st_size / count,
                "first_tenth_ms": 1e3 * statistics.median(times[: max(1, count // 10)]),
                "last_tenth_ms": 1e3 * statistics.median(times[-max(1, count // 10) :]),
            }
        )
    out["record_b"] = statistics.fmean(len(r) for r in records)
    return out


def _durability_run(python: str, folder: Path, count: int, policy: int) -> dict[str, Any] | str:
    folder.mkdir(parents=True, exist_ok=True)
    try:
        done = subprocess.run(
            [
                python,
                str(Path(__file__).resolve()),
                "--durable-child",
                str(policy),
                "--dir",
                str(folder),
                "--durable-points",
                str(count),
            ],
            capture_output=True,
            text=True,
            timeout=1800,
            check=False,
        )
    except subprocess.TimeoutExpired:
        return "timed out after 1800 s"
    if done.returncode != 0:
        return f"exit {done.returncode}: {done.stderr.strip().splitlines()[-1:]}"
    return json.loads(done.stdout.strip().splitlines()[-1])


def part_c(folder: Path, count: int, baseline: str | None) -> None:
    """(c): the figures of this tree and, with ``baseline`` (the Python of a venv whose
    benchseq is the code to compare with), of that code: one process per policy and code,
    the two codes alternating policy by policy so that a change of the machine's load
    reaches both, each ratio taken against the bare write + fsync measured in its process."""
    from benchseq.records import POINT_COLUMNS

    print(
        f"\n== (c) cost of one durable point (RunWriter.append), {count} points each, "
        f"real row columns ({len(POINT_COLUMNS)}) + truth, folder {folder}"
    )
    pythons = [("this tree", sys.executable)] + ([("baseline", baseline)] if baseline else [])
    runs: list[tuple[str, dict[str, Any]]] = [(label, {"rows": []}) for label, _ in pythons]
    for policy in range(len(DURABLE_POLICIES)):
        for (label, python), (_, run) in zip(pythons, runs, strict=True):
            got = _durability_run(python, folder / f"{label.split()[0]}-{policy}", count, policy)
            if isinstance(got, str):
                print(f"{label}: failed ({got})")
                return
            run.update({k: v for k, v in got.items() if k != "rows"})
            run["rows"] += got["rows"]
    for label, run in runs:
        print(
            f"{label}: benchseq from {run['code']}; record {run['record_b']:.0f} B/point; "
            f"encode row + record (no I/O) {run['encode_ms']:.3f} ms"
        )
    good = runs
    head = "".join(f"{label:>30}" for label, _ in good)
    print(f"\n{'ratio: mean cost per point / bare write+fsync':<44}{head}")
    print(f"{'of the same record bytes (both means in ms;':<44}")
    print(f"{f' HDF5 updates during the {count} points)':<44}")
    for i, (name, _, _) in enumerate(DURABLE_POLICIES):
        cells = ""
        for _, run in good:
            row = run["rows"][i]
            cell = (
                f"{row['mean_ms'] / row['bare_ms']:5.1f}x "
                f"({row['mean_ms']:.2f}/{row['bare_ms']:.2f}, {row['updates']})"
            )
            cells += f"{cell:>30}"
        print(f"{name:<44}{cells}")
    for label, run in good:
        print(f"\n{label}, per point:")
        print(f"{'':<44}{'median ms':>10}{'p95 ms':>9}{'max ms':>9}")
        for row in run["rows"]:
            print(
                f"{row['name']:<44}{row['median_ms']:>10.3f}{row['p95_ms']:>9.3f}"
                f"{row['max_ms']:>9.2f}  finish {row['finish_ms']:.1f} ms; journal "
                f"{row['journal_b']:.0f} B/pt, HDF5 {row['h5_b']:.0f} B/pt"
            )
        every = run["rows"][-1]
        tenth = max(1, count // 10)
        print(
            f"HDF5 after every point: median of the first {tenth} {every['first_tenth_ms']:.2f} "
            f"ms, of the last {tenth} {every['last_tenth_ms']:.2f} ms (the copy grows with the file)"
        )


# -- (d) memory against points --------------------------------------------------------------
CHEAP_PLAN = """
title = "memory benchmark, {n} points"
[device]
name = "benchmark"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = {{ from = "200 kHz", to = "1 MHz", points = {n} }}
[settle]
rule = "time-constants"
time_constants = 1
[capture]
min_cycles = 1
max_time = "1 ms"
target_uncertainty = "3 dB"
"""


def _status(key: str) -> float:
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024
    return math.nan


def memory_child(n: int, folder: Path, trace: bool) -> None:
    """One size in a fresh process: prints one JSON line."""
    import tracemalloc

    from benchseq.bench import load_bench
    from benchseq.plan import load_plan
    from benchseq.store import RunWriter

    plan_path = folder / f"memory-{n}.toml"
    plan_path.write_text(CHEAP_PLAN.format(n=n), encoding="utf-8")
    plan, bench = load_plan(plan_path), load_bench(None)
    sizes: dict[str, float] = {}
    finish = RunWriter.finish

    def finish_sized(self: Any, *args: Any, **kwargs: Any) -> None:
        sizes["journal"] = self.journal_file.stat().st_size
        finish(self, *args, **kwargs)

    RunWriter.finish = finish_sized  # type: ignore[method-assign]
    marks: list[tuple[int, float, float]] = []
    snapshots: list[Any] = []
    step = max(1, n // 10)
    holder: dict[str, Any] = {}

    def attach(sequencer: Any) -> None:
        holder["sim"] = sequencer.session.simulator
        emit = sequencer.emit

        def watch(event: Any) -> None:
            if event.kind == "point_stored" and event.done % step == 0:
                current = tracemalloc.get_traced_memory()[0] / 2**20 if trace else math.nan
                marks.append((event.done, _status("VmRSS"), current))
                if trace and event.done in (step, step * 10):
                    snapshots.append(tracemalloc.take_snapshot())
            emit(event)

        sequencer.emit = watch

    before = _status("VmHWM")
    if trace:
        tracemalloc.start()
    start = time.perf_counter()
    outcome, _ = rb.run_sweep(plan, bench, folder / f"memory-{n}.h5", attach=attach)
    wall = time.perf_counter() - start
    peak_traced = tracemalloc.get_traced_memory()[1] / 2**20 if trace else math.nan
    growth: dict[str, float] = {}
    if len(snapshots) == 2:  # what the memory held at the end and not at 1/10 is, by package
        for stat in snapshots[1].compare_to(snapshots[0], "filename"):
            where = stat.traceback[0].filename.replace(os.sep, "/")
            part = (
                "simulator (sim/)"
                if "/sim/" in where
                else "store (store, rowcodec, h5layout, journal)"
                if any(
                    f"/benchseq/{m}.py" in where
                    for m in ("store", "rowcodec", "h5layout", "journal")
                )
                else "sequencer"
                if where.endswith("/benchseq/sequencer.py")
                else "other benchseq"
                if "/benchseq/" in where
                else "outside benchseq (tracemalloc, json, h5py, numpy...)"
            )
            growth[part] = growth.get(part, 0.0) + stat.size_diff
    print(
        json.dumps(
            {
                "n": n,
                "status": outcome.status,
                "wall": wall,
                "bench_time": outcome.bench_time,
                "hwm_before": before,
                "hwm": _status("VmHWM"),
                "marks": marks,
                "traced_peak": peak_traced,
                "growth": growth,
                "growth_points": marks[9][0] - marks[0][0] if len(marks) >= 10 else 0,
                "journal": sizes.get("journal", math.nan),
                "h5": (folder / f"memory-{n}.h5").stat().st_size,
                "sim_log": len(holder["sim"].log),
                "sim_log_bytes": sum(
                    sys.getsizeof(e) + sys.getsizeof(vars(e)) + sys.getsizeof(e.value)
                    for e in holder["sim"].log[:100_000]
                ),
            }
        )
    )


def _slope(x: list[float], y: list[float]) -> float:
    if len(x) < 2:
        return math.nan
    return float(np.polyfit(np.asarray(x, float), np.asarray(y, float), 1)[0]) * 1000.0


def _child(n: int, folder: Path, trace: bool) -> dict[str, Any] | str:
    command = [sys.executable, __file__, "--memory-child", str(n), "--dir", str(folder)]
    if trace:
        command.append("--tracemalloc")
    limit = 120 + (1.0 if trace else 0.25) * n
    try:
        done = subprocess.run(command, capture_output=True, text=True, timeout=limit, cwd=ROOT)
    except subprocess.TimeoutExpired:
        return f"no result within {limit:.0f} s (killed)"
    if done.returncode != 0:
        return f"child failed ({done.returncode}): {done.stderr.strip()[-400:]}"
    return json.loads(done.stdout.strip().splitlines()[-1])


def part_d(folder: Path, sizes: tuple[int, ...], trace_up_to: int) -> None:
    print(
        "\n== (d) memory of sequencer + store against points (cheapest captures: 200 kHz-1 MHz, "
        "1 cycle, 1000-sample records), one fresh process per size and measure; tracemalloc "
        f"(which slows the run several times) in a separate process, up to {trace_up_to} points"
    )
    results = []
    last_growth: tuple[int, int, dict[str, float]] | None = None
    for n in sizes:
        result = _child(n, folder, trace=False)
        if isinstance(result, str):
            print(f"{n:>6} points: {result}")
            continue
        traced = _child(n, folder, trace=True) if n <= trace_up_to else "not run"
        result["traced_peak"] = traced["traced_peak"] if isinstance(traced, dict) else math.nan
        if isinstance(traced, dict) and traced["growth_points"]:
            last_growth = (n, traced["growth_points"], traced["growth"])
        traced_growth = (
            _slope([m[0] for m in traced["marks"]], [m[2] for m in traced["marks"]])
            if isinstance(traced, dict)
            else math.nan
        )
        results.append(result)
        marks = result["marks"]
        inside = _slope([m[0] for m in marks], [m[1] for m in marks])
        print(
            f"{n:>6} points: {result['status']}, wall {result['wall']:.1f} s "
            f"({1e3 * result['wall'] / n:.1f} ms/pt); peak RSS {result['hwm']:.1f} MB "
            f"(before the run {result['hwm_before']:.1f}); RSS during the run "
            f"{marks[0][1]:.1f} (at {marks[0][0]}) -> {marks[-1][1]:.1f} MB (slope "
            f"{inside:+.2f} MB/1000 pts); tracemalloc peak "
            + (
                f"{result['traced_peak']:.1f} MB (traced memory during the run "
                f"{traced_growth:+.3f} MB/1000 pts)"
                if isinstance(traced, dict)
                else str(traced)
            )
            + f"; journal {result['journal'] / n:.0f} B/pt, HDF5 {result['h5'] / n:.0f} B/pt; "
            f"simulator's state-change log {result['sim_log'] / n:.1f} entries, "
            f"{result['sim_log_bytes'] / n:.0f} B per point"
        )
    if last_growth is not None:
        n, span, growth = last_growth
        print(
            f"traced memory gained between points {n // 10} and {n} of the {n}-point run, by "
            "where it was allocated (KB per 1000 points): "
            + ", ".join(
                f"{part} {value / 1024 / span * 1000:+.0f}"
                for part, value in sorted(growth.items(), key=lambda kv: -kv[1])
            )
        )
    if len(results) >= 2:
        xs = [r["n"] for r in results]
        traced = [(r["n"], r["traced_peak"]) for r in results if math.isfinite(r["traced_peak"])]
        print(
            f"slope per 1000 points across sizes: peak RSS "
            f"{_slope(xs, [r['hwm'] for r in results]):+.2f} MB, tracemalloc peak "
            f"{_slope([t[0] for t in traced], [t[1] for t in traced]):+.3f} MB"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument(
        "--points",
        type=int,
        default=96,
        help="overnight points the sequencer runs in (b) (default 96; 832 = all)",
    )
    parser.add_argument("--parts", default="abcde", help="which parts to run (default abcde)")
    parser.add_argument("--full", action="store_true", help="(d) also at 10,000 points")
    parser.add_argument(
        "--sizes", default="500,1000,2000", help="(d) points per run, comma-separated"
    )
    parser.add_argument("--durable-points", type=int, default=300, help="(c) points (>= 200)")
    parser.add_argument(
        "--baseline",
        help="(c) also measure with this Python (a venv whose benchseq is the code to "
        "compare with, e.g. another worktree's .venv/bin/python)",
    )
    parser.add_argument("--durable-child", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--demo-runs", type=int, default=3, help="(a) repeats of the demo")
    parser.add_argument("--no-tracemalloc", action="store_true", help="(d) peak RSS only")
    parser.add_argument(
        "--noise-trials", type=int, default=80, help="(b) records per noise-model check (0: skip)"
    )
    parser.add_argument("--dir", help="folder for result files (default: a new temp folder)")
    parser.add_argument("--memory-child", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--tracemalloc", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.memory_child:
        memory_child(args.memory_child, Path(args.dir), args.tracemalloc)
        return
    if args.durable_child is not None:
        child = durability_child(Path(args.dir), args.durable_points, args.durable_child)
        print(json.dumps(child))
        return
    sizes_ok = all(x.strip().isdigit() and 10 <= int(x) <= 20_000 for x in args.sizes.split(","))
    if (
        not 1 <= args.points <= 832
        or not (args.noise_trials == 0 or 10 <= args.noise_trials <= 1000)
        or not 200 <= args.durable_points <= 20_000
        or not (1 <= args.demo_runs <= 10 and sizes_ok)
    ):
        parser.error(
            "--points 1..832, --durable-points 200..20000, --demo-runs 1..10, "
            "--sizes 10..20000 each"
        )
    load_line("at start")
    print(f"python {platform.python_version()}, {platform.machine()}, numpy {np.__version__}")
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        folder = Path(tmp)
        if "a" in args.parts:
            part_a(folder, args.demo_runs)
        if "b" in args.parts:
            part_b(folder, args.points, args.noise_trials)
        if "c" in args.parts:
            part_c(folder, args.durable_points, args.baseline)
        if "d" in args.parts:
            sizes = tuple(int(x) for x in args.sizes.split(",")) + (
                (FULL_SIZE,) if args.full else ()
            )
            part_d(folder, sizes, 0 if args.no_tracemalloc else 2000)
        if "e" in args.parts:
            part_e(folder, args.points)
    print(f"\nscript wall time {time.perf_counter() - started:.0f} s")
    load_line("at end")


if __name__ == "__main__":
    main()
