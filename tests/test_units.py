"""Quantities as written in plan and bench files -> SI floats (benchseq.units).

External references used below:
- SI prefixes: BIPM, The International System of Units (SI Brochure), 9th ed. 2019, Table 7.
- Resistor/capacitor value codes such as "4k7", "2R2": IEC 60062 (the "RKM" code).
- Sine amplitudes: peak = peak-to-peak / 2, rms = peak / sqrt(2) (definition of the RMS of
  a sinusoid, any circuits text, e.g. Horowitz & Hill, The Art of Electronics, 3rd ed., 1.3).
- Decibels of a voltage ratio: 20·log10 (IEC 60027-3).
"""

from __future__ import annotations

import math
from decimal import Decimal

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchseq.errors import BadInput
from benchseq.units import (
    PREFIXES,
    Amplitude,
    QuantityError,
    format_si,
    parse_amplitude,
    parse_quantity,
)

FAST = settings(max_examples=150, deadline=None)


@pytest.mark.parametrize(
    ("text", "dimension", "expected"),
    [
        # every form named in benchseq/units.py's docstring
        ("10 kHz", "Hz", 10e3),
        ("1e6 Hz", "Hz", 1e6),
        ("4.7 uF", "F", 4.7e-6),
        ("4.7 µF", "F", 4.7e-6),  # U+00B5 micro sign
        ("4.7 μF", "F", 4.7e-6),  # U+03BC Greek small mu
        ("1 kΩ", "ohm", 1e3),  # U+03A9 Greek capital omega
        ("1 k\u2126", "ohm", 1e3),  # U+2126 ohm sign
        ("1k", "ohm", 1e3),
        ("4k7", "ohm", 4.7e3),  # IEC 60062
        ("2R2", "ohm", 2.2),  # IEC 60062
        ("1M5", "Hz", 1.5e6),
        ("10 V/us", "V/s", 10e6),
        ("10 V/µs", "V/s", 10e6),
        ("200 ms", "s", 0.2),
        ("80 dB", "dB", 80.0),
        ("3.3 V", "V", 3.3),
        # SI prefixes (BIPM SI Brochure, Table 7), with and without a space
        ("1 fF", "F", 1e-15),
        ("22pF", "F", 22e-12),
        ("100 nA", "A", 100e-9),
        ("50 mA", "A", 0.05),
        ("1 MHz", "Hz", 1e6),
        ("1 mHz", "Hz", 1e-3),
        ("2 GHz", "Hz", 2e9),
        ("20 mohm", "ohm", 0.02),
        ("10 ohms", "ohm", 10.0),
        ("2 min", "s", 120.0),
        ("1 h", "s", 3600.0),
        ("1.5", "V", 1.5),
        ("4.7u", "", 4.7e-6),
        (5, "V", 5.0),
        (2.5, "A", 2.5),
    ],
)
def test_every_written_form_parses_to_si(text: object, dimension: str, expected: float) -> None:
    assert parse_quantity(text, dimension) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("text", "peak", "convention"),
    [
        ("100 mVpp", 0.05, "pp"),  # peak = pp / 2
        ("200 mVpp", 0.1, "pp"),
        ("50 mVpk", 0.05, "pk"),
        ("50 mVp", 0.05, "pk"),
        ("35 mVrms", 0.035 * math.sqrt(2.0), "rms"),  # peak = sqrt(2) * rms
        ("0.1 Vrms", 0.1 * math.sqrt(2.0), "rms"),
        ("1 Vpp", 0.5, "pp"),
    ],
)
def test_amplitude_conventions_are_exact(text: str, peak: float, convention: str) -> None:
    """Sine: pp = 2 x peak, rms = peak / sqrt(2) (definition of the RMS of a sinusoid)."""
    amplitude = parse_amplitude(text)
    assert amplitude.peak == pytest.approx(peak, rel=1e-15)
    assert amplitude.convention == convention
    assert amplitude.peak_to_peak == pytest.approx(2 * peak, rel=1e-15)
    assert amplitude.rms == pytest.approx(peak / math.sqrt(2.0), rel=1e-15)


def test_100_mvpp_is_50_mvpk_and_35_36_mvrms() -> None:
    """100 mVpp = 50 mVpk = 35.355 mVrms (50/sqrt 2, computed)."""
    amplitude = parse_amplitude("100 mVpp")
    assert amplitude.peak == 0.05
    assert amplitude.rms == pytest.approx(0.0353553390593, rel=1e-12)


def test_amplitude_is_written_back_in_its_own_convention() -> None:
    assert parse_amplitude("100 mVpp").as_written() == "100 mVpp"
    assert parse_amplitude("35 mVrms").as_written() == "35 mVrms"
    assert Amplitude(0.05, "pk").as_written() == "50 mVpk"


def test_wrong_dimension_names_what_was_written_and_where() -> None:
    with pytest.raises(QuantityError) as caught:
        parse_amplitude("100 mA", "sweep.ripple[1]")
    assert str(caught.value) == (
        "'100 mA' where a voltage is expected at sweep.ripple[1] (that is a current)"
    )


@pytest.mark.parametrize(
    ("value", "dimension", "fragment"),
    [
        ("10 kHz", "s", "that is a frequency"),
        ("5 V", "A", "that is a voltage"),
        ("100 mVpp", "V", "this is an amplitude"),
        ("2R2", "V", "that is a resistance"),
        ("80 dB", "", "that is a level in dB"),
        ("abc", "V", "no number found"),
        ("5 furlongs", "V", "unknown unit 'furlongs'"),
        ("1e400 V", "V", "not a finite number"),
        (float("nan"), "V", "not a finite number"),
        (float("inf"), "Hz", "not a finite number"),
        (True, "V", "true/false"),
        (None, "V", "got a NoneType"),
        ([1, 2], "V", "got a list"),
    ],
)
def test_bad_quantities_say_what_was_expected(value: object, dimension: str, fragment: str) -> None:
    with pytest.raises(QuantityError) as caught:
        parse_quantity(value, dimension, "capture.max_time")
    message = str(caught.value)
    assert fragment in message
    assert "at capture.max_time" in message
    assert isinstance(caught.value, BadInput)


