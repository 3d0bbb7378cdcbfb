"""A long result for the tests of `show`, `compare` and the report's plots: several DC
levels and load currents, many frequencies, written through the store (tests.report_files)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from report_files import row, write_result

DC_LEVELS = (4.5, 5.0, 5.5, 6.0, 6.5)
LOADS = (0.01, 0.05, 0.1, 0.2)


def many_point_rows(
    frequencies: int = 100,
    fail_at: int | None = None,
    dc_levels: tuple[float, ...] = DC_LEVELS,
    loads: tuple[float, ...] = LOADS,
) -> list[dict]:
    """One row per (DC, load, frequency), DC slowest; rejection falls 20 dB/decade from
    80 dB at 10 Hz less 2 dB per load step; a lower bound every 37th point; ``fail_at``
    gets 3 dB (under every limit of the demo mask)."""
    rows = []
    freqs = np.logspace(1, 6, frequencies)
    pid = 0
    for dc in dc_levels:
        for j, load in enumerate(loads):
            for f in freqs:
                value = 80.0 - 20.0 * np.log10(f / 10.0) / 2.0 - 2.0 * j + (dc - 5.0)
                extra: dict = {"dc_level": dc, "pin_dc": dc, "load_current": load}
                if pid == fail_at:
                    value = 3.0
                if pid % 37 == 36:
                    extra["bound_db"] = value
                rows.append(row(pid, float(f), float(value), **extra))
                pid += 1
    return rows


def write_many(
    path: Path,
    frequencies: int = 100,
    fail_at: int | None = None,
    dc_levels: tuple[float, ...] = DC_LEVELS,
    loads: tuple[float, ...] = LOADS,
) -> Path:
    rows = many_point_rows(frequencies, fail_at, dc_levels, loads)
    return write_result(path, rows, title="FV-33 long sweep")
