"""How long the feasibility check takes for 10,000 planned points (prints its figures).

Run: python tests/perf/check_speed.py
"""

from __future__ import annotations

import time

import numpy as np

from benchseq.bench import load_bench
from benchseq.injector import InjectorModel
from benchseq.plan import DeviceLimits


def main() -> None:
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
        f"feasibility of {n} points: median {1e3 * np.median(times):.2f} ms, "
        f"best {1e3 * min(times):.2f} ms, worst {1e3 * max(times):.2f} ms (20 runs)"
    )
    print(
        f"verdicts: ok {int(result.ok.sum())}, marginal {int(result.marginal.sum())}, "
        f"refused {int(result.refused.sum())}"
    )
    print(
        f"corners(): {1e3 * corners_s:.1f} ms (usable band {corners.usable_band[0]:.3g}"
        f"-{corners.usable_band[1]:.3g} Hz)"
    )


if __name__ == "__main__":
    main()
