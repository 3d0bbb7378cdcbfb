"""Instrument profiles: the SCPI command templates of one instrument family, read from TOML.

A profile has four tables: [profile] (name, role, description), [io] (terminations and the
IEEE 488.2 common commands), [commands] (templates with the placeholders {ch} and {value})
and, for a scope, [capabilities]. Every template is checked when the file is loaded, so a
wrong placeholder or a missing command is a file error before any instrument is touched.
"""

from __future__ import annotations

import os
import string
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from benchseq import plugins
from benchseq.errors import FileKeyError, nearest
from benchseq.tomlfile import Section, parse_toml_text, read_toml

# What a template's {value} stands for: a float in SI units, a whole number, or a word.
FLOAT, INT, WORD, NONE = "float", "int", "word", "none"
PLACEHOLDERS = ("ch", "value")

# Per role: command key -> (value kind, required). Kind NONE: the template takes no {value}.
COMMANDS: dict[str, dict[str, tuple[str, bool]]] = {
    "generator": {
        "function_sine": (NONE, True),
        "function_query": (NONE, False),
        "frequency": (FLOAT, True),
        "frequency_query": (NONE, True),
        "amplitude_unit": (NONE, False),
        "amplitude": (FLOAT, True),
        "amplitude_query": (NONE, True),
        "offset": (FLOAT, True),
        "offset_query": (NONE, False),
        "load_50_ohm": (NONE, True),
        "load_high_z": (NONE, True),
        "load_query": (NONE, False),
        "output_on": (NONE, True),
        "output_off": (NONE, True),
        "output_query": (NONE, True),
    },
    "supply": {
        "voltage": (FLOAT, True),
        "voltage_query": (NONE, True),
        "current_limit": (FLOAT, True),
        "current_limit_query": (NONE, False),
        "overvoltage_level": (FLOAT, True),
        "overvoltage_level_query": (NONE, False),
        "overvoltage_on": (NONE, True),
        "overvoltage_tripped_query": (NONE, True),
        "protection_clear": (NONE, False),
        "output_on": (NONE, True),
        "output_off": (NONE, True),
        "output_query": (NONE, True),
        "measure_voltage": (NONE, True),
        "measure_current": (NONE, True),
        "questionable_query": (NONE, True),
    },
    "scope": {
        "channel_on": (NONE, True),
        "channel_range": (FLOAT, True),
        "channel_range_query": (NONE, False),
        "channel_offset": (FLOAT, True),
        "channel_offset_query": (NONE, False),
        "channel_coupling": (WORD, True),
        "channel_coupling_query": (NONE, False),
        "bandwidth_limit": (FLOAT, False),
        "bandwidth_limit_on": (NONE, False),
        "bandwidth_limit_off": (NONE, False),
        "sample_interval": (FLOAT, True),
        "sample_interval_query": (NONE, True),
        "record_length": (INT, True),
        "record_length_query": (NONE, True),
        "averages": (INT, True),
        "averages_query": (NONE, False),
        "averaging_on": (NONE, False),
        "averaging_off": (NONE, False),
        "trigger_external": (NONE, True),
        "acquire_single": (NONE, True),
        "format_int8": (NONE, True),
        "format_int16": (NONE, False),
        "byte_order_little": (NONE, False),
        "waveform": (NONE, True),
        "waveform_scaling_query": (NONE, True),
    },
    "load": {
        "mode_current": (NONE, False),
        "current": (FLOAT, True),
        "current_query": (NONE, False),
        "input_on": (NONE, True),
        "input_off": (NONE, True),
        "input_query": (NONE, True),
        "measure_current": (NONE, True),
        "measure_voltage": (NONE, True),
    },
}

# Whole-number values kept beside the templates (a bit mask of a status register).
INTEGERS: dict[str, dict[str, bool]] = {"supply": {"current_limited_mask": True}}

_SAMPLES = {FLOAT: 1.25e-3, INT: 1000, WORD: "AC"}


@dataclass(frozen=True)
class IoSettings:
    """Message framing and the IEEE 488.2 common commands of one instrument family."""

    write_termination: str = "\n"
    read_termination: str = "\n"
    identify: str = "*IDN?"
    clear_status: str = "*CLS"
    operation_complete: str = "*OPC?"
    error_query: str = "SYST:ERR?"
    block_terminated: bool = True  # a block reply ends with the read termination


@dataclass(frozen=True)
class ScopeCapabilities:
    """What the scope offers. Ranges are full scale peak to peak in V at the scope INPUT."""

    adc_bits: int
    ranges: tuple[float, ...]
    sample_intervals: tuple[float, ...]  # s
    record_lengths: tuple[int, ...]
    max_averages: int
    rearm_time: float  # s between triggered records
    max_offset: float | None = None  # V at the input, either side of zero
    bandwidth_limits: tuple[float, ...] = ()  # Hz


