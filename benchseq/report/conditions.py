"""The conditions of a run in words: plan, bench, instrument identities, injector values,
usable band, calibration, replay. Each section is a title and (label, value) text pairs."""

from __future__ import annotations

import json
import math
from typing import Any

from benchseq.records import SHOWN_COVERAGE_FACTOR
from benchseq.report.model import Source
from benchseq.units import format_si

Section = tuple[str, list[tuple[str, str]]]

# Unit of a stored value, by the end of its key (values are SI floats).
_SUFFIX_UNITS: tuple[tuple[str, str], ...] = (
    ("_hz", "Hz"),
    ("_s", "s"),
    ("_deg", "°"),
    ("_db", "dB"),
    ("_pp", "Vpp"),
    ("resistor", "Ω"),
    ("resistance", "Ω"),
    ("_esr", "Ω"),
    ("capacitor", "F"),
    ("capacitance", "F"),
    ("gain_bandwidth", "Hz"),
    ("frequency", "Hz"),
    ("bandwidth_limit", "Hz"),
    ("current_limit", "A"),
    ("current", "A"),
    ("output_low", "V"),
    ("output_high", "V"),
    ("_v", "V"),
    ("level", "V"),
)


_LABEL_SUFFIXES = ("_hz", "_s", "_deg", "_db")
_LABEL_WORDS = {"esr": "ESR", "pp": "(pp)", "highpass": "high-pass", "lowpass": "low-pass",
                "minus3db": "−3 dB"}  # fmt: skip


def _words(key: str) -> str:
    """A stored key as words: 'bias_lowpass_hz' -> 'bias low-pass'."""
    for suffix in _LABEL_SUFFIXES:
        if key.endswith(suffix) and len(key) > len(suffix):
            key = key[: -len(suffix)]
            break
    return " ".join(_LABEL_WORDS.get(word, word) for word in key.split("_"))


def quantity_text(key: str, value: Any) -> str:
    """A stored value as text, with the SI unit its key implies ('1 kΩ', '10 µF', '88.6 °')."""
    if value is None:
        return "none"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int | float):
        number = float(value)
        if key == "slew_rate":
            return f"{number / 1e6:.4g} V/µs"
        if key == "open_loop_gain" and number > 0:
            return f"{20 * math.log10(number):.4g} dB ({number:.4g})"
        unit = next((u for end, u in _SUFFIX_UNITS if key.endswith(end)), "")
        if unit in ("°", "dB"):
            return f"{number:.4g} {unit}"
        if unit:
            return format_si(number, unit, 4)
        return f"{number:.6g}"
    if isinstance(value, list | tuple):
        return ", ".join(quantity_text(key, v) for v in value)
    if isinstance(value, dict):
        return "; ".join(f"{_words(k)} {quantity_text(k, v)}" for k, v in value.items())
    return str(value)


def _pairs(items: Any, skip: tuple[str, ...] = ()) -> list[tuple[str, str]]:
    if not isinstance(items, dict):
        return [("value", quantity_text("", items))] if items not in (None, "") else []
    return [(_words(k), quantity_text(k, v)) for k, v in items.items() if k not in skip]


def _band_text(band: Any) -> str:
    if isinstance(band, list | tuple) and len(band) == 2:
        try:
            low, high = float(band[0]), float(band[1])
        except (TypeError, ValueError):
            return str(band)
        return f"{format_si(low, 'Hz', 3)} – {format_si(high, 'Hz', 3)}"
    return quantity_text("", band)


def _run_section(source: Source) -> Section:
    meta = source.meta
    pairs = [
        ("file", str(source.path)),
        ("run id", source.run_id),
        ("title", str(meta.get("title", ""))),
        ("device", str(meta.get("device", ""))),
        ("operator", str(meta.get("operator", ""))),
        ("status", source.status_note()),
        ("started", str(meta.get("started", ""))),
        ("ended", str(meta.get("ended", "") or "not ended")),
        ("software", str(meta.get("software", ""))),
        ("Python", str(meta.get("python", ""))),
    ]
    if meta.get("simulated"):
        pairs.append(
            (
                "simulated bench",
                f"scenario {meta.get('simulation', '') or '?'}, seed {meta.get('seed', '?')}",
            )
        )
    if source.plan is not None and source.plan.notes.strip():
        pairs.append(("plan notes", " ".join(source.plan.notes.split())))
    if meta.get("traceback"):
        pairs.append(("fault", str(meta.get("reason", "") or "see the stored traceback")))
    pairs += _session_pairs(meta)
    return "Run", [(k, v) for k, v in pairs if v]


