"""Profile files: the shipped ones load, and every kind of mistake is a clear file error
naming the file and the key; driver_class loading from a bench file."""

from __future__ import annotations

import dataclasses
import tomllib
from pathlib import Path

import pytest

from benchseq.bench import load_bench
from benchseq.drivers.factory import build_instrument, driver_class
from benchseq.drivers.generator import Generator
from benchseq.drivers.profile import COMMANDS, available_profiles, load_profile, parse_profile
from benchseq.drivers.replay import replay
from benchseq.errors import FileKeyError

PROFILES = Path(__file__).resolve().parents[1] / "drivers" / "profiles"


def _generator_text() -> str:
    return (PROFILES / "scpi-generator.toml").read_text(encoding="utf-8")


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "mine.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize("role", ["generator", "supply", "scope", "load"])
def test_shipped_profiles_load_and_format_every_command(role):
    profile = load_profile(f"scpi-{role}", role)
    assert profile.role == role
    for key in profile.commands:
        text = profile.command(key, ch=2, value=1 if key in ("record_length", "averages") else 0.5)
        assert "{" not in text and text == text.strip()
    assert f"scpi-{role}" in available_profiles()


def test_scope_capabilities_come_from_the_profile():
    caps = load_profile("scpi-scope").capabilities
    data = tomllib.loads((PROFILES / "scpi-scope.toml").read_text())["capabilities"]
    assert caps is not None
    assert caps.ranges == tuple(data["ranges"]) and caps.adc_bits == data["adc_bits"]
    assert caps.record_lengths[-1] == data["record_lengths"][-1]
    assert caps.rearm_time == data["rearm_time"]


def test_unknown_key_names_the_nearest_valid_one(tmp_path):
    path = _write(tmp_path, _generator_text().replace('output_query = "', 'output_qeury = "'))
    with pytest.raises(FileKeyError) as info:
        load_profile(path)
    assert str(path) in str(info.value)
    # the required key is reported first, with its likely misspelling
    assert "commands.output_query" in str(info.value) and "output_qeury" in str(info.value)


def test_unknown_extra_key_is_an_error(tmp_path):
    path = _write(
        tmp_path, _generator_text().replace("[commands]", '[commands]\nfrequencyy = "X {value}"')
    )
    with pytest.raises(FileKeyError, match=r'commands.frequencyy: unknown key.*"frequency"'):
        load_profile(path)


def test_missing_template_is_named(tmp_path):
    text = "\n".join(
        line for line in _generator_text().splitlines() if not line.startswith("frequency =")
    )
    with pytest.raises(FileKeyError, match=r"commands.frequency: missing \(required\)"):
        load_profile(_write(tmp_path, text))


@pytest.mark.parametrize(
    ("replacement", "message"),
    [
        ('frequency = "SOUR{chan}:FREQ {value}"', r"uses \{chan\}"),
        ('frequency = "SOUR{ch}:FREQ"', r"needs a \{value\}"),
        ('output_on = "OUTP{ch} {value}"', r"takes no \{value\}"),
        ('frequency = "SOUR{ch}:FREQ {value:d}"', "cannot format a number"),
        ('frequency = "SOUR{ch}:FREQ {value"', "malformed"),
    ],
)
def test_template_with_a_wrong_placeholder(tmp_path, replacement, message):
    lines = [
        replacement if line.startswith(replacement.split(" =")[0] + " =") else line
        for line in _generator_text().splitlines()
    ]
    with pytest.raises(FileKeyError, match=message):
        load_profile(_write(tmp_path, "\n".join(lines)))


def test_profile_for_another_role_is_refused():
    with pytest.raises(
        FileKeyError, match="supply profile, but the bench uses it as the generator"
    ):
        load_profile("scpi-supply", "generator")


def test_unknown_profile_name_lists_the_shipped_ones():
    with pytest.raises(FileKeyError, match="scpi-generator"):
        load_profile("no-such-profile")


def test_bad_termination_and_bad_capabilities(tmp_path):
    text = _generator_text().replace('write_termination = "\\n"', 'write_termination = ";"')
    with pytest.raises(FileKeyError, match=r"io\.write_termination"):
        load_profile(_write(tmp_path, text))
    scope = (
        (PROFILES / "scpi-scope.toml")
        .read_text()
        .replace("ranges = [0.008, 0.016", "ranges = [0.016, 0.008")
    )
    with pytest.raises(
        FileKeyError, match=r"capabilities\.ranges: list the values in rising order"
    ):
        load_profile(_write(tmp_path, scope))


def test_every_role_schema_is_covered_by_its_shipped_profile():
    for role, schema in COMMANDS.items():
        data = tomllib.loads((PROFILES / f"scpi-{role}.toml").read_text())
        parsed = parse_profile(data, f"scpi-{role}", role)
        assert {k for k, (_, req) in schema.items() if req} <= set(parsed.commands)


# -- driver_class ----------------------------------------------------------------------------
class QuietGenerator(Generator):
    """A generator whose firmware needs no unit command (an example of a driver class)."""

    def identify(self) -> str:
        return "custom:" + super().identify()


class NotAGenerator:
    pass


def _bench_with(driver: str | None):
    bench = load_bench("sim")
    spec = dataclasses.replace(bench.instruments["generator"], driver_class=driver)
    return dataclasses.replace(bench, instruments={**bench.instruments, "generator": spec})


def test_driver_class_from_the_bench_file_is_used():
    bench = _bench_with(f"{__name__}:QuietGenerator")
    inst = build_instrument(bench.instruments["generator"], replay([("*IDN?", "A,B,C,D")]), bench)
    assert isinstance(inst, QuietGenerator)
    assert inst.identify() == "custom:A,B,C,D"


@pytest.mark.parametrize(
    ("driver", "message"),
    [
        (f"{__name__}:NotAGenerator", "must be a subclass of benchseq.drivers.Generator"),
        (f"{__name__}:Missing", "has no class 'Missing'"),
        ("no_such_module_here:Thing", "cannot import module"),
    ],
)
def test_bad_driver_class_is_a_bench_file_error(driver, message):
    bench = _bench_with(driver)
    with pytest.raises(FileKeyError, match=message) as info:
        driver_class(bench.instruments["generator"], bench.source)
    assert info.value.key == "generator.driver_class"