@dataclass(frozen=True)
class Profile:
    """A validated profile. ``command(key, ch=..., value=...)`` gives one SCPI message."""

    name: str
    role: str
    description: str
    source: str
    io: IoSettings
    commands: dict[str, str]
    integers: dict[str, int] = field(default_factory=dict)
    capabilities: ScopeCapabilities | None = None

    def has(self, key: str) -> bool:
        return key in self.commands

    def command(self, key: str, ch: int = 1, value: Any = None) -> str:
        """The message for command ``key`` (KeyError naming the profile if it has none)."""
        try:
            template = self.commands[key]
        except KeyError:
            raise KeyError(f"profile {self.name} ({self.source}) has no command {key!r}") from None
        return template.format(ch=ch, value=value)


def profile_path(name_or_path: str | Path, base_dir: Path | None = None) -> tuple[str, Any, bool]:
    """(source text for messages, a readable file, True if the user gave a path)."""
    text = str(name_or_path)
    if text.endswith(".toml") or "/" in text or "\\" in text:
        path = Path(text)
        if not path.is_absolute() and base_dir is not None:
            path = base_dir / path
        return str(path), path, True
    resource = resources.files("benchseq.drivers") / "profiles" / f"{text}.toml"
    return f"profile {text} ({resource})", resource, False


def available_profiles() -> list[str]:
    """Shipped profile names, then those lab packages register (entry points)."""
    folder = resources.files("benchseq.drivers") / "profiles"
    shipped = sorted(
        p.name.removesuffix(".toml") for p in folder.iterdir() if p.name.endswith(".toml")
    )
    return shipped + [name for name in plugins.names("profile") if name not in shipped]


def load_profile(
    name_or_path: str | Path, role: str | None = None, base_dir: Path | None = None
) -> Profile:
    """Read and check a profile by name (drivers/profiles/<name>.toml) or by path.

    ``role``, when given, must match the profile's [profile].role.
    """
    source, where, given_path = profile_path(name_or_path, base_dir)
    if given_path:
        _text, data = read_toml(where)
    else:
        if not where.is_file():
            where, source = _registered_profile(str(name_or_path))
        _text, data = parse_toml_text(where.read_text(encoding="utf-8"), source)
    return parse_profile(data, source, role)


def _registered_profile(name: str) -> tuple[Any, str]:
    """A profile a lab package registers under ``name`` (entry-point group benchseq.profiles):
    (a readable file, source text for messages)."""
    if name not in plugins.registered("profile"):
        raise FileKeyError(
            name,
            "",
            f"no such instrument profile; available profiles: {', '.join(available_profiles())}"
            " (or give a path to a .toml file)",
        )
    found = plugins.load("profile", name, f"profile {name}", "")
    if callable(found):
        found = found()
    where = Path(found) if isinstance(found, str | os.PathLike) else found
    if not (hasattr(where, "is_file") and hasattr(where, "read_text")) or not where.is_file():
        raise FileKeyError(
            f"profile {name}",
            "",
            f"the package registering it gives {found!r}, which is not a readable profile file",
        )
    return where, f"profile {name} ({where}, registered by a package)"


def parse_profile(data: dict[str, Any], source: str, role: str | None = None) -> Profile:
    """Validate a parsed profile table."""
    top = Section(data, source)
    head = top.section("profile")
    assert head is not None
    name = head.text("name")
    declared = head.text("role", choices=tuple(COMMANDS))
    description = head.text("description", default="")
    head.done()
    if role is not None and declared != role:
        raise head.error(
            "role", f"this is a {declared} profile, but the bench uses it as the {role}"
        )

    io_section = top.section("io", required=False)
    io = IoSettings() if io_section is None else _io(io_section)

    cmd = top.section("commands")
    assert cmd is not None
    schema = COMMANDS[declared]
    integer_keys = INTEGERS.get(declared, {})
    commands: dict[str, str] = {}
    integers: dict[str, int] = {}
    for key, (kind, required) in schema.items():
        template = cmd.text(key, default=None)
        if template is None:
            if required:
                strays = [k for k in cmd.data if k not in schema and k not in integer_keys]
                guess = nearest(key, strays)
                hint = f'; is "{guess}" a misspelling of it?' if guess else ""
                raise cmd.error(key, f"missing (required){hint}")
            continue
        _check_template(cmd, key, template, kind)
        commands[key] = template
    for key, required in integer_keys.items():
        number = (
            cmd.integer(key, minimum=0) if required else cmd.integer(key, default=None, minimum=0)
        )
        if number is not None:
            integers[key] = number
    cmd.done()

    capabilities = None
    if declared == "scope":
        caps = top.section("capabilities")
        assert caps is not None
        capabilities = _capabilities(caps)
    top.done()
    return Profile(name, declared, description, source, io, commands, integers, capabilities)