def _session_pairs(meta: dict[str, Any]) -> list[tuple[str, str]]:
    """One line per session of the run (the start and every resume): when, how it ended."""
    sessions = [s for s in meta.get("sessions") or [] if isinstance(s, dict)]
    pairs = []
    for n, session in enumerate(sessions, start=1):
        what = "started" if n == 1 else "resumed"
        text = f"{what} {session.get('started', '?')}"
        if session.get("host"):
            text += f" on {session['host']} (pid {session.get('pid', '?')})"
        text += f" with {session.get('points_at_start', '?')} points stored; "
        if "ended" in session:
            text += (
                f"{session.get('status', '?')} {session['ended']} with "
                f"{session.get('points_at_end', '?')} points stored"
            )
        else:
            text += "still running"
        pairs.append((f"session {n}", text))
    return pairs


def _plan_section(source: Source) -> Section:
    meta = source.meta
    pairs = [
        ("plan file", str(meta.get("plan_source", ""))),
        ("plan SHA-256", str(meta.get("plan_sha256", ""))),
    ]
    plan = source.plan
    if plan is not None:
        pairs.append(("axes (outermost first)", ", ".join(plan.axes)))
        pairs.append(
            ("device limits", f"absolute maximum {format_si(plan.device.absolute_max_v, 'V', 4)}, "
             f"minimum operating {format_si(plan.device.min_operating_v, 'V', 4)}"
             + (f", maximum load {format_si(plan.device.max_load_current, 'A', 3)}"
                if plan.device.max_load_current is not None else ""))
        )  # fmt: skip
        pairs += _capture_pairs(plan)
        if plan.mask is not None:
            corners = ", ".join(
                f"{format_si(f, 'Hz', 4)} ≥ {db:g} dB"
                for f, db in zip(plan.mask.frequencies, plan.mask.min_rejection_db, strict=True)
            )
            pairs.append((f"mask {plan.mask.name}".strip(), corners))
    if source.plan_problem:
        pairs.append(("stored plan", f"not readable: {source.plan_problem}"))
    return "Plan", [(k, v) for k, v in pairs if v]


def _capture_pairs(plan: Any) -> list[tuple[str, str]]:
    """The capture rules a reader needs to read the numbers: the target and its coverage,
    the frequency tolerance, and the device's declared gain (input-referred rejection)."""
    rules = plan.capture
    k = SHOWN_COVERAGE_FACTOR
    pairs = [
        (
            "target uncertainty",
            f"u ≤ {rules.target_uncertainty_db:g} dB standard (k = 1), i.e. U ≤ "
            f"{k * rules.target_uncertainty_db:g} dB expanded (k = {k:g}, about 95 %); points "
            "above it are flagged target_unmet",
        ),
        (
            "frequency tolerance",
            f"{100 * rules.frequency_tolerance:g} %: each point is measured at its planned "
            "frequency, or moved by at most this towards a whole number of cycles in the "
            "record (both frequencies are stored)",
        ),
    ]
    gain_db = plan.device.gain_db
    if gain_db is not None:
        pairs.append(
            (
                "device gain",
                f"{gain_db:.4g} dB ({10 ** (gain_db / 20):.4g} V/V, declared in the plan): "
                f"input-referred rejection = output-referred + {gain_db:.4g} dB",
            )
        )
    return pairs


def _bench_section(source: Source) -> Section:
    meta = source.meta
    pairs = [
        ("bench", str(meta.get("bench_name", ""))),
        ("bench file", str(meta.get("bench_source", ""))),
        ("bench SHA-256", str(meta.get("bench_sha256", ""))),
    ]
    return "Bench", [(k, v) for k, v in pairs if v]


def _injector_section(source: Source) -> list[Section]:
    meta = source.meta
    sections: list[Section] = []
    injector = meta.get("injector")
    if isinstance(injector, dict):
        pairs = _pairs(injector, skip=("opamp",))
        opamp = injector.get("opamp")
        if isinstance(opamp, dict):
            pairs += [(f"op-amp {label}", text) for label, text in _pairs(opamp)]
        sections.append(("Injector", pairs))
    band: list[tuple[str, str]] = []
    if "usable_band_hz" in meta:
        band.append(("usable band", _band_text(meta["usable_band_hz"])))
    corners = meta.get("corners")
    if isinstance(corners, dict):
        band += _pairs(corners)
    if band:
        sections.append(("Injector response (computed from the bench values)", band))
    for key, title in (
        ("generator", "Generator"),
        ("pin_load", "Pin load"),
        ("scope_setup", "Scope"),
    ):
        if isinstance(meta.get(key), dict):
            sections.append((title, _pairs(meta[key])))
    return sections


def _json_pairs(value: Any) -> list[tuple[str, str]]:
    if isinstance(value, dict):
        return [
            (_words(str(k)), v if isinstance(v, str) else json.dumps(v, default=str))
            for k, v in value.items()
        ]
    return [("value", str(value))]


