"""Channel-match calibration: the out-channel/pin-channel ratio with both probes on one node.

Stored against frequency; looked up by interpolating log-magnitude and unwrapped phase
linearly in log-frequency; divided out of every measured ratio. Outside the calibrated
span nothing is extrapolated: the lookup says so and the correction is not applied.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from benchseq.analysis.errors import AnalysisError

EDGE_TOLERANCE = 1e-9  # relative: a frequency this close to an end counts as inside


@dataclass(frozen=True)
class CalibrationLookup:
    """Calibration at one frequency: ratio (complex), relative standard uncertainty, inside span."""

    ratio: complex
    uncertainty: float
    inside: bool


@dataclass(frozen=True, eq=False)
class ChannelCalibration:
    """H_cal(f) = V_out-channel/V_pin-channel from a calibration sweep (sorted by frequency)."""

    frequencies: np.ndarray  # Hz, strictly increasing
    ratio: np.ndarray  # complex
    uncertainty: np.ndarray  # relative standard uncertainty of |H_cal|

    @classmethod
    def from_sweep(
        cls, frequencies: object, ratio: object, uncertainty: object = 0.0
    ) -> ChannelCalibration:
        """Validate and sort a calibration sweep (uncertainty: one value or one per point)."""
        f = np.asarray(frequencies, dtype=float).ravel()
        h = np.asarray(ratio, dtype=complex).ravel()
        u = np.broadcast_to(np.asarray(uncertainty, dtype=float), f.shape).copy()
        if f.size == 0 or f.size != h.size:
            raise AnalysisError(f"calibration: {f.size} frequencies but {h.size} ratios")
        if not (np.all(np.isfinite(f)) and np.all(f > 0)):
            raise AnalysisError("calibration: frequencies must be positive Hz")
        if not (np.all(np.isfinite(h)) and np.all(h != 0)):
            raise AnalysisError(
                "calibration: every ratio must be a finite, non-zero complex number"
            )
        if not (np.all(np.isfinite(u)) and np.all(u >= 0)):
            raise AnalysisError("calibration: uncertainties must be non-negative")
        order = np.argsort(f)
        f, h, u = f[order], h[order], u[order]
        if np.any(np.diff(f) <= 0):
            raise AnalysisError("calibration: a frequency appears twice in the sweep")
        return cls(f, h, u)

    @property
    def span(self) -> tuple[float, float]:
        """Lowest and highest calibrated frequency (Hz)."""
        return float(self.frequencies[0]), float(self.frequencies[-1])

    def covers(self, frequency: float) -> bool:
        """True when ``frequency`` lies inside the calibrated span (no extrapolation beyond)."""
        lo, hi = self.span
        return lo * (1 - EDGE_TOLERANCE) <= frequency <= hi * (1 + EDGE_TOLERANCE)

    def lookup(self, frequency: float) -> CalibrationLookup:
        """Interpolated H_cal at ``frequency``; NaN ratio and inside=False outside the span."""
        if not self.covers(frequency):
            return CalibrationLookup(complex(np.nan, np.nan), float("nan"), False)
        logf = np.log(self.frequencies)
        at = np.log(frequency)
        log_mag = np.interp(at, logf, np.log(np.abs(self.ratio)))
        phase = np.interp(at, logf, np.unwrap(np.angle(self.ratio)))
        u = np.interp(at, logf, self.uncertainty)
        return CalibrationLookup(complex(np.exp(log_mag + 1j * phase)), float(u), True)

    def correct(self, ratio: complex, frequency: float) -> tuple[complex, float, bool]:
        """(H_meas/H_cal, u_cal, True) inside the span; (H_meas unchanged, 0, False) outside."""
        found = self.lookup(frequency)
        if not found.inside:
            return complex(ratio), 0.0, False
        return complex(ratio) / found.ratio, found.uncertainty, True
