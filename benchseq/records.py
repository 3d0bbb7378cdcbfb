"""The columns of a run's table of points: one definition used by the sequencer to build
rows, by the store to describe them (units, meaning) and by reports to read them."""

from __future__ import annotations

from benchseq.store import Column

SCHEMA_VERSION = 2  # 2: linearity repeats and floor captures

# Amplitude units carry their convention, so a header cannot be misread (a "V" alone
# leaves peak, peak-to-peak and rms open): DC quantities keep a plain "V".
V_PEAK = "V (peak)"
V_PP = "V (pp)"
V_RMS = "V (rms)"

# Uncertainty: every uncertainty column stores the standard uncertainty u (coverage factor
# k = 1, JCGM 100 (GUM) §2.3.1); every ± shown (terminal, reports, plots) is the expanded
# uncertainty U = k·u with k = SHOWN_COVERAGE_FACTOR, about 95 % for a normal distribution
# (JCGM 100 (GUM) §6.2.1 and §6.3.3). The plan's capture.target_uncertainty is a standard
# uncertainty too (k = 1): a point is flagged target_unmet when u > target, i.e. U > k·target.
STORED_COVERAGE_FACTOR = 1.0
SHOWN_COVERAGE_FACTOR = 2.0
DB_STANDARD = "dB (k=1)"
COVERAGE_NOTE = (
    "stored uncertainties are standard uncertainties u (coverage factor k = 1); every ± "
    "shown is the expanded uncertainty U = 2u (k = 2, about 95 %); the plan's "
    "target_uncertainty is a standard uncertainty (k = 1)"
)
SIGN_CONVENTION = (
    "ratio = V_out / V_pin (complex, peak phasors); rejection_db = 20*log10(|V_pin|/|V_out|), "
    "positive when the device attenuates ripple"
)


def input_referred(rejection_db: float, bound_db: float, gain_db: float | None) -> dict[str, float]:
    """The input-referred columns: output-referred + 20·log10(G) for a device of closed-loop
    gain G (common practice for amplifiers: supply rejection is stated referred to the
    input, so a stage with gain G shows G times less rejection at its output). NaN when the
    plan declares no gain."""
    if gain_db is None:
        return {"rejection_input_db": float("nan"), "bound_input_db": float("nan")}
    return {"rejection_input_db": rejection_db + gain_db, "bound_input_db": bound_db + gain_db}


POINT_COLUMNS: tuple[Column, ...] = (
    Column("point_id", "i8", "", "index of the point in the expanded plan (run order)"),
    Column(
        "repeat_of",
        "i8",
        "",
        "for a linearity repeat: the point it repeats at another ripple level; -1 otherwise",
    ),
    Column("ripple_factor", "f8", "", "ripple relative to the planned level (1 but for repeats)"),
    Column("frequency_planned", "f8", "Hz", "injection frequency asked for by the plan"),
    Column(
        "frequency",
        "f8",
        "Hz",
        "generator frequency actually set: the planned one, or a coherent one within the "
        "plan's capture.frequency_tolerance of it",
    ),
    Column(
        "frequency_fitted",
        "f8",
        "Hz",
        "frequency refined by the four-parameter fit on the pin channel",
    ),
    Column("ripple_target", "f8", V_PEAK, "target pin ripple, peak"),
    Column("ripple_convention", "str", "", "convention the plan wrote the ripple in (pp, pk, rms)"),
    Column("dc_level", "f8", "V", "DC operating point (supply set-point)"),
    Column("load_current", "f8", "A", "electronic load current (nan without a load axis)"),
    Column("generator_pp", "f8", V_PP, "generator amplitude as displayed, peak to peak"),
    Column("pin", "c16", V_PEAK, "measured pin ripple phasor (peak)"),
    Column("pin_sigma", "f8", V_PEAK, "standard uncertainty (k = 1) of the pin amplitude (peak)"),
    Column("output", "c16", V_PEAK, "measured output ripple phasor (peak)"),
    Column(
        "output_sigma",
        "f8",
        V_PEAK,
        "standard uncertainty (k = 1) of the output amplitude (peak): the noise at the test "
        "frequency (equal to output_floor)",
    ),
    Column(
        "output_floor",
        "f8",
        V_PEAK,
        "noise floor at the test frequency on the output channel (per quadrature)",
    ),
    Column(
        "output_noise",
        "f8",
        V_RMS,
        "output channel noise, rms per sample, from the fit residual",
    ),
    Column(
        "floor_pin",
        "f8",
        V_PEAK,
        "pin amplitude fitted at the test frequency with the generator off (nan: not measured)",
    ),
    Column(
        "floor_output",
        "f8",
        V_PEAK,
        "output amplitude fitted at the test frequency with the generator off (nan: not measured)",
    ),
    Column("ratio", "c16", "", "V_out / V_pin, calibration applied"),
    Column(
        "rejection_db",
        "f8",
        "dB",
        "rejection 20*log10(|V_pin|/|V_out|); nan when only a bound is known",
    ),
    Column(
        "uncertainty_db",
        "f8",
        DB_STANDARD,
        "standard uncertainty u (coverage factor k = 1) of rejection_db: 8.6859*sqrt("
        "(pin_sigma/|pin|)^2 + (output_sigma/A)^2 + match_uncertainty^2), "
        "A = sqrt(|output|^2 - 2*output_sigma^2); shown as the expanded uncertainty U = 2u "
        "(k = 2, about 95 %)",
    ),
    Column(
        "bound_db",
        "f8",
        "dB",
        "lower bound of rejection when the output is under the floor (nan otherwise)",
    ),
    Column(
        "rejection_input_db",
        "f8",
        "dB",
        "input-referred rejection: rejection_db + 20*log10(G), G the plan's device.gain "
        "(closed-loop gain, taken as exact; same u); nan without a declared gain or for a bound",
    ),
    Column(
        "bound_input_db",
        "f8",
        "dB",
        "input-referred lower bound: bound_db + 20*log10(G) (nan without a declared gain or "
        "for a value)",
    ),
    Column(
        "is_bound",
        "bool",
        "",
        "true when the output was not detected and only a lower bound is known",
    ),
    Column(
        "match_uncertainty",
        "f8",
        "",
        "relative standard uncertainty (k = 1) of the channel match in uncertainty_db: the "
        "calibration's, or without one the channels' gain and probes' attenuation tolerances",
    ),
    Column(
        "pin_model",
        "c16",
        V_PEAK,
        "pin ripple predicted by the injector model for the generator setting",
    ),
    Column("pin_model_ratio_db", "f8", "dB", "20*log10(|measured pin| / |model pin|)"),
    Column("thd", "f8", "", "total harmonic distortion of the pin ripple (ratio, harmonics 2-5)"),
    Column("pin_dc", "f8", "V", "DC level measured at the pin for this operating point"),
    Column("supply_current", "f8", "A", "DC supply current read back after the capture"),
    Column("pin_range", "f8", V_PP, "pin channel full-scale range at the probe tip, peak to peak"),
    Column(
        "output_range",
        "f8",
        V_PP,
        "output channel full-scale range at the probe tip, peak to peak",
    ),
    Column("sample_interval", "f8", "s", "scope sample interval"),
    Column("record_length", "i8", "", "samples per record"),
    Column(
        "averages",
        "i8",
        "",
        "triggered records averaged into the analysed record (in the scope and pooled)",
    ),
    Column("captures", "i8", "", "acquisitions made for this point (batches, re-ranges, trims)"),
    Column("trims", "i8", "", "generator amplitude trims made to reach the target pin ripple"),
    Column("bench_time", "f8", "s", "bench time spent on this point"),
    Column("started_at", "f8", "s", "UNIX time the point started"),
    Column("stored_at", "f8", "s", "UNIX time the point was made durable"),
    Column("flags", "str", "", "space-separated flags (see the report's flag glossary)"),
)

