"""The scope's AC coupling at low frequencies: a single-pole high-pass in each AC-coupled
channel. Both channels share it, so the rejection ratio is unaffected; but the pin ripple
read through it is low near the corner (at the corner by 3 dB), and the generator would be
trimmed to drive the pin harder than the plan asked.

The sequencer measures the corner once per run: the pin ripple at the plan's lowest
frequency read AC-coupled and then DC-coupled with the pin's DC level taken off by the
channel offset. For H(f) = x / (1 + x), x = j·f/f_c (first-order high-pass, any circuit
handbook), |1/H|² = 1 + (f_c/f)², so f_c = f·√(1/|H|² − 1).
"""

from __future__ import annotations

import math

MEASURE_BELOW_HZ = 2000.0  # plans reaching below this get the corner measured
RESOLVABLE = 0.9995  # |H| closer to 1 than this: the corner is too low to matter here


def corner_from_ratio(frequency: float, ac_over_dc: float) -> float:
    """The corner frequency (Hz) from |AC reading / DC reading| at ``frequency``; 0 when
    the loss is too small to resolve (the corner is then far below ``frequency``)."""
    if not (math.isfinite(ac_over_dc) and ac_over_dc > 0):
        raise ValueError(f"AC/DC amplitude ratio must be positive, got {ac_over_dc!r}")
    if ac_over_dc >= RESOLVABLE:
        return 0.0
    return frequency * math.sqrt(1.0 / ac_over_dc**2 - 1.0)


def high_pass(frequency: float, corner: float) -> complex:
    """Response of the AC coupling at ``frequency`` (1 when there is no corner)."""
    if corner <= 0:
        return 1.0 + 0.0j
    x = 1j * frequency / corner
    return x / (1.0 + x)
