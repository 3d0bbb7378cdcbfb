"""Speed of the simulated bench (a script, not a test): prints figures.

python tests/perf/sim_speed.py
"""

from __future__ import annotations

import time

from benchseq.sim.world import SimulatedBench


def best_of(runs: int, action) -> float:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        action()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    sim = SimulatedBench.from_scenario("demo")
    sim.handler("supply").handle("SOUR1:VOLT 5;:OUTP1 ON")
    gen, scope = sim.handler("generator"), sim.handler("scope")
    gen.handle("SOUR1:FREQ 1000;VOLT 0.1;:OUTP1 ON")
    scope.handle(":SENS:VOLT1:RANG:PTP 0.04;:SENS:VOLT2:RANG:PTP 0.008;:INP1:COUP AC;:INP2:COUP AC")
    scope.handle("SENS:SWE:OINT 1e-6;:SENS:SWE:POIN 1000000;:TRIG:SOUR EXT;:FORM:DATA INT,16")
    for averages in (1, 64):
        state = "ON" if averages > 1 else "OFF"
        scope.handle(f"SENS:AVER:COUN {averages};:SENS:AVER:STAT {state}")
        acquire = best_of(5, lambda: scope.handle("INIT:IMM"))
        read = best_of(5, lambda: scope.handle("TRAC:DATA? CH1;:TRAC:DATA? CH2"))
        print(
            f"2 channels x 1M samples, {averages:3d} averages: acquire {acquire * 1e3:6.1f} ms, "
            f"read both blocks {read * 1e3:5.1f} ms"
        )
    gen.handle("SOUR1:FREQ 5e6;VOLT 8")
    scope.handle("SENS:SWE:OINT 1e-9")
    acquire = best_of(3, lambda: (sim.__setattr__("_cache", None), scope.handle("INIT:IMM")))
    print(
        f"slew-limited point (5 MHz, 8 Vpp), 2 x 1M samples incl. limiter: {acquire * 1e3:.1f} ms"
    )
    truth = best_of(20, lambda: (sim.__setattr__("_cache", None), sim.truth()))
    print(f"truth() with a fresh slew-limited solution: {truth * 1e3:.2f} ms")


if __name__ == "__main__":
    main()