def _io(section: Section) -> IoSettings:
    defaults = IoSettings()
    values: dict[str, Any] = {}
    for key in (
        "write_termination",
        "read_termination",
        "identify",
        "clear_status",
        "operation_complete",
        "error_query",
    ):
        values[key] = section.text(key, default=getattr(defaults, key))
    for key in ("write_termination", "read_termination"):
        if values[key] not in ("\n", "\r\n", "\r"):
            raise section.error(key, 'expected "\\n", "\\r\\n" or "\\r"')
    values["block_terminated"] = section.flag("block_terminated", default=True)
    section.done()
    return IoSettings(**values)


def _check_template(section: Section, key: str, template: str, kind: str) -> None:
    """Placeholders must be {ch} and (for a setting) {value}, and the template must format."""
    try:
        fields = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        raise section.error(key, f"template {template!r} is malformed: {exc}") from None
    for name in fields:
        if name not in PLACEHOLDERS:
            raise section.error(
                key, f"template {template!r} uses {{{name}}}; only {{ch}} and {{value}} exist"
            )
    has_value = "value" in fields
    if kind == NONE and has_value:
        raise section.error(key, f"template {template!r} takes no {{value}}")
    if kind != NONE and not has_value:
        raise section.error(key, f"template {template!r} needs a {{value}} placeholder")
    try:
        template.format(ch=1, value=_SAMPLES.get(kind))
    except (ValueError, TypeError, KeyError, IndexError) as exc:
        wanted = {FLOAT: "a number", INT: "a whole number", WORD: "a word"}.get(kind, "nothing")
        raise section.error(
            key, f"template {template!r} cannot format {wanted} as its value: {exc}"
        ) from None


# Allowed ranges of a scope's capabilities (wide: they stop typos, not unusual scopes).
CAPABILITY_RANGES: dict[str, tuple[float, float]] = {
    "ranges": (1e-4, 1e4),  # V full scale at the input
    "sample_intervals": (1e-13, 10.0),  # s
    "record_lengths": (16, 1_000_000_000),
    "bandwidth_limits": (1e3, 100e9),  # Hz
    "rearm_time": (0.0, 60.0),  # s
    "max_offset": (1e-6, 1e4),  # V
    "max_averages": (1, 1_000_000),
}


def _numbers(section: Section, key: str, integer: bool = False) -> tuple[Any, ...]:
    values = section.items_list(key, allow_scalar=False)
    low, high = CAPABILITY_RANGES[key]
    out = []
    for i, item in enumerate(values):
        if isinstance(item, bool) or not isinstance(item, int | float) or not item > 0:
            raise FileKeyError(
                section.source, f"{section.key_path(key)}[{i}]", "expected a positive number"
            )
        if not low <= item <= high:
            raise FileKeyError(
                section.source,
                f"{section.key_path(key)}[{i}]",
                f"{item!r} is outside the allowed range {low:g} to {high:g}",
            )
        if integer and not isinstance(item, int):
            raise FileKeyError(
                section.source, f"{section.key_path(key)}[{i}]", "expected a whole number"
            )
        out.append(int(item) if integer else float(item))
    if sorted(out) != out or len(set(out)) != len(out):
        raise section.error(key, "list the values in rising order, each once")
    return tuple(out)


_MISSING_NUMBER: Any = object()


def _bounded(section: Section, key: str, default: Any) -> Any:
    """A number within CAPABILITY_RANGES[key] (``default`` when absent; _MISSING_NUMBER:
    required)."""
    value = section.number(key) if default is _MISSING_NUMBER else section.number(key, default)
    if value is None:
        return None
    low, high = CAPABILITY_RANGES[key]
    if not low <= value <= high:
        raise section.error(key, f"{value:g} is outside the allowed range {low:g} to {high:g}")
    return value


def _capabilities(section: Section) -> ScopeCapabilities:
    caps = ScopeCapabilities(
        adc_bits=section.integer("adc_bits", minimum=4, maximum=16),
        ranges=_numbers(section, "ranges"),
        sample_intervals=_numbers(section, "sample_intervals"),
        record_lengths=_numbers(section, "record_lengths", integer=True),
        max_averages=section.integer(
            "max_averages", minimum=1, maximum=int(CAPABILITY_RANGES["max_averages"][1])
        ),
        rearm_time=_bounded(section, "rearm_time", default=_MISSING_NUMBER),
        max_offset=_bounded(section, "max_offset", default=None),
        bandwidth_limits=_numbers(section, "bandwidth_limits")
        if section.has("bandwidth_limits")
        else (),
    )
    section.raw("bandwidth_limits", default=None)
    section.done()
    return caps
