"""Errors of the measurement core, phrased for the bench engineer."""

from __future__ import annotations

from benchseq.errors import MeasurementFailure


class AnalysisError(MeasurementFailure):
    """A record cannot be analysed as asked (too short, not finite, frequency out of reach)."""


class FitNotConverged(AnalysisError):
    """The frequency-free (four-parameter) fit did not settle."""
