"""Cost of a netlist device point next to a built-in model point (a script, not a test).

python tests/perf/netlist_speed.py [--run]

Prints, for the example netlist scenario (sim/scenarios/netlist-ldo.toml) and the demo's
built-in regulator model:
- the device's answer at a new operating point (ngspice: op + one AC frequency), at a new
  frequency of a known operating point, and from the cache;
- a large-signal point (ngspice: one transient analysis with the ripple, the scenario's
  default [device.large_signal] settings) at 20 Hz, 1 kHz and 100 kHz, measured in the same
  run as the AC answers and the built-in model;
- the simulator's physics at a new generator frequency (the injector's nodal solution plus
  the device), as a run meets it at every point;
- with --run: one run of plans/rehearse-netlist.toml on each bench, and on the netlist bench
  with every point large-signal (wall time per point; bench time is virtual). Needs ngspice
  on PATH. Loops are bounded in count.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from benchseq.sim import netlist
from benchseq.sim.devices import OperatingPoint
from benchseq.sim.scenario import Scenario, load_scenario, parse_scenario
from benchseq.sim.world import SimulatedBench
from benchseq.tomlfile import parse_toml_text

ROOT = Path(__file__).resolve().parents[2]
COUNT = 12
TRANSIENT_COUNT = 4  # transient analyses per frequency (each a new pin ripple: no cache hit)


def large_signal_scenario() -> Scenario:
    """sim/scenarios/netlist-ldo.toml with [device.large_signal] at its defaults (every point)."""
    folder = ROOT / "sim" / "scenarios"
    text = (folder / "netlist-ldo.toml").read_text(encoding="utf-8") + "\n[device.large_signal]\n"
    source = str(folder / "netlist-ldo-large.toml")
    _, data = parse_toml_text(text, source)
    return parse_scenario(data, source, folder)


def timed(action, count: int = COUNT) -> list[float]:
    times = []
    for k in range(count):
        start = time.perf_counter()
        action(k)
        times.append(time.perf_counter() - start)
    return times


def show(label: str, times: list[float]) -> None:
    median = statistics.median(times)
    print(
        f"  {label:<52s} median {median * 1e3:8.3f} ms  (min {min(times) * 1e3:.3f}, n={len(times)})"
    )


def device_costs() -> None:
    spice = load_scenario("netlist-ldo").device
    builtin = load_scenario("demo").device
    print("device answer (transfer at one frequency):")
    show(
        "netlist, new operating point (op + AC)",
        timed(lambda k: spice.transfer(np.array([1e3]), OperatingPoint(4.5 + 0.01 * k, 0.02))),
    )
    show(
        "netlist, known operating point, new frequency",
        timed(lambda k: spice.transfer(np.array([1e3 + 17.0 * k]), OperatingPoint(4.5, 0.02))),
    )
    show(
        "netlist, cached",
        timed(lambda k: spice.transfer(np.array([1e3]), OperatingPoint(4.5, 0.02)), 200),
    )
    show(
        "built-in regulator model",
        timed(lambda k: builtin.transfer(np.array([1e3 + k]), OperatingPoint(4.5, 0.02)), 200),
    )
    large = large_signal_scenario().device
    print("large-signal point (transient analysis, default settings):")
    for f in (20.0, 1e3, 1e5):
        settle = large.large_signal_settings.settle_count(f)  # type: ignore[attr-defined]

        def point(k: int, f: float = f) -> None:
            pin = np.array([0.05 + 1e-4 * (k + 1) + 0j])
            large.large_signal(f, pin, OperatingPoint(4.5, 0.02))  # type: ignore[attr-defined]

        show(f"netlist, transient at {f:g} Hz ({settle} + 2 cycles)", timed(point, TRANSIENT_COUNT))


def physics_costs() -> None:
    print("simulator physics at a new generator frequency (injector + device):")
    for scenario in ("netlist-ldo", "demo"):
        sim = SimulatedBench.from_scenario(scenario)
        physics_step(scenario, sim, COUNT)
    bench = SimulatedBench.from_scenario("netlist-ldo").bench
    sim = SimulatedBench(bench, large_signal_scenario())
    physics_step("netlist-ldo, large-signal", sim, TRANSIENT_COUNT)


def physics_step(label: str, sim: SimulatedBench, count: int) -> None:
    sim.handler("supply").handle("SOUR1:VOLT 5;:OUTP1 ON")
    gen = sim.handler("generator")
    gen.handle("SOUR1:FREQ 1000;VOLT 0.1;:OUTP1 ON")
    sim.physics()

    def step(k: int) -> None:
        gen.handle(f"SOUR1:FREQ {1000 + 13.0 * (k + 1)}")
        sim.physics()

    show(label, timed(step, count))


def run_costs() -> None:
    from benchseq.bench import load_bench
    from benchseq.plan import load_plan
    from benchseq.replay import session_factory_for
    from benchseq.runner import run_prepared

    print("one run of plans/rehearse-netlist.toml (32 points), wall time:")
    plan = load_plan(ROOT / "plans" / "rehearse-netlist.toml")
    benches = (
        ("sim:netlist-ldo", "netlist-ldo", load_scenario("netlist-ldo")),
        ("sim:netlist-ldo", "netlist-ldo, large-signal", large_signal_scenario()),
        ("sim:demo", "demo", load_scenario("demo")),
    )
    with tempfile.TemporaryDirectory() as tmp:
        for k, (name, label, scenario) in enumerate(benches):
            runs_before = netlist.CACHE.runs
            transients_before = netlist.CACHE.transient_runs
            start = time.perf_counter()
            with open(os.devnull, "w") as quiet:
                saved, sys.stdout = sys.stdout, quiet
                try:
                    outcome, _ = run_prepared(
                        plan, load_bench(name), Path(tmp) / f"run{k}.h5",
                        session_factory=session_factory_for(scenario),
                    )  # fmt: skip
                finally:
                    sys.stdout = saved
            took = time.perf_counter() - start
            runs = netlist.CACHE.runs - runs_before
            transients = netlist.CACHE.transient_runs - transients_before
            print(
                f"  {label:<26s} {outcome.status}: {took:6.1f} s, "
                f"{took / plan.point_count * 1e3:6.0f} ms per point, {runs} ngspice runs "
                f"({transients} transient)"
            )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--run", action="store_true", help="also time whole runs")
    args = parser.parse_args()
    print(f"load average: {os.getloadavg()[0]:.2f} (figures mean little on a busy machine)")
    device_costs()
    physics_costs()
    if args.run:
        run_costs()


if __name__ == "__main__":
    main()