@pytest.mark.parametrize("value", ["100 mV", "5", 0.1, "1 kHz", "3 mVpq"])
def test_amplitude_needs_its_convention(value: object) -> None:
    with pytest.raises(QuantityError):
        parse_amplitude(value, "sweep.ripple[0]")


def test_format_si_examples() -> None:
    assert format_si(0.0001, "V") == "100 µV"  # the docstring's example
    assert format_si(4.7e-6, "F") == "4.7 µF"
    assert format_si(10e3, "Hz") == "10 kHz"
    assert format_si(0.0, "V") == "0 V"
    assert format_si(80.0, "dB") == "80.00 dB"


# -- property tests ----------------------------------------------------------------------
_UNITS_FOR_FORMAT = ["V", "A", "Hz", "F", "Ω", "s", "W", "V/s"]
_DIMENSION_OF = {"Ω": "ohm"}


@FAST
@given(
    magnitude=st.floats(min_value=1e-15, max_value=1e12, allow_nan=False, allow_infinity=False),
    negative=st.booleans(),
    unit=st.sampled_from(_UNITS_FOR_FORMAT),
    digits=st.integers(min_value=3, max_value=12),
)
def test_format_then_parse_round_trips(
    magnitude: float, negative: bool, unit: str, digits: int
) -> None:
    """format_si keeps ``digits`` significant digits: the round trip is within half a unit
    in the last digit, i.e. 5·10^-digits relative."""
    value = -magnitude if negative else magnitude
    text = format_si(value, unit, digits)
    back = parse_quantity(text, _DIMENSION_OF.get(unit, unit))
    assert back == pytest.approx(value, rel=5.01 * 10.0 ** (-digits), abs=0.0)


@FAST
@given(
    value=st.floats(min_value=-200.0, max_value=200.0, allow_nan=False),
    digits=st.integers(min_value=3, max_value=8),
)
def test_decibels_round_trip(value: float, digits: int) -> None:
    """dB are formatted with digits-2 decimals: within half of the last decimal."""
    back = parse_quantity(format_si(value, "dB", digits), "dB")
    assert abs(back - value) <= 0.5 * 10.0 ** (-(digits - 2)) + 1e-12


_SPELLINGS = {
    "V": ["V"],
    "A": ["A"],
    "Hz": ["Hz", "hz", "HZ"],
    "F": ["F"],
    "ohm": ["Ω", "\u2126", "ohm", "Ohm", "ohms", "R"],
    "s": ["s", "sec"],
    "V/s": ["V/s"],
    "W": ["W"],
    "": [""],
}


@st.composite
def _written_quantity(draw: st.DrawFn) -> tuple[str, str, Decimal]:
    """A number as a person writes it, a prefix, a unit spelling, and the exact value."""
    whole = draw(st.integers(min_value=0, max_value=99999))
    fraction = draw(st.one_of(st.just(""), st.from_regex(r"\.[0-9]{1,6}", fullmatch=True)))
    exponent = draw(st.one_of(st.just(""), st.integers(-6, 6).map(lambda e: f"e{e}")))
    sign = draw(st.sampled_from(["", "-", "+"]))
    mantissa = f"{sign}{whole}{fraction}{exponent}"
    dimension = draw(st.sampled_from(sorted(_SPELLINGS)))
    spelling = draw(st.sampled_from(_SPELLINGS[dimension]))
    prefix = draw(st.sampled_from(sorted(PREFIXES)))
    separator = draw(st.sampled_from(["", " "]))
    exact = Decimal(mantissa) * Decimal(repr(PREFIXES[prefix]))
    return f"{mantissa}{separator}{prefix}{spelling}", dimension, exact


@FAST
@given(_written_quantity())
def test_numbers_times_prefixes_times_units(case: tuple[str, str, Decimal]) -> None:
    """Any number x any SI prefix (BIPM Table 7) x any accepted unit spelling parses to the
    number times the prefix's power of ten."""
    text, dimension, exact = case
    assert parse_quantity(text, dimension) == pytest.approx(float(exact), rel=1e-12, abs=0.0)


@FAST
@given(
    peak=st.floats(min_value=1e-6, max_value=100.0, allow_nan=False),
    convention=st.sampled_from(["pp", "pk", "rms"]),
)
def test_amplitude_round_trips_in_every_convention(peak: float, convention: str) -> None:
    written = Amplitude(peak, convention).as_written()
    back = parse_amplitude(written)
    assert back.convention == convention
    assert back.peak == pytest.approx(peak, rel=1e-3)


@FAST
@given(st.one_of(st.text(max_size=30), st.binary(max_size=30).map(lambda b: b.decode("latin-1"))))
def test_any_text_gives_a_value_or_a_quantity_error(text: str) -> None:
    for dimension in ("V", "Hz", "ohm", "s", "V/s", "dB", ""):
        try:
            value = parse_quantity(text, dimension, "x")
        except QuantityError as exc:
            assert "at x" in str(exc)
        else:
            assert math.isfinite(value)
    try:
        amplitude = parse_amplitude(text, "x")
    except QuantityError:
        pass
    else:
        assert math.isfinite(amplitude.peak)
