"""Pass/fail of a run's points against its plan's mask: one rule, used by reports and `show`.

The decision rule (common practice for a limit check on a measured value, often called
"simple acceptance": the measured value decides and its uncertainty is stated beside it):

- The limit at a point is ``mask.limit_at(frequency)``: straight in dB over log frequency
  between the mask's points, none outside its span (such points are "no limit").
- A measured value passes when ``rejection_db >= limit`` and fails otherwise. The expanded
  uncertainty U = k·u (k = 2, about 95 % coverage for a normal distribution) is not used to
  move the limit; ``straddles`` marks the points whose interval rejection ± U contains the
  limit, where the decision would flip within the uncertainty.
- A lower bound (``is_bound``: the output was under the floor, the true rejection is at
  least ``bound_db``) passes when ``bound_db >= limit`` (true ≥ bound ≥ limit). A bound under
  the limit cannot decide: "undetermined", never a fail.
- A point with neither a value nor a bound inside the span is "undetermined".
- The run: "fail" if any point fails; else "undetermined" if any point is undetermined or
  no point lies inside the span; else "pass". Without a mask: "no mask".
- A run that stored fewer points than planned (stopped, aborted, interrupted, or still
  running) is judged on its stored points only and says so: "PASS so far (incomplete run:
  1 of 16 planned points stored)". A fail stays a fail; a pass can still turn into a fail.

The worst margin is the smallest ``value - limit`` among the points that decide (values, and
bounds that pass; for a bound it is itself a lower bound of the true margin).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

COVERAGE_FACTOR = 2.0
STATUSES = ("pass", "fail", "undetermined", "no mask")
OUTCOMES = ("pass", "fail", "undetermined", "no limit")
VERDICT_COLUMNS = (
    "point_id",
    "frequency",
    "limit_db",
    "value_db",
    "is_bound",
    "margin_db",
    "outcome",
    "straddles",
)


@dataclass(frozen=True)
class MaskVerdict:
    """The run's status against a mask and the per-point table (VERDICT_COLUMNS)."""

    status: str  # one of STATUSES
    mask_name: str
    worst_margin_db: float  # dB; nan when no point decides
    worst_point_id: int | None
    worst_is_bound: bool
    points: pd.DataFrame = field(repr=False)
    coverage_factor: float = COVERAGE_FACTOR
    planned: int | None = None  # points the plan has (None: unknown)

    @property
    def incomplete(self) -> bool:
        """True when fewer points are stored than the plan has."""
        return self.planned is not None and len(self.points) < self.planned

    def _status_words(self) -> str:
        words = self.status.upper()
        if self.incomplete and self.status in ("pass", "undetermined"):
            words += " so far"
        return words

    def progress(self) -> str:
        """'incomplete run: 1 of 16 planned points stored' ('' when complete or unknown)."""
        if not self.incomplete:
            return ""
        return f"incomplete run: {len(self.points)} of {self.planned} planned points stored"

    def count(self, outcome: str) -> int:
        """How many points have ``outcome`` (one of OUTCOMES)."""
        return int((self.points["outcome"] == outcome).sum())

    @property
    def straddling(self) -> int:
        """Points whose expanded-uncertainty interval contains the limit."""
        return int(self.points["straddles"].sum())

    def worst_frequency(self) -> float:
        """Frequency (Hz) of the worst point, nan without one."""
        if self.worst_point_id is None:
            return math.nan
        rows = self.points[self.points["point_id"] == self.worst_point_id]
        return float(rows["frequency"].iloc[0]) if len(rows) else math.nan

    def short(self) -> str:
        """'PASS, worst margin +11.79 dB at 1 MHz (point 15)' (a few words for a plot)."""
        if self.status == "no mask":
            return "no mask"
        text = self._status_words()
        if self.incomplete:
            text += f" ({len(self.points)} of {self.planned} points)"
        if math.isfinite(self.worst_margin_db):
            bound = "≥ " if self.worst_is_bound else ""
            text += (
                f", worst margin {bound}{self.worst_margin_db:+.2f} dB at "
                f"{_hz_text(self.worst_frequency())} (point {self.worst_point_id})"
            )
        if self.count("undetermined"):
            text += f", {self.count('undetermined')} undetermined"
        return text

    def summary(self) -> str:
        """One sentence: status, counts and the worst margin."""
        if self.status == "no mask":
            return "no mask: the plan sets no pass/fail limit"
        name = f' "{self.mask_name}"' if self.mask_name else ""
        judged = len(self.points) - self.count("no limit")
        parts = [f"{self._status_words()} against mask{name}"]
        if self.incomplete:
            parts.append(self.progress())
        if not len(self.points):
            parts.append("no points stored")
        elif judged == 0:
            parts.append("no point lies inside the mask's frequency span")
        else:
            counts = [f"{self.count('pass')} pass", f"{self.count('fail')} fail"]
            if self.count("undetermined"):
                counts.append(f"{self.count('undetermined')} undetermined (bound under the limit)")
            parts.append(f"{judged} points under the mask: " + ", ".join(counts))
        if math.isfinite(self.worst_margin_db):
            at = self.worst_frequency()
            bound = "≥ " if self.worst_is_bound else ""
            parts.append(
                f"worst margin {bound}{self.worst_margin_db:+.2f} dB "
                f"(point {self.worst_point_id}, {_hz_text(at)})"
            )
        if self.straddling:
            parts.append(
                f"{self.straddling} within the expanded uncertainty (k = "
                f"{self.coverage_factor:g}) of the limit"
            )
        return "; ".join(parts)

    def to_dict(self) -> dict[str, Any]:
        """Plain types for JSON output."""
        return {
            "status": self.status,
            "mask": self.mask_name,
            "worst_margin_db": None
            if not math.isfinite(self.worst_margin_db)
            else self.worst_margin_db,
            "worst_point_id": self.worst_point_id,
            "worst_is_bound": self.worst_is_bound,
            "coverage_factor": self.coverage_factor,
            "complete": not self.incomplete,
            "points_stored": len(self.points),
            "points_planned": self.planned,
            "counts": {o: self.count(o) for o in OUTCOMES},
            "straddling": self.straddling,
            "points": [
                {k: _plain(v) for k, v in row.items()}
                for row in self.points.to_dict(orient="records")
            ],
        }


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _hz_text(frequency: float) -> str:
    from benchseq.units import format_si

    return format_si(frequency, "Hz", 4)


