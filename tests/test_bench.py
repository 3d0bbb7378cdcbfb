"""Bench files -> Bench (benchseq.bench): the embedded simulated bench, the lab template, and
errors that name the file and the key.

External references used below:
- Decibels of a voltage ratio, 20·log10 (IEC 60027-3): 100 dB = 10^5.
- A generator set for a 50 Ω load shows half its open-circuit EMF (common practice; the
  source and the load form a 1:1 divider); in high-Z mode the display is the EMF.
- Ohm's law for the DC current of a resistive load.
- IPv4 documentation addresses 192.0.2.0/24: RFC 5737.
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from tomlfuzz import mutate

from benchseq.bench import Bench, PinLoad, describe_band, load_bench, parse_bench
from benchseq.errors import BadInput, FileKeyError
from benchseq.tomlfile import parse_toml_text

ROOT = Path(__file__).resolve().parent.parent
TEMPLATE = ROOT / "plans" / "bench-template.toml"
FAST = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def template_text() -> str:
    return TEMPLATE.read_text(encoding="utf-8")


def bench_from(text: str, source: str = "bay4.toml") -> Bench:
    parsed_text, data = parse_toml_text(text, source)
    return parse_bench(data, source, parsed_text)


def error_of(text: str, source: str = "bay4.toml") -> FileKeyError:
    with pytest.raises(FileKeyError) as caught:
        bench_from(text, source)
    assert str(caught.value).startswith(source)
    return caught.value


# -- the embedded simulated bench --------------------------------------------------------
@pytest.mark.parametrize("name", [None, "sim", "sim:demo"])
def test_embedded_demo_bench(name: str | None) -> None:
    bench = load_bench(name)
    assert bench.is_simulated and bench.simulation == "demo"
    assert bench.source == "sim:demo"
    assert set(bench.instruments) >= {"generator", "supply", "scope"}
    assert all(spec.address.startswith("SIM::") for spec in bench.instruments.values())
    assert bench.generator.load_mode == "50 ohm"
    assert bench.injector.opamp.open_loop_gain == pytest.approx(1e5)  # 100 dB (IEC 60027-3)
    assert bench.injector.opamp.slew_rate == pytest.approx(10e6)  # 10 V/us
    assert bench.injector.coupling_capacitor == pytest.approx(10e-6)
    assert bench.pin.capacitance == pytest.approx(1e-6)
    assert bench.scope.pin.probe == 10 and bench.scope.output.probe == 1
    assert len(bench.text_hash) == 64 and "[injector]" in bench.text


def test_unknown_scenario_lists_the_available_ones() -> None:
    with pytest.raises(FileKeyError, match=r"available: .*demo"):
        load_bench("sim:nowhere")


# -- the lab template --------------------------------------------------------------------
def test_template_parses_with_documentation_addresses() -> None:
    """The template's addresses are in 192.0.2.0/24 (RFC 5737, for documentation)."""
    bench = load_bench(TEMPLATE)
    assert not bench.is_simulated
    assert set(bench.instruments) == {"generator", "supply", "scope", "load"}
    for spec in bench.instruments.values():
        assert spec.address.startswith("TCPIP::192.0.2.")
    assert bench.instruments["generator"].address == "TCPIP::192.0.2.21::5025::SOCKET"
    assert bench.instruments["scope"].timeout_s == 10.0
    assert bench.visa_library == "@py"
    assert bench.load is not None and bench.load.max_current == pytest.approx(0.5)
    assert bench.scope.bandwidth_limit == pytest.approx(20e6)
    assert bench.supply.overvoltage_protection == pytest.approx(6.0)


def test_template_matches_the_simulated_injector() -> None:
    """The template describes the same RJ-7 board as the simulated bench, so a plan checked on
    one is checked for the other."""
    lab, sim = load_bench(TEMPLATE), load_bench(None)
    assert lab.injector == sim.injector
    assert lab.pin == sim.pin
    assert lab.generator == sim.generator