def _percent(value: Any) -> str:
    return f"±{100 * float(value):.3g} %" if isinstance(value, int | float) else "not recorded"


def _match_text(meta: dict[str, Any]) -> str:
    """The uncalibrated channel match: the bench's tolerances and their combined u."""
    from benchseq.analysis.match import ChannelTolerances
    from benchseq.analysis.rejection import DB_PER_NEPER

    scope = meta.get("scope_setup")
    scope = scope if isinstance(scope, dict) else {}
    pin = scope["pin"] if isinstance(scope.get("pin"), dict) else {}
    out = scope["output"] if isinstance(scope.get("output"), dict) else {}
    gain, a_pin, a_out = (
        scope.get("gain_accuracy"),
        pin.get("probe_accuracy"),
        out.get("probe_accuracy"),
    )
    numbers = [float(v) for v in (gain, a_pin, a_out) if isinstance(v, int | float)]
    if len(numbers) < 3:
        return (
            "channel tolerances not recorded with this run (recorded by later versions); "
            "its uncertainties leave the channel match out"
        )
    u = ChannelTolerances(numbers[0], numbers[0], numbers[1], numbers[2]).uncertainty
    return (
        f"without a calibration: each channel's vertical gain {_percent(gain)}, pin probe "
        f"{_percent(a_pin)}, output probe {_percent(a_out)} (bench file), each rectangular, "
        f"a/√3 [JCGM 100 §4.3.7]: u_match = {DB_PER_NEPER * u:.3f} dB (Type B, k = 1); "
        "such points are flagged 'uncalibrated'"
    )


def _budget_section(source: Source) -> Section:
    """The uncertainty budget behind every stated ± (terms, sources, coverage factors)."""
    meta = source.meta
    calibrated = bool(meta.get("calibration"))
    pairs = [
        (
            "stated uncertainty",
            "u, the standard uncertainty (k = 1) of rejection in dB: u = (20/ln 10)·"
            "√(u_pin² + u_out² + u_match²), the law of propagation for a quotient "
            "[JCGM 100 §5.1.2, §5.1.6]; an expanded U = k·u says its k where it is shown",
        ),
        (
            "output noise u_out",
            "σ_c/A_out: the output's noise at the test frequency, from fits at neighbouring "
            "frequencies (Type A, k = 1); stored as output_sigma",
        ),
        ("pin noise u_pin", "σ_pin/A_pin from the pin channel's fit (Type A, k = 1)"),
    ]
    if calibrated:
        pairs.append(
            (
                "channel match u_match",
                "the channel-match calibration's stored standard uncertainty at each "
                "frequency (k = 1); points outside its span: "
                + _match_text(meta).removeprefix("without a calibration: "),
            )
        )
    else:
        pairs.append(("channel match u_match", _match_text(meta)))
    if _match_text(meta).startswith("channel tolerances not recorded"):
        pairs.append(
            (
                "value or bound",
                "recorded by an earlier version: a value where the output exceeded 3.5 σ_c of "
                "its noise; otherwise a lower bound 20·log10(A_pin/(A_out + 1.645·σ_c))",
            )
        )
        return "Uncertainty budget", pairs
    pairs.append(
        (
            "value or bound",
            "a value where the output is at least 5 σ_c above its noise (more when the noise "
            "rests on few neighbouring frequencies), so that the bias left in dB is under u/4; "
            "otherwise a lower bound 20·log10(A_pin/(A_out + 1.645·σ_c)), one-sided 95 % "
            "(before a bound, the plan's max_time is used: flag 'bound_time_limited')",
        )
    )
    return "Uncertainty budget", pairs


def conditions(source: Source) -> list[Section]:
    """Every section of conditions of one run, in reading order."""
    meta = source.meta
    sections: list[Section] = [_run_section(source), _plan_section(source), _bench_section(source)]
    identities = meta.get("identities")
    if isinstance(identities, dict) and identities:
        sections.append(
            ("Instruments (*IDN? replies)", [(str(k), str(v)) for k, v in identities.items()])
        )
    sections += _injector_section(source)
    calibration = meta.get("calibration")
    sections.append(
        ("Calibration", _json_pairs(calibration) if calibration
         else [("channel match", "none recorded with this run")])
    )  # fmt: skip
    sections.append(_budget_section(source))
    if meta.get("replay_of"):
        sections.append(("Replay of", _json_pairs(meta["replay_of"])))
    if meta.get("sign_convention"):
        sections.append(("Sign convention", [("rejection", str(meta["sign_convention"]))]))
    return [(title, pairs) for title, pairs in sections if pairs]
