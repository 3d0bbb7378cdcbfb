"""Cost of a netlist device point next to a built-in model point (a script, not a test).

python tests/perf/netlist_speed.py [--run]

Prints, for the example netlist scenario (sim/scenarios/netlist-ldo.toml) and the demo's
built-in regulator model:
- the device's answer at a new operating point (ngspice: op + one AC frequency), at a new
  frequency of a known operating point, and from the cache;
- the simulator's physics at a new generator frequency (the injector's nodal solution plus
  the device), as a run meets it at every point;
- with --run: one run of plans/rehearse-netlist.toml on each bench (wall time per point; bench
  time is virtual). Needs ngspice on PATH. Loops are bounded in count.
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
from benchseq.sim.scenario import load_scenario
from benchseq.sim.world import SimulatedBench

ROOT = Path(__file__).resolve().parents[2]
COUNT = 12


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


def physics_costs() -> None:
    print("simulator physics at a new generator frequency (injector + device):")
    for scenario in ("netlist-ldo", "demo"):
        sim = SimulatedBench.from_scenario(scenario)
        sim.handler("supply").handle("SOUR1:VOLT 5;:OUTP1 ON")
        gen = sim.handler("generator")
        gen.handle("SOUR1:FREQ 1000;VOLT 0.1;:OUTP1 ON")
        sim.physics()

        def step(k: int, gen=gen, sim=sim) -> None:
            gen.handle(f"SOUR1:FREQ {1000 + 13.0 * (k + 1)}")
            sim.physics()

        show(scenario, timed(step))


def run_costs() -> None:
    from benchseq.cli import main

    print("one run of plans/rehearse-netlist.toml (32 points), wall time:")
    plan = str(ROOT / "plans" / "rehearse-netlist.toml")
    with tempfile.TemporaryDirectory() as tmp:
        for bench in ("sim:netlist-ldo", "sim:demo"):
            runs_before = netlist.CACHE.runs
            start = time.perf_counter()
            with open(os.devnull, "w") as quiet:
                saved, sys.stdout = sys.stdout, quiet
                try:
                    code = main(["run", plan, "--bench", bench, "--out", f"{tmp}/{bench[4:]}.h5"])
                finally:
                    sys.stdout = saved
            took = time.perf_counter() - start
            runs = netlist.CACHE.runs - runs_before
            print(
                f"  {bench:<16s} exit {code}: {took:6.1f} s, {took / 32 * 1e3:6.0f} ms per point, "
                f"{runs} ngspice runs"
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
