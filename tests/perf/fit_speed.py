"""Speed and efficiency of the sine fit (prints its figures).

Run: python tests/perf/fit_speed.py

- time to fit two channels of 1,000,000 samples each (three-parameter fits), against one
  numpy rfft of 1,000,000 samples, and their ratio (goal ≤ 0.25);
- time of a whole measure_point (refine on the pin, fit both, harmonics, neighbour floor);
- a quick Monte Carlo: empirical std of the amplitude over the Cramér–Rao bound √(2σ²/N)
  [Kay, Estimation Theory, ch. 3], and reported over empirical σ.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable

import numpy as np

from benchseq.analysis import fit_sine, fit_sine_batch, measure_point


def best_of(fn: Callable[[], object], repeats: int = 30) -> float:
    """Shortest wall time of ``repeats`` calls after one warm-up (s)."""
    fn()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    rng = np.random.default_rng(0)
    n, fs, f = 1_000_000, 10e6, 12_345.678
    t = np.arange(n) / fs
    pin = 0.1 * np.cos(2 * np.pi * f * t + 0.3) + rng.normal(0, 1e-3, n)
    out = 1e-4 * np.cos(2 * np.pi * f * t + 1.1) + rng.normal(0, 1e-3, n)

    two = best_of(lambda: (fit_sine(pin, fs, f), fit_sine(out, fs, f)))
    fft = best_of(lambda: np.fft.rfft(pin))
    point = best_of(lambda: measure_point(pin, out, 1 / fs, f + 3.0), repeats=10)
    print(f"two 1M-sample channels, three-parameter fits: {two * 1e3:8.3f} ms")
    print(f"one numpy rfft of 1M samples:                  {fft * 1e3:8.3f} ms")
    print(f"ratio fits/rfft:                               {two / fft:8.3f}   (goal <= 0.25)")
    print(f"measure_point, two 1M-sample channels:         {point * 1e3:8.3f} ms")

    trials = 4000
    for length, sigma in ((1000, 0.1), (1000, 2.0), (10_000, 1.0)):
        cycles = 0.1 * length + 0.37
        phase = rng.uniform(0, 2 * np.pi, (trials, 1))
        y = np.cos(2 * np.pi * cycles / length * np.arange(length) + phase) + rng.normal(
            0, sigma, (trials, length)
        )
        fits = fit_sine_batch(y, 1.0, cycles / length)
        empirical = float(np.std(fits.amplitude, ddof=1))
        crb = math.sqrt(2 * sigma**2 / length)
        reported = float(np.mean(fits.amplitude_sigma))
        print(
            f"Monte Carlo N={length:6d} sigma={sigma:4.1f} ({trials} trials): "
            f"std/CRB = {empirical / crb:.4f}, reported/empirical = {reported / empirical:.4f}"
        )


if __name__ == "__main__":
    main()
