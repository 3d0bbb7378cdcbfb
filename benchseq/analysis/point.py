"""One measured point: refine on the pin, fit both channels, floor, rejection, flags."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from benchseq.analysis.calibration import ChannelCalibration
from benchseq.analysis.codes import CodeCheck, RangeVerdict, check_codes
from benchseq.analysis.distortion import (
    DEFAULT_ORDERS,
    HarmonicFit,
    harmonics_from_fit,
)
from benchseq.analysis.distortion import harmonic_orders as orders_below_nyquist
from benchseq.analysis.errors import AnalysisError
from benchseq.analysis.floor import (
    DEFAULT_DETECTION_K,
    DEFAULT_NEIGHBOURS,
    NoiseFloor,
    floor_frequencies,
    floor_from_projection,
    value_threshold,
    widened_quantile,
)
from benchseq.analysis.refine import DEFAULT_MIN_SNR, FrequencyRefinement, refine_frequency
from benchseq.analysis.rejection import BOUND_Z, Rejection, rejection
from benchseq.analysis.sinefit import (
    SineFit,
    as_records,
    fit_projected,
    fit_sines_projected,
    project_records,
)

MIN_FLOOR_NEIGHBOURS = 4  # fewer neighbour fits than this: use the fit's own σ_c instead


@dataclass(frozen=True)
class ChannelCodes:
    """Raw converter codes of one channel, for clipping and resolution checks."""

    codes: np.ndarray
    code_min: int
    code_max: int
    volts_per_code: float  # V at the probe tip per code
    full_scale: float | None = None  # present range, pp V
    ranges: Sequence[float] | None = None  # offered ranges, pp V (same scale as full_scale)


@dataclass(frozen=True)
class PointMeasurement:
    """Everything a point stores: both fits, the floor, the rejection and flags (strings)."""

    pin: SineFit
    output: SineFit
    frequency: float  # Hz the fits used (refined on the pin, else the generator's)
    refinement: FrequencyRefinement
    output_floor: float  # σ_c of the output at f (V): detection, bound and the value's u
    floor: NoiseFloor | None
    rejection: Rejection
    harmonics: HarmonicFit | None
    thd: float  # of the pin ripple (ratio); NaN when not fitted
    pin_codes: CodeCheck | None
    output_codes: CodeCheck | None
    calibrated: bool
    flags: tuple[str, ...]
    calibration_uncertainty: float = 0.0  # relative, of the channel match divided out
    match_uncertainty: float = 0.0  # relative u of the channel match in the budget (k = 1)
    value_threshold: float = DEFAULT_DETECTION_K  # A_out/σ_c a value needed here

    @property
    def output_sigma(self) -> float:
        """Standard uncertainty of the output amplitude (V): the noise at f, σ_c (the spread
        of a fitted amplitude well above the floor is σ_c per quadrature)."""
        return self.output_floor

    def to_row(self) -> dict[str, Any]:
        """Plain values for a results table (complex phasors, floats, a space-separated flag string)."""
        rej = self.rejection
        return {
            "frequency_fitted": self.frequency,
            "pin": self.pin.phasor,
            "pin_sigma": self.pin.amplitude_sigma,
            "output": self.output.phasor,
            "output_sigma": self.output_sigma,
            "output_floor": self.output_floor,
            "ratio": rej.ratio,
            "rejection_db": rej.rejection_db,
            "uncertainty_db": rej.uncertainty_db,
            "bound_db": rej.bound_db,
            "lower_db": rej.lower_db,
            "is_bound": rej.is_bound,
            "thd": self.thd,
            "match_uncertainty": self.match_uncertainty,
            "flags": " ".join(self.flags),
        }


def _average(volts: object, name: str) -> np.ndarray:
    """One record from one or several triggered records (sample-wise mean)."""
    arr = as_records(volts, name)
    return arr.mean(axis=0) if arr.shape[0] > 1 else arr[0]


def measure_point(
    pin_volts: object,
    out_volts: object,
    sample_interval: float,
    frequency: float,
    t0: float = 0.0,
    pin_codes: ChannelCodes | None = None,
    out_codes: ChannelCodes | None = None,
    calibration: ChannelCalibration | None = None,
    refine: bool = True,
    harmonic_orders: Sequence[int] | None = DEFAULT_ORDERS,
    neighbours: int = DEFAULT_NEIGHBOURS,
    detection_k: float = DEFAULT_DETECTION_K,
    z: float = BOUND_Z,
    min_refine_snr: float = DEFAULT_MIN_SNR,
    channel_match: float | None = None,
) -> PointMeasurement:
    """Refine on the pin → fit both channels → output floor → rejection, with flags.

    pin_volts, out_volts: one record (N,) or several triggered records (M, N), volts at the
    probe tips, on one time axis (t0 = time of the first sample from the trigger).
    Flags: "clipped_pin"/"clipped_output", "unresolved_pin"/"unresolved_output",
    "small_pin"/"small_output" (few codes used), "unrefined_<reason>", "not_detected",
    "outside_calibration", "floor_from_residual", "uncalibrated".

    channel_match: the relative standard uncertainty of the channel match without a
    calibration (ChannelTolerances.uncertainty); where no calibration is applied it enters
    the budget and the point is flagged "uncalibrated". None: the caller vouches for matched
    channels (synthetic records) and no term is added.
    detection_k: the least value threshold (A_out/σ_c); value_threshold raises it when the
    floor rests on few neighbours.
    """
    if not (math.isfinite(sample_interval) and sample_interval > 0):
        raise AnalysisError(
            f"sample interval must be a positive number of seconds, got {sample_interval!r}"
        )
    pin = _average(pin_volts, "pin channel")
    out = _average(out_volts, "output channel")
    if pin.size != out.size:
        raise AnalysisError(
            f"pin and output records differ in length ({pin.size} vs {out.size} samples)"
        )
    rate = 1.0 / sample_interval
    flags: list[str] = []
    checks: dict[str, CodeCheck | None] = {}
    for label, chan in (("pin", pin_codes), ("output", out_codes)):
        if chan is None:
            checks[label] = None
            continue
        found = check_codes(
            chan.codes,
            chan.code_min,
            chan.code_max,
            chan.volts_per_code,
            chan.full_scale,
            chan.ranges,
        )
        checks[label] = found
        if found.verdict is RangeVerdict.CLIPPED:
            flags.append(f"clipped_{label}")
        elif found.verdict is RangeVerdict.UNRESOLVED:
            flags.append(f"unresolved_{label}")
        elif found.verdict is RangeVerdict.TOO_SMALL:
            flags.append(f"small_{label}")

    if refine:
        refinement = refine_frequency(pin, rate, frequency, t0, min_snr=min_refine_snr)
        if not refinement.refined:
            flags.append(f"unrefined_{refinement.reason}")
    else:
        refinement = FrequencyRefinement(frequency, False, "off", math.nan)
    f_fit = refinement.frequency

    # one pass over each channel: the pin's at [f, harmonics], the output's at [f,
    # harmonics, neighbours]; every fit below is solved from those projections
    kept = orders_below_nyquist(f_fit, rate, harmonic_orders) if harmonic_orders else ()
    pin_pass = project_records(as_records(pin), rate, [f_fit, *(k * f_fit for k in kept)], t0)
    harmonics = None
    thd = math.nan
    if harmonic_orders:
        harmonics = harmonics_from_fit(fit_sines_projected(pin_pass), kept)
        thd = harmonics.thd
    pin_fit = fit_projected(pin_pass, 0)
    known, near = floor_frequencies(f_fit, out.size, rate, neighbours)
    out_pass = project_records(as_records(out), rate, np.concatenate([known, near]), t0)
    out_fit = fit_projected(out_pass, 0)

    floor: NoiseFloor | None = None
    try:
        floor = floor_from_projection(out_pass, known.size)
    except AnalysisError:
        floor = None
    if floor is not None and floor.used >= MIN_FLOOR_NEIGHBOURS:
        sigma = floor.sigma
        z = widened_quantile(z, 2 * floor.used)
        threshold = value_threshold(2 * floor.used, detection_k)
    else:
        sigma = out_fit.quadrature_sigma
        flags.append("floor_from_residual")
        threshold = value_threshold(math.inf, detection_k)

    cal_ratio, cal_u, calibrated = 1.0 + 0.0j, 0.0, False
    if calibration is not None:
        cal = calibration.lookup(f_fit)
        if cal.inside:
            cal_ratio, cal_u, calibrated = cal.ratio, cal.uncertainty, True
        else:
            flags.append("outside_calibration")
    match_u = cal_u
    if not calibrated and channel_match is not None:
        if not (math.isfinite(channel_match) and channel_match >= 0):
            raise AnalysisError(f"channel match uncertainty must be ≥ 0, got {channel_match!r}")
        match_u = float(channel_match)
        flags.append("uncalibrated")

    limit = 0.0
    out_check = checks["output"]
    if (
        out_check is not None
        and out_check.verdict is RangeVerdict.UNRESOLVED
        and out_codes is not None
    ):
        # all samples within two adjacent codes: the true peak is below one code step
        limit = abs(out_codes.volts_per_code)
    rej = rejection(
        pin_fit,
        out_fit,
        sigma,
        cal_ratio,
        match_u,
        threshold,
        z,
        output_limit=limit,
        calibrated=calibrated,
    )
    if rej.is_bound:
        flags.append("not_detected")
    return PointMeasurement(
        pin=pin_fit,
        output=out_fit,
        frequency=f_fit,
        refinement=refinement,
        output_floor=sigma,
        floor=floor,
        rejection=rej,
        harmonics=harmonics,
        thd=thd,
        pin_codes=checks["pin"],
        output_codes=out_check,
        calibrated=calibrated,
        flags=tuple(dict.fromkeys(flags)),
        calibration_uncertainty=cal_u,
        match_uncertainty=match_u,
        value_threshold=threshold,
    )