def test_generator_emf_per_displayed_volt() -> None:
    """50 Ω mode: the display shows half the EMF (common practice); high-Z: the EMF itself."""
    fifty = bench_from(template_text())
    high_z = bench_from(template_text().replace('load_mode = "50 ohm"', 'load_mode = "high-z"'))
    assert fifty.generator.emf_per_displayed == 2.0
    assert high_z.generator.emf_per_displayed == 1.0


def test_pin_dc_current_by_ohms_law() -> None:
    assert PinLoad(1e-6, load_resistance=100.0).dc_current(5.0) == pytest.approx(0.05)
    assert PinLoad(1e-6, load_current=0.02).dc_current(5.0) == 0.02
    assert PinLoad(1e-6).dc_current(5.0) == 0.0


def test_open_loop_gain_as_ratio() -> None:
    bench = bench_from(template_text().replace('open_loop_gain = "100 dB"', "open_loop_gain = 2e5"))
    assert bench.injector.opamp.open_loop_gain == 2e5


def test_calibration_path_is_relative_to_the_bench_file(tmp_path: Path) -> None:
    text = template_text().replace(
        '# calibration = "cal/bay4-match.h5"', 'calibration = "cal/bay4-match.h5"'
    )
    path = tmp_path / "bay4.toml"
    path.write_text(text, encoding="utf-8")
    assert load_bench(path).scope.calibration == str(tmp_path / "cal" / "bay4-match.h5")


def test_describe_band() -> None:
    assert describe_band(15.2, 2.3e6) == "15.2 Hz – 2.3 MHz"
    assert describe_band(10.0, float("inf")) == "from 10 Hz"


# -- errors ------------------------------------------------------------------------------
def _replace(old: str, new: str) -> str:
    text = template_text()
    assert old in text
    return text.replace(old, new, 1)


@pytest.mark.parametrize(
    ("text", "key", "fragment"),
    [
        (_replace('load_mode = "50 ohm"', 'load_mode = "50ohm"'), "generator.load_mode", "one of"),
        (_replace("[lab]", '[lab]\nsimualtion = "demo"'), "lab.simualtion", 'did you mean "simulation"?'),
        (_replace('slew_rate = "10 V/us"', 'slew_rate = "10 V"'), "injector.opamp.slew_rate", "a slew rate is expected"),
        (_replace('coupling_capacitor = "10 uF"', 'coupling_capacitor = "10 uH"'), "injector.coupling_capacitor", "unknown unit"),
        (_replace('coupling_capacitor = "10 uF"', 'coupling_capacitor = "-10 uF"'), "injector.coupling_capacitor", "greater than zero"),
        (_replace('open_loop_gain = "100 dB"', 'open_loop_gain = "0 dB"'), "injector.opamp.open_loop_gain", "greater than 1"),
        (_replace('output_high = "11.5 V"', 'output_high = "0.1 V"'), "injector.opamp.output_high", "above output_low"),
        (_replace('min_amplitude = "2 mVpp"', 'min_amplitude = "20 Vpp"'), "generator.min_amplitude", "below max_amplitude"),
        (_replace('max_amplitude = "10 Vpp"', 'max_amplitude = "10 V"'), "generator.max_amplitude", "Vpp, Vpk or Vrms"),
        (_replace("output = { channel = 2", "output = { channel = 1"), "scope.output.channel", "different scope channels"),
        (_replace("probe = 10,", "probe = 0,"), "scope.pin.probe", "greater than zero"),
        (_replace("probe = 10,", "probe = inf,"), "scope.pin.probe", "finite"),
        (_replace('coupling = "AC" }', 'coupling = "ac" }'), "scope.pin.coupling", "one of: AC, DC"),
        (_replace('address = "TCPIP::192.0.2.21::5025::SOCKET"', 'address = "SIM::generator"'), "generator.address", "lab.simulation"),
        (_replace('address = "TCPIP::192.0.2.21::5025::SOCKET"', "address = 21"), "generator.address", "expected text"),
        (_replace('load_current = "50 mA"', 'load_current = "50 mA"\nload_resistance = "100 ohm"'), "pin.load_resistance", "not both"),
        (_replace("channel = 1                    # output channel", "channel = 0  #"), "generator.channel", "below the minimum"),
        (_replace('bandwidth_limit = "20 MHz"', 'bandwidth_limit = "on"'), "scope.bandwidth_limit", "a frequency is expected"),
        (_replace('timeout = "5 s"', 'timeout = "5 ms"\ntimeout_s = 5'), "generator.timeout_s", 'did you mean "timeout"?'),
        (_replace("[injector.opamp]", "[injector.op_amp]"), "injector.opamp", 'is "op_amp" a misspelling'),
        (_replace('driver_class = "mylab', 'driver_class = "mylab'), "", ""),
        ("[lab]\nname = 'x'\n", "generator", "missing"),
        ("lab = 5\n", "lab", "expected a table"),
        ("[lab\n", "", "not valid TOML"),
    ],
)  # fmt: skip
def test_errors_name_file_key_and_problem(text: str, key: str, fragment: str) -> None:
    if not fragment:  # a commented line left commented: still a valid bench
        assert bench_from(text).name
        return
    error = error_of(text)
    assert error.key == key
    assert fragment in str(error), str(error)


