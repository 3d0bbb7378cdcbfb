"""Clipping and range checks from the converter's raw codes, and range suggestions."""

from __future__ import annotations

import enum
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from benchseq.analysis.errors import AnalysisError

DEFAULT_FILL = (
    0.7  # aim a sine's peak-to-peak at this fraction of full scale (common practice: 50–80 %)
)
MIN_USEFUL_SPAN = 0.1  # a record using less than this fraction of the codes wastes resolution
UNRESOLVED_SPAN_CODES = 1  # two adjacent codes at most: the quantiser hides the waveform
_CLIP_ESTIMATE_CAP = 0.9


class RangeVerdict(enum.Enum):
    """How well a record sits in the converter's range."""

    CLIPPED = "clipped"
    UNRESOLVED = "unresolved"  # too small to resolve: all samples in one or two adjacent codes
    TOO_SMALL = "too_small"  # resolvable but using little of the range
    FINE = "fine"


@dataclass(frozen=True)
class CodeCheck:
    """What the raw codes say: rail hits, span used, verdict and the range to use next."""

    verdict: RangeVerdict
    clipped_fraction: float  # fraction of samples at either extreme code
    span_codes: int  # max − min code seen
    span_fraction: float  # span over the converter's full code span
    suggested_range: (
        float | None
    )  # full-scale peak-to-peak (V) to use next; None if no ranges given
    estimated_peak_to_peak: (
        float | None
    )  # V, from the codes (corrected for clipping); None without scaling

    @property
    def flag(self) -> str:
        """'' when fine, else the verdict's name (for a point's flag list)."""
        return "" if self.verdict is RangeVerdict.FINE else self.verdict.value


def suggest_range(
    peak_to_peak: float, ranges: Sequence[float], fill: float = DEFAULT_FILL
) -> float:
    """The smallest full-scale range (pp V) that holds ``peak_to_peak`` at ≤ ``fill`` of it.

    Returns the largest range when none is big enough (the caller then sees clipping again).
    """
    options = sorted(float(r) for r in ranges)
    if not options:
        raise AnalysisError("no input ranges given to choose from")
    for full_scale in options:
        if peak_to_peak <= fill * full_scale:
            return full_scale
    return options[-1]


def check_codes(
    codes: object,
    code_min: int,
    code_max: int,
    volts_per_code: float | None = None,
    full_scale: float | None = None,
    ranges: Sequence[float] | None = None,
    fill: float = DEFAULT_FILL,
) -> CodeCheck:
    """Verdict on a record of raw codes from a converter spanning code_min…code_max.

    With ``volts_per_code``, ``full_scale`` (present range, pp V) and ``ranges`` it also
    suggests the next range: for a clipped sine the true amplitude is estimated from the
    fraction of time at the rails (a sine of peak A clipped at L spends 2·acos(L/A)/π of
    its time beyond ±L), capped so a badly clipped record at least steps well up.
    """
    arr = np.asarray(codes)
    if arr.size == 0:
        raise AnalysisError("no codes to check: the waveform is empty")
    if code_max <= code_min:
        raise AnalysisError(f"converter code span {code_min}…{code_max} is empty")
    low, high = int(arr.min()), int(arr.max())
    at_rails = np.count_nonzero((arr <= code_min) | (arr >= code_max))
    clipped = at_rails / arr.size
    span = high - low
    span_fraction = span / (code_max - code_min)
    if clipped > 0:
        verdict = RangeVerdict.CLIPPED
    elif span <= UNRESOLVED_SPAN_CODES:
        verdict = RangeVerdict.UNRESOLVED
    elif span_fraction < MIN_USEFUL_SPAN:
        verdict = RangeVerdict.TOO_SMALL
    else:
        verdict = RangeVerdict.FINE
    estimate = None
    suggestion = None
    if volts_per_code is not None:
        pp = (span + 1) * abs(volts_per_code)
        if verdict is RangeVerdict.CLIPPED:
            pp = pp / math.cos(math.pi * min(clipped, _CLIP_ESTIMATE_CAP) / 2.0)
        estimate = pp
        if ranges:
            suggestion = suggest_range(pp, ranges, fill)
            if (
                verdict is RangeVerdict.CLIPPED
                and full_scale is not None
                and suggestion <= full_scale
            ):
                bigger = [r for r in sorted(ranges) if r > full_scale]
                suggestion = bigger[0] if bigger else max(ranges)
    return CodeCheck(verdict, clipped, span, span_fraction, suggestion, estimate)
