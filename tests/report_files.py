"""Result files for report tests, written with benchseq.store.RunWriter: full rows built
from records.POINT_COLUMNS, chosen values per point, optional extra columns, any status."""

from __future__ import annotations

import math
import uuid
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from benchseq.records import POINT_COLUMNS
from benchseq.store import Column, RunWriter

ROOT = Path(__file__).resolve().parents[1]
DEMO_PLAN = ROOT / "plans" / "demo.toml"

REPEAT_OF = Column(
    "repeat_of", "i8", "", "sweep point this row repeats at another ripple (-1: none)"
)
RIPPLE_FACTOR = Column("ripple_factor", "f8", "", "ripple of this row / the planned ripple")
FLOOR_OUTPUT = Column("floor_output", "f8", "V", "generator-off output amplitude, peak")
FLOOR_PIN = Column("floor_pin", "f8", "V", "generator-off pin amplitude, peak")
_STORED = {c.name for c in POINT_COLUMNS}
SOON_COLUMNS = tuple(
    c for c in (REPEAT_OF, RIPPLE_FACTOR, FLOOR_OUTPUT, FLOOR_PIN) if c.name not in _STORED
)  # the linearity and floor columns, for as long as records.POINT_COLUMNS lacks them
# a plan title that tries to run script in a report
HOSTILE_TITLE = (
    '<script>window.pwned=1;document.title="pwned"</script>"><img src=x onerror="window.pwned=2">'
)


def plan_text(title: str | None = None) -> str:
    """The demo plan's text, with another title if given (TOML basic-string escaped)."""
    text = DEMO_PLAN.read_text(encoding="utf-8")
    if title is None:
        return text
    quoted = title.replace("\\", "\\\\").replace('"', '\\"')
    lines = [
        f'title = "{quoted}"' if line.startswith("title = ") else line for line in text.splitlines()
    ]
    return "\n".join(lines) + "\n"


def row(point_id: int, frequency: float, rejection_db: float, **values: Any) -> dict[str, Any]:
    """A complete row: pin 50 mV peak, output from ``rejection_db``; ``values`` override.

    ``bound_db=x`` makes the point a lower bound (rejection and uncertainty nan)."""
    pin = 0.05 + 0j
    bound = values.pop("bound_db", math.nan)
    is_bound = math.isfinite(bound)
    out_mag = pin.real / 10 ** (rejection_db / 20) if math.isfinite(rejection_db) else 0.0
    output = out_mag * np.exp(1j * math.radians(30.0))
    base: dict[str, Any] = {
        "point_id": point_id,
        "frequency_planned": frequency,
        "frequency": frequency,
        "frequency_fitted": frequency,
        "ripple_target": 0.05,
        "ripple_convention": "pp",
        "dc_level": 5.0,
        "load_current": math.nan,
        "generator_pp": 0.105,
        "pin": pin,
        "pin_sigma": 1e-5,
        "output": output,
        "output_sigma": 1e-7,
        "output_floor": 1e-7,
        "output_noise": 1e-6,
        "ratio": output / pin,
        "rejection_db": math.nan if is_bound else rejection_db,
        "uncertainty_db": math.nan if is_bound else 0.1,
        "bound_db": bound,
        "rejection_input_db": math.nan,
        "bound_input_db": math.nan,
        "is_bound": is_bound,
        "match_uncertainty": 0.0135,
        "pin_model": pin,
        "pin_model_ratio_db": 0.0,
        "thd": 0.001,
        "pin_dc": 5.0,
        "supply_current": 0.01,
        "pin_range": 0.8,
        "output_range": 0.008,
        "sample_interval": 1e-6,
        "record_length": 10000,
        "averages": 1,
        "captures": 2,
        "trims": 0,
        "bench_time": 0.5,
        "started_at": 1.7e9 + point_id,
        "stored_at": 1.7e9 + point_id + 0.5,
        "flags": "bound not_detected" if is_bound else "",
        "repeat_of": -1,
        "ripple_factor": 1.0,
        "floor_output": math.nan,
        "floor_pin": math.nan,
    }
    base.update(values)
    return base


def write_result(
    path: Path,
    rows: Iterable[Mapping[str, Any]],
    *,
    title: str = "Fernhollow FV-33 check",
    status: str | None = "complete",
    point_count: int | None = None,
    columns: Sequence[Column] = POINT_COLUMNS,
    meta: Mapping[str, Any] | None = None,
) -> Path:
    """Write a result file; ``status=None`` leaves it as an interrupted run ("running" with no writer: read as "interrupted")."""
    rows = list(rows)
    items: dict[str, Any] = {
        "run_id": str(uuid.uuid4()),
        "status": "running",
        "started": "2026-03-04T09:10:11+00:00",
        "title": title,
        "device": "FV-33 regulator evaluation board",
        "operator": "T. Varga-Holm",
        "plan_source": "plans/fv33.toml",
        "plan_text": plan_text(title),
        "bench_source": "benches/bay2.toml",
        "bench_name": "Fernhollow validation lab, bay 2",
        "simulated": False,
        "point_count": len(rows) if point_count is None else point_count,
        "identities": {"scope": "Fernhollow,SCOPE-1,0001,1.0"},
        "usable_band_hz": [15.0, 1.4e6],
    }
    items.update(meta or {})
    writer = RunWriter.create(path, items, columns)
    names = {c.name for c in columns}
    for r in rows:
        writer.append(int(r["point_id"]), {k: v for k, v in r.items() if k in names})
    if status is None:
        writer.close()
    else:
        writer.finish(status, reason=f"test run {status}")
    return path