def test_driver_class_needs_module_and_class() -> None:
    error = error_of(
        _replace('# driver_class = "mylab.drivers:OldGenerator"', 'driver_class = "OldGenerator"')
    )
    assert error.key == "generator.driver_class"


def test_missing_and_unreadable_files(tmp_path: Path) -> None:
    with pytest.raises(FileKeyError, match="file not found"):
        load_bench(tmp_path / "absent.toml")
    with pytest.raises(FileKeyError, match="is a directory"):
        load_bench(tmp_path)
    deep = tmp_path / "deep.toml"
    deep.write_text("a = " + "[" * 3000 + "]" * 3000 + "\n", encoding="utf-8")
    with pytest.raises(FileKeyError, match=r"deep\.toml: not valid TOML"):
        load_bench(deep)
    huge = tmp_path / "huge.toml"
    huge.write_text("a = 1" + "0" * 5000 + "\n", encoding="utf-8")
    with pytest.raises(FileKeyError, match=r"huge\.toml: not valid TOML"):
        load_bench(huge)


def test_a_number_too_large_for_a_float() -> None:
    error = error_of(_replace("probe = 10,", "probe = 1" + "0" * 400 + ","))
    assert error.key == "scope.pin.probe"


# -- robustness: random and corrupted bench files ----------------------------------------
_KEYS = [
    "lab", "name", "notes", "simulation", "visa_library", "generator", "supply", "scope",
    "load", "injector", "opamp", "pin", "output", "address", "profile", "driver_class",
    "channel", "timeout", "load_mode", "source_resistance", "max_amplitude", "min_amplitude",
    "max_frequency", "current_limit", "overvoltage_protection", "safe_level", "ramp_rate",
    "bandwidth_limit", "calibration", "probe", "coupling", "max_current", "input_resistor",
    "coupling_capacitor", "feedback_resistor", "bias_resistor", "bias_capacitor",
    "open_loop_gain", "gain_bandwidth", "slew_rate", "output_resistance", "output_low",
    "output_high", "capacitance", "capacitor_esr", "load_current", "load_resistance", "zzz",
    "outage_patience",
]  # fmt: skip
_TEXTS = [
    "50 ohm", "high-z", "AC", "DC", "off", "SIM::scope", "TCPIP::192.0.2.9::INSTR", "demo",
    "10 Vpp", "2 mVpp", "1 k", "4k7", "10 uF", "100 dB", "10 V/us", "600 mA", "5 s", "",
    "a:b", "-1 V", "nan", "1e400 F", "20 MHz",
]  # fmt: skip
_SCALARS = st.one_of(
    st.sampled_from(_TEXTS),
    st.text(max_size=8),
    st.integers(),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
)
_TREES = st.recursive(
    _SCALARS,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4),
        st.dictionaries(st.sampled_from(_KEYS), inner, max_size=6),
    ),
    max_leaves=30,
)


