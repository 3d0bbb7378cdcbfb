"""Measurement core: sine fits, noise floor, rejection, capture planning (numpy only, no I/O).

Conventions: SI units; amplitudes are peak volts; phasors are A·e^{jθ} for A·cos(ωt + θ);
rejection is 20·log10(|V_pin|/|V_out|), positive when the device attenuates, and the stored
ratio is H = V_out/V_pin.
"""

from benchseq.analysis.calibration import CalibrationLookup, ChannelCalibration
from benchseq.analysis.capture import (
    DEFAULT_FREQUENCY_TOLERANCE,
    CapturePlan,
    ScopeLimits,
    ScopeTimebase,
    at_frequency,
    coherent_frequency,
    plan_capture,
)
from benchseq.analysis.codes import CodeCheck, RangeVerdict, check_codes, suggest_range
from benchseq.analysis.distortion import HarmonicFit, fit_harmonics
from benchseq.analysis.errors import AnalysisError, FitNotConverged
from benchseq.analysis.floor import (
    DEFAULT_DETECTION_K,
    NoiseFloor,
    is_detected,
    neighbour_frequencies,
    noise_floor,
    value_threshold,
    widened_quantile,
)
from benchseq.analysis.match import ChannelTolerances
from benchseq.analysis.point import ChannelCodes, PointMeasurement, measure_point
from benchseq.analysis.refine import (
    FreeSineFit,
    FrequencyRefinement,
    fit_sine_free,
    refine_frequency,
)
from benchseq.analysis.rejection import (
    BOUND_Z,
    DB_PER_NEPER,
    Rejection,
    db_uncertainty,
    lower_bound_db,
    ratio_db,
    rejection,
)
from benchseq.analysis.sinefit import (
    MultiSineFit,
    SineFit,
    SineFitBatch,
    fit_sine,
    fit_sine_batch,
    fit_sines,
)

__all__ = [
    "BOUND_Z",
    "DB_PER_NEPER",
    "DEFAULT_DETECTION_K",
    "DEFAULT_FREQUENCY_TOLERANCE",
    "AnalysisError",
    "CalibrationLookup",
    "CapturePlan",
    "ChannelCalibration",
    "ChannelCodes",
    "ChannelTolerances",
    "CodeCheck",
    "FitNotConverged",
    "FreeSineFit",
    "FrequencyRefinement",
    "HarmonicFit",
    "MultiSineFit",
    "NoiseFloor",
    "PointMeasurement",
    "RangeVerdict",
    "Rejection",
    "ScopeLimits",
    "ScopeTimebase",
    "SineFit",
    "SineFitBatch",
    "at_frequency",
    "check_codes",
    "coherent_frequency",
    "db_uncertainty",
    "fit_harmonics",
    "fit_sine",
    "fit_sine_batch",
    "fit_sine_free",
    "fit_sines",
    "is_detected",
    "lower_bound_db",
    "measure_point",
    "neighbour_frequencies",
    "noise_floor",
    "plan_capture",
    "ratio_db",
    "refine_frequency",
    "rejection",
    "suggest_range",
    "value_threshold",
    "widened_quantile",
]
