"""Quantities as engineers write them, parsed into SI floats.

"100 mVpp", "0.1 Vrms", "50 mVpk", "10 kHz", "1e6 Hz", "4.7 uF", "4.7 µF",
"1 kΩ", "1k", "4k7", "10 V/us", "200 ms", "80 dB". Inside the program every
value is a float in SI base units (V, A, Hz, F, Ω, s, V/s); ripple amplitudes are
peak volts, with the convention they were written in kept beside them.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from benchseq.errors import BadInput

PREFIXES: dict[str, float] = {
    "f": 1e-15,
    "p": 1e-12,
    "n": 1e-9,
    "u": 1e-6,
    "µ": 1e-6,
    "μ": 1e-6,
    "m": 1e-3,
    "": 1.0,
    "k": 1e3,
    "K": 1e3,
    "M": 1e6,
    "G": 1e9,
}

# Canonical dimension -> accepted spellings of the unit symbol (after the prefix).
_UNIT_SPELLINGS: dict[str, tuple[str, ...]] = {
    "V": ("V",),
    "A": ("A",),
    "Hz": ("Hz", "hz", "HZ"),
    "F": ("F",),
    "ohm": ("Ω", "\u2126", "ohm", "Ohm", "ohms", "R"),
    "s": ("s", "sec"),
    "V/s": ("V/s",),
    "dB": ("dB",),
    "W": ("W",),
}
_SLEW_PER: dict[str, float] = {"V/us": 1e6, "V/µs": 1e6, "V/μs": 1e6, "V/ms": 1e3, "V/ns": 1e9}
_TIME_WORDS: dict[str, float] = {"min": 60.0, "h": 3600.0}

DIMENSION_WORDS: dict[str, str] = {
    "V": "a voltage",
    "A": "a current",
    "Hz": "a frequency",
    "F": "a capacitance",
    "ohm": "a resistance",
    "s": "a time",
    "V/s": "a slew rate",
    "dB": "a level in dB",
    "W": "a power",
    "": "a plain number",
}

_AMPLITUDE_FACTORS: dict[str, float] = {"pp": 0.5, "pk": 1.0, "p": 1.0, "rms": math.sqrt(2.0)}

_NUMBER = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_QUANTITY_RE = re.compile(rf"^\s*(?P<num>{_NUMBER})\s*(?P<rest>.*?)\s*$")
_EURO_RE = re.compile(r"^\s*(?P<int>\d+)(?P<prefix>[pnuµμmkKMGR])(?P<frac>\d+)\s*(?P<unit>.*?)\s*$")


class QuantityError(BadInput):
    """A quantity could not be read: says what was written, what was expected and where."""

    def __init__(self, text: object, expected: str, where: str = "", detail: str = "") -> None:
        self.text = text
        self.expected = expected
        self.where = where
        message = f"'{text}' where {DIMENSION_WORDS.get(expected, expected)} is expected"
        if where:
            message += f" at {where}"
        if detail:
            message += f" ({detail})"
        super().__init__(message)


@dataclass(frozen=True)
class Amplitude:
    """A sine amplitude: ``peak`` in volts, and the convention it was written in."""

    peak: float
    convention: str = "pk"  # "pp", "pk" or "rms"

    @property
    def peak_to_peak(self) -> float:
        return 2.0 * self.peak

    @property
    def rms(self) -> float:
        return self.peak / math.sqrt(2.0)

    def as_written(self) -> str:
        """The amplitude in its own convention, e.g. '100 mVpp'."""
        value = {"pp": self.peak_to_peak, "rms": self.rms}.get(self.convention, self.peak)
        return format_si(value, "V" + self.convention)


def _scaled(number: float, scale: float) -> float:
    """number x scale, dividing by the exact power of ten for sub-unit prefixes (10 µ -> 1e-05)."""
    if 0 < scale < 1:
        return number / round(1.0 / scale)
    return number * scale


def _split(text: str, expected: str, where: str) -> tuple[float, str]:
    euro = _EURO_RE.match(text)
    if euro:  # "4k7" = 4.7k, "2R2" = 2.2
        prefix = euro.group("prefix")
        scale = 1.0 if prefix == "R" else PREFIXES[prefix]
        value = _scaled(float(f"{euro.group('int')}.{euro.group('frac')}"), scale)
        unit = euro.group("unit")
        if prefix == "R" and unit == "":
            unit = "ohm"
        return value, unit
    match = _QUANTITY_RE.match(text)
    if not match:
        raise QuantityError(text, expected, where, "no number found")
    return float(match.group("num")), match.group("rest")


def _unit_scale(rest: str, expected: str) -> float | None:
    """Scale factor for ``rest`` (prefix + unit) if it denotes ``expected``, else None."""
    if expected == "V/s" and rest in _SLEW_PER:
        return _SLEW_PER[rest]
    if expected == "s" and rest in _TIME_WORDS:
        return _TIME_WORDS[rest]
    if expected == "dB":
        return 1.0 if rest == "dB" else None
    for spelling in _UNIT_SPELLINGS.get(expected, ()):
        if rest == spelling:
            return 1.0
        if rest.endswith(spelling):
            prefix = rest[: -len(spelling)]
            if prefix in PREFIXES and prefix != "":
                return PREFIXES[prefix]
    if rest in PREFIXES:  # bare number with an optional prefix: "1k", "10", "4.7u"
        return PREFIXES[rest]
    return None


def _looks_like(rest: str) -> str | None:
    """Which dimension a unit string denotes, to say what was written instead."""
    for dim in _UNIT_SPELLINGS:
        if _unit_scale(rest, dim) is not None and rest not in PREFIXES:
            return dim
    for dim in ("V/s", "s"):
        if _unit_scale(rest, dim) is not None and rest not in PREFIXES:
            return dim
    return None


def parse_quantity(value: object, expected: str, where: str = "") -> float:
    """Parse ``value`` (a string like "4.7 uF", or a plain number in SI units) into a float.

    ``expected`` is one of V, A, Hz, F, ohm, s, V/s, dB, W, or "" for a plain number.
    """
    if isinstance(value, bool):
        raise QuantityError(value, expected, where, "a true/false value is not a quantity")
    if isinstance(value, int | float):
        try:
            number = float(value)
        except OverflowError:
            raise QuantityError("(a huge number)", expected, where, "not a finite number") from None
    elif isinstance(value, str):
        number, rest = _split(value, expected, where)
        if expected == "V" and (rest[-2:] in ("pp", "pk") or rest.endswith("rms")):
            raise QuantityError(
                value, expected, where, "this is an amplitude; give a DC level such as '5 V'"
            )
        scale = _unit_scale(rest, expected)
        if scale is None:
            other = _looks_like(rest)
            if other is not None and other != expected:
                raise QuantityError(value, expected, where, f"that is {DIMENSION_WORDS[other]}")
            raise QuantityError(value, expected, where, f"unknown unit '{rest}'")
        number = _scaled(number, scale)
    else:
        raise QuantityError(value, expected, where, f"got a {type(value).__name__}")
    if not math.isfinite(number):
        raise QuantityError(value, expected, where, "not a finite number")
    return number


def parse_amplitude(value: object, where: str = "") -> Amplitude:
    """Parse a sine amplitude such as "100 mVpp", "0.1 Vrms" or "50 mVpk" (peak volts)."""
    if not isinstance(value, str):
        raise QuantityError(
            value, "V", where, "write the amplitude with its convention, e.g. '100 mVpp'"
        )
    number, rest = _split(value, "V", where)
    for suffix in ("pp", "pk", "rms", "p"):
        if rest.endswith("V" + suffix):
            prefix = rest[: -len(suffix) - 1]
            if prefix not in PREFIXES:
                break
            peak = _scaled(number, PREFIXES[prefix]) * _AMPLITUDE_FACTORS[suffix]
            if not math.isfinite(peak):
                raise QuantityError(value, "V", where, "not a finite number")
            return Amplitude(peak=peak, convention="pk" if suffix == "p" else suffix)
    other = _looks_like(rest)
    if other is not None and other != "V":
        raise QuantityError(value, "V", where, f"that is {DIMENSION_WORDS[other]}")
    raise QuantityError(value, "V", where, "give the convention: Vpp, Vpk or Vrms, e.g. '100 mVpp'")


_FORMAT_PREFIXES = [
    (1e9, "G"),
    (1e6, "M"),
    (1e3, "k"),
    (1.0, ""),
    (1e-3, "m"),
    (1e-6, "µ"),
    (1e-9, "n"),
    (1e-12, "p"),
    (1e-15, "f"),
]


def format_si(value: float, unit: str, digits: int = 4) -> str:
    """Format a SI value with a prefix: format_si(0.0001, 'V') -> '100 µV'."""
    if unit == "dB":
        return f"{value:.{max(digits - 2, 1)}f} dB"
    if value == 0 or not math.isfinite(value):
        return f"{value:g} {unit}".strip()
    magnitude = abs(value)
    scale, prefix = next(
        ((sc, pre) for sc, pre in _FORMAT_PREFIXES if magnitude >= sc * 0.9995),
        _FORMAT_PREFIXES[-1],
    )
    text = f"{value / scale:.{digits}g}"
    return f"{text} {prefix}{unit}".strip()