def _never_a_traceback(data: Any, text: str = "") -> None:
    try:
        bench = parse_bench(data, "fuzz.toml", text)
    except BadInput as exc:
        assert "fuzz.toml" in str(exc)
    else:
        assert bench.generator.min_amplitude_pp < bench.generator.max_amplitude_pp


@FAST
@given(st.dictionaries(st.sampled_from(_KEYS), _TREES, max_size=8))
def test_random_toml_trees_give_a_bench_or_a_bad_input(data: dict[str, Any]) -> None:
    _never_a_traceback(data)


@st.composite
def _mutated_bench(draw: st.DrawFn) -> dict[str, Any]:
    """The template or the simulated bench with random deletions, replacements, renames."""
    from benchseq.bench import embedded_bench_text

    text = draw(st.sampled_from([template_text(), embedded_bench_text("demo")]))
    data = tomllib.loads(text)
    return mutate(draw, data, _TREES)


@FAST
@given(_mutated_bench())
def test_corrupted_bench_files_give_a_bench_or_a_bad_input(data: dict[str, Any]) -> None:
    _never_a_traceback(data)


@FAST
@given(st.binary(max_size=200))
def test_random_bytes_give_a_bad_input_naming_the_file(raw: bytes) -> None:
    try:
        text, data = parse_toml_text(raw, "fuzz.toml")
        parse_bench(data, "fuzz.toml", text)
    except BadInput as exc:
        assert "fuzz.toml" in str(exc)


@FAST
@given(st.data())
def test_template_text_with_lines_dropped_or_cut(data: st.DataObject) -> None:
    lines = template_text().splitlines(keepends=True)
    drop = data.draw(st.sets(st.integers(min_value=0, max_value=len(lines) - 1), max_size=6))
    text = "".join(line for i, line in enumerate(lines) if i not in drop)
    cut = data.draw(st.integers(min_value=0, max_value=len(text)))
    try:
        parsed_text, parsed = parse_toml_text(text[:cut], "fuzz.toml")
        _never_a_traceback(parsed, parsed_text)
    except BadInput as exc:
        assert "fuzz.toml" in str(exc)


def test_a_missing_key_is_not_blamed_on_another_valid_one() -> None:
    """'max_amplitude' missing while 'min_amplitude' is given: no misspelling hint."""
    error = error_of(_replace('max_amplitude = "10 Vpp"', ""))
    assert error.key == "generator.max_amplitude"
    assert str(error).endswith("missing (required)")
    renamed = error_of(_replace("load_mode =", "Load-Mode ="))
    assert renamed.key == "generator.load_mode" and '"Load-Mode" a misspelling' in str(renamed)


# -- how long an unreachable instrument is waited for -----------------------------------------
def test_outage_patience_defaults_to_five_minutes_and_takes_a_time() -> None:
    assert bench_from(template_text()).outage_patience == 300.0
    bench = bench_from(_replace("[lab]", '[lab]\noutage_patience = "2 min"'))
    assert bench.outage_patience == 120.0
    assert bench_from(_replace("[lab]", '[lab]\noutage_patience = "1.5 s"')).outage_patience == 1.5


@pytest.mark.parametrize("value", ['"0 s"', '"-1 min"', '"5 V"', "true", '"2 h"', '"1e9 s"'])
def test_outage_patience_must_be_a_positive_time(value: str) -> None:
    error = error_of(_replace("[lab]", f"[lab]\noutage_patience = {value}"))
    assert error.key == "lab.outage_patience"
