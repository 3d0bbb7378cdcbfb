"""The channel match's share of the budget when no calibration is applied (Type B).

Rejection is the ratio of two scope channels, each read through its own probe. Without a
channel-match calibration, each channel's vertical gain error and each probe's attenuation
error enter the ratio in full: a ratio of two channels does not cancel them, since they are
independent. Each is known only as a tolerance ±a (the bench file's figures, or defaults
from common practice), taken as a rectangular distribution of standard uncertainty a/√3
[GUM, JCGM 100:2008 §4.3.7]; the relative uncertainties of a quotient's factors add in
quadrature [GUM §5.1.6]:

    u_match² = (a_gain,pin² + a_gain,out² + a_probe,pin² + a_probe,out²) / 3

A phase tolerance moves arg H, not |H|: it does not enter the rejection in dB.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from benchseq.analysis.errors import AnalysisError

DEFAULT_GAIN_ACCURACY = (
    0.015  # ±1.5 % per channel: typical vertical gain accuracy is 1–2 % (practice)
)
DEFAULT_PROBE_ACCURACY = 0.01  # ±1 % for an attenuating passive probe (practice)
RECTANGULAR = math.sqrt(3.0)  # a/√3: standard uncertainty of a rectangular ±a [GUM §4.3.7]


@dataclass(frozen=True)
class ChannelTolerances:
    """Half-widths (relative) of the errors an uncalibrated ratio of two channels carries."""

    gain_pin: float = DEFAULT_GAIN_ACCURACY
    gain_output: float = DEFAULT_GAIN_ACCURACY
    probe_pin: float = 0.0
    probe_output: float = 0.0

    def __post_init__(self) -> None:
        for name in ("gain_pin", "gain_output", "probe_pin", "probe_output"):
            value = getattr(self, name)
            if not (math.isfinite(value) and 0.0 <= value < 1.0):
                raise AnalysisError(
                    f"channel tolerance {name} must be a fraction in [0, 1), got {value!r}"
                )

    def terms(self) -> dict[str, float]:
        """Each contribution's relative standard uncertainty a/√3."""
        return {
            "gain_pin": self.gain_pin / RECTANGULAR,
            "gain_output": self.gain_output / RECTANGULAR,
            "probe_pin": self.probe_pin / RECTANGULAR,
            "probe_output": self.probe_output / RECTANGULAR,
        }

    @property
    def uncertainty(self) -> float:
        """u_match: the relative standard uncertainty (k = 1) of the uncalibrated ratio."""
        return math.sqrt(sum(u * u for u in self.terms().values()))
