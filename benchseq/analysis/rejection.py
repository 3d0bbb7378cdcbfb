"""Rejection from two fitted channels: value with GUM uncertainty, or a lower bound.

Rejection in dB = 20·log10(|V_pin|/|V_out|), positive when the device attenuates; the
complex ratio H = V_out/V_pin is what is stored. Standard uncertainty by the law of
propagation for a product/quotient [GUM, JCGM 100:2008 §5.1.2, §5.1.6]:
u_dB = (20/ln 10)·√(u_rel,pin² + u_rel,out² + u_match²), u_rel,out = σ_c/A_out with σ_c the
output's noise at f (the neighbour floor), u_match the channel match: a calibration's
stored u, or without one the Type B term of the channels' and probes' tolerances
(benchseq.analysis.match). The result is a value only where A_out/σ_c reaches the value
threshold (benchseq.analysis.floor.value_threshold: the bias left in the dB value is under
u/4 and noise alone passes at most 1e-4 of the time); otherwise it is a lower bound
20·log10(A_pin/(A_out + z·σ_c)), z = 1.645, which holds with ≥ 95 % one-sided coverage for
every true output amplitude.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from benchseq.analysis.errors import AnalysisError
from benchseq.analysis.floor import DEFAULT_DETECTION_K, is_detected
from benchseq.analysis.sinefit import SineFit

DB_PER_NEPER = 20.0 / math.log(10.0)  # 8.6859 dB per unit relative change in amplitude
BOUND_Z = 1.645  # one-sided 95 % normal quantile


def ratio_db(pin_amplitude: float, output_amplitude: float) -> float:
    """20·log10(pin/output): +60 dB for 100 mV over 100 µV."""
    return 20.0 * math.log10(pin_amplitude / output_amplitude)


def db_uncertainty(*relative: float) -> float:
    """Standard uncertainty in dB of a ratio whose factors have these relative uncertainties."""
    return DB_PER_NEPER * math.sqrt(sum(u * u for u in relative))


def lower_bound_db(
    pin_amplitude: float, output_amplitude: float, sigma: float, z: float = BOUND_Z
) -> float:
    """One-sided lower limit on rejection: 20·log10(A_pin/(A_out + z·σ_c))."""
    return ratio_db(pin_amplitude, output_amplitude + z * sigma)


@dataclass(frozen=True)
class Rejection:
    """Rejection at one point. ``kind`` is "value" or "bound" — a bound is never a value.

    kind "value": rejection_db, uncertainty_db (standard, k = 1), interval_db (k = 1 ends
    computed in linear units, so asymmetric at low SNR) and phase (arg H, rad) are set;
    bound_db is NaN. kind "bound": rejection_db, uncertainty_db, interval_db and phase are
    NaN and bound_db holds "rejection ≥ bound_db". lower_db, the one-sided 95 % lower
    limit, is set in both cases. ratio is the measured complex H = V_out/V_pin after
    channel calibration, in both cases.
    """

    kind: str
    ratio: complex
    rejection_db: float
    uncertainty_db: float
    interval_db: tuple[float, float]
    phase: float
    bound_db: float
    lower_db: float
    output_snr: float  # A_out/σ_c
    calibrated: bool

    @property
    def is_bound(self) -> bool:
        return self.kind == "bound"

    def describe(self) -> str:
        """'62.31 ± 0.08 dB' or '≥ 92.1 dB' (for logs; reports format their own)."""
        if self.is_bound:
            return f"≥ {self.bound_db:.1f} dB"
        return f"{self.rejection_db:.2f} ± {self.uncertainty_db:.2f} dB"


def rejection(
    pin: SineFit,
    output: SineFit,
    output_sigma: float | None = None,
    calibration_ratio: complex = 1.0 + 0.0j,
    calibration_uncertainty: float = 0.0,
    detection_k: float = DEFAULT_DETECTION_K,
    z: float = BOUND_Z,
    output_limit: float = 0.0,
    calibrated: bool = False,
) -> Rejection:
    """Rejection from the pin and output fits (same frequency, same time axis).

    output_sigma: σ_c of the output at f (e.g. NoiseFloor.sigma); the fit's own
    quadrature_sigma when None. calibration_ratio/uncertainty: the channel match H_cal
    (out-channel/pin-channel) and its relative standard uncertainty, divided out.
    output_limit: an upper limit on the true output amplitude that the noise cannot show
    (e.g. one LSB when the quantiser hides the signal); a non-zero limit forces a bound.
    The output's Rice bias (A² reads 2σ_c² high) is removed before converting a value
    [GUM §3.2.4: correct recognised systematic effects].
    """
    if not pin.amplitude > 0:
        raise AnalysisError(
            "the pin channel shows no ripple at the test frequency: check the generator output "
            "and the pin probe before computing rejection"
        )
    if not (calibration_ratio != 0 and math.isfinite(abs(calibration_ratio))):
        raise AnalysisError(
            f"channel calibration ratio {calibration_ratio!r} cannot be divided out"
        )
    sigma = output.quadrature_sigma if output_sigma is None else float(output_sigma)
    gain = abs(calibration_ratio)
    pin_amp = pin.amplitude
    out_amp = output.amplitude / gain
    sigma_corr = sigma / gain
    ratio = (output.phasor / pin.phasor) / complex(calibration_ratio)
    snr = out_amp / sigma_corr if sigma_corr > 0 else math.inf
    lower = (
        lower_bound_db(pin_amp, out_amp, sigma_corr, z)
        if out_amp + z * sigma_corr > 0
        else math.inf
    )
    nan = math.nan
    if output_limit > 0 or not is_detected(out_amp, sigma_corr, detection_k):
        limit = max(out_amp + z * sigma_corr, output_limit / gain)
        bound = ratio_db(pin_amp, limit) if limit > 0 else math.inf
        return Rejection(
            "bound", ratio, nan, nan, (nan, nan), nan, bound, min(lower, bound), snr, calibrated
        )
    unbiased = math.sqrt(max(out_amp**2 - 2.0 * sigma_corr**2, 0.25 * out_amp**2))
    u_pin = pin.amplitude_sigma / pin_amp
    u_out = sigma_corr / unbiased
    u_rel = math.sqrt(u_pin**2 + u_out**2 + calibration_uncertainty**2)
    value = ratio_db(pin_amp, unbiased)
    low = ratio_db(pin_amp, unbiased * (1.0 + u_rel))
    high = ratio_db(pin_amp, unbiased * (1.0 - u_rel)) if u_rel < 1 else math.inf
    return Rejection(
        kind="value",
        ratio=ratio,
        rejection_db=value,
        uncertainty_db=db_uncertainty(u_pin, u_out, calibration_uncertainty),
        interval_db=(low, high),
        phase=math.atan2(ratio.imag, ratio.real),
        bound_db=nan,
        lower_db=lower,
        output_snr=snr,
        calibrated=calibrated,
    )