TRUTH_COLUMNS: tuple[Column, ...] = (
    Column("point_id", "i8", "", "index of the point"),
    Column("pin", "c16", V_PEAK, "simulator's true pin ripple phasor (peak)"),
    Column("output", "c16", V_PEAK, "simulator's true output ripple phasor (peak)"),
    Column("rejection_db", "f8", "dB", "simulator's true rejection of the device"),
    Column("pin_dc", "f8", "V", "simulator's true pin DC level"),
)

FLAG_TEXT: dict[str, str] = {
    "bound": "output under the noise floor: only a lower bound of rejection is known",
    "pin_off_target": "pin ripple stayed more than 5 % from the target after the allowed trims",
    "model_mismatch": "measured pin ripple disagrees with the injector model beyond the plan's threshold (wiring, values, saturation?)",
    "distorted": "the injected ripple's harmonic distortion is above the plan's threshold (slew, clipping, current limit?)",
    "current_limit": "the DC supply reported current limiting during the point",
    "pin_dc_out_of_limits": "the pin DC level was outside the device's limits",
    "clipped": "a scope channel clipped even at its largest usable range",
    "unresolved": "a channel's signal was too small for the converter to resolve",
    "target_unmet": "the standard uncertainty u (k = 1) is above the plan's target_uncertainty (stated at k = 1), or the capture's time limit stopped it short; U = 2u is above twice the target",
    "instrument_retry": "an instrument fault occurred and the point was measured again after recovery",
    "nonlinear": "a linearity repeat at another ripple level changed rejection by more than the plan's tolerance (not small-signal)",
    "marginal": "the feasibility check marked this point marginal",
    "not_detected": "the output amplitude was under the value threshold (5 σ of the floor or more; see the uncertainty budget): only a bound is stated",
    "uncalibrated": "no channel-match calibration was applied: the scope channels' gain and the probes' attenuation tolerances are in the uncertainty instead",
    "bound_time_limited": "the bound used all of the plan's capture time (max_time): a longer max_time would raise it",
    "clipped_pin": "the pin channel's record touched the converter's extreme codes",
    "clipped_output": "the output channel's record touched the converter's extreme codes",
    "unresolved_pin": "the pin channel's record used at most two adjacent codes",
    "unresolved_output": "the output channel's record used at most two adjacent codes (its signal is below one step)",
    "small_pin": "the pin channel used under 10 % of the converter's codes (noise-dominated range)",
    "small_output": "the output channel used under 10 % of the converter's codes, even on the most sensitive range",
    "floor_from_residual": "too few clean neighbour frequencies: the noise floor came from the fit residual",
    "outside_calibration": "the frequency lies outside the channel-match calibration; not corrected",
    "calibration_conditions": "the channel-match calibration applied was made under other conditions (probes, coupling, bandwidth limit or scope) than this run: see the run's calibration metadata",
    "frequency_off_plan": "the generator's frequency read back differs from the planned one by more than the plan's frequency tolerance",
    "unrefined_low_snr": "the pin channel's SNR was too low to refine the frequency; the generator's was used",
    "unrefined_not_converged": "the frequency refinement did not converge; the generator's frequency was used",
    "unrefined_off_by_over_half_bin": "the refined frequency moved more than half a bin; the generator's was used",
}