def _column(frame: pd.DataFrame, name: str, default: Any) -> np.ndarray:
    if name in frame.columns:
        return frame[name].to_numpy()
    return np.full(len(frame), default)


def mask_verdict(
    mask: Any, frame: pd.DataFrame, k: float = COVERAGE_FACTOR, planned: int | None = None
) -> MaskVerdict:
    """Judge every row of ``frame`` (read_results columns) against ``mask`` (a plan Mask or None).

    ``planned``: how many points the plan has; fewer rows make the verdict incomplete.

    Uses ``frequency`` (the frequency actually set; ``frequency_planned`` when absent),
    ``rejection_db``, ``uncertainty_db``, ``bound_db`` and ``is_bound``."""
    n = len(frame)
    point_id = _column(frame, "point_id", -1).astype(np.int64)
    freq_name = "frequency" if "frequency" in frame.columns else "frequency_planned"
    frequency = _column(frame, freq_name, np.nan).astype(float)
    is_bound = _column(frame, "is_bound", False).astype(bool)
    rejection = _column(frame, "rejection_db", np.nan).astype(float)
    uncertainty = _column(frame, "uncertainty_db", np.nan).astype(float)
    bound = _column(frame, "bound_db", np.nan).astype(float)
    value = np.where(is_bound, bound, rejection)

    if mask is None:
        limit = np.full(n, np.nan)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            limit = np.asarray(mask.limit_at(frequency), dtype=float).reshape(n)
    margin = value - limit
    has_limit = np.isfinite(limit)
    known = np.isfinite(value)
    with np.errstate(invalid="ignore"):
        meets = margin >= 0
    outcome = np.full(n, "no limit", dtype=object)
    outcome[has_limit & known & meets] = "pass"
    outcome[has_limit & known & ~meets & ~is_bound] = "fail"
    outcome[has_limit & known & ~meets & is_bound] = "undetermined"
    outcome[has_limit & ~known] = "undetermined"
    with np.errstate(invalid="ignore"):
        straddles = (
            has_limit
            & known
            & ~is_bound
            & np.isfinite(uncertainty)
            & (np.abs(margin) < k * uncertainty)
        )
    points = pd.DataFrame(
        {
            "point_id": point_id,
            "frequency": frequency,
            "limit_db": limit,
            "value_db": value,
            "is_bound": is_bound,
            "margin_db": np.where(has_limit, margin, np.nan),
            "outcome": outcome.astype(str),
            "straddles": straddles,
        },
        columns=list(VERDICT_COLUMNS),
    )
    if mask is None:
        return MaskVerdict("no mask", "", math.nan, None, False, points, k, planned)

    deciding = (outcome == "pass") | (outcome == "fail")
    worst_margin, worst_id, worst_bound = math.nan, None, False
    if deciding.any():
        candidates = np.where(deciding, margin, np.inf)
        i = int(np.argmin(candidates))
        worst_margin, worst_id, worst_bound = float(margin[i]), int(point_id[i]), bool(is_bound[i])
    if (outcome == "fail").any():
        status = "fail"
    elif (outcome == "undetermined").any() or not has_limit.any():
        status = "undetermined"
    else:
        status = "pass"
    return MaskVerdict(
        status,
        str(getattr(mask, "name", "") or ""),
        worst_margin,
        worst_id,
        worst_bound,
        points,
        k,
        planned,
    )
