"""Reading engineer-written TOML: every value is fetched through a Section that knows its
key path, so each error names the file, the key and what was expected, and keys nobody
asked for are reported (with the nearest valid name) instead of being silently ignored."""

from __future__ import annotations

import math
import tomllib
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

from benchseq.errors import FileKeyError, unknown_key_message
from benchseq.ranges import Range
from benchseq.units import (
    DIMENSION_WORDS,
    Amplitude,
    QuantityError,
    parse_amplitude,
    parse_quantity,
)

_MISSING: Any = object()


def read_toml(path: str | Path) -> tuple[str, dict[str, Any]]:
    """(text, parsed table) of a TOML file; a clear error for a missing or malformed file."""
    source = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise FileKeyError(source, "", "file not found") from None
    except ValueError:  # e.g. a NUL character in the path
        raise FileKeyError(source, "", "not a usable file name") from None
    except IsADirectoryError:
        raise FileKeyError(source, "", "is a directory, not a TOML file") from None
    except OSError as exc:
        raise FileKeyError(source, "", f"cannot read: {exc.strerror}") from None
    return parse_toml_text(raw, source)


def parse_toml_text(raw: bytes | str, source: str) -> tuple[str, dict[str, Any]]:
    """Parse TOML text, naming ``source`` in any error."""
    try:
        text = raw.decode("utf-8") if isinstance(raw, bytes) else raw
    except UnicodeDecodeError as exc:
        raise FileKeyError(source, "", f"not UTF-8 text (byte {exc.start})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise FileKeyError(source, "", f"not valid TOML: {exc}") from None
    except RecursionError:
        raise FileKeyError(source, "", "not valid TOML: nested too deeply") from None
    except ValueError as exc:  # a number with thousands of digits
        raise FileKeyError(source, "", f"not valid TOML: {exc}") from None
    return text, data


class Section:
    """One table of a TOML file, read key by key."""

    def __init__(self, data: dict[str, Any], source: str, path: str = "") -> None:
        if not isinstance(data, dict):
            raise FileKeyError(source, path, f"expected a table, got {_kind(data)}")
        self.data = data
        self.source = source
        self.path = path
        self._used: set[str] = set()

    # -- helpers -------------------------------------------------------------------
    def key_path(self, key: str | int) -> str:
        if isinstance(key, int):
            return f"{self.path}[{key}]"
        return f"{self.path}.{key}" if self.path else key

    def error(self, key: str | int, problem: str) -> FileKeyError:
        return FileKeyError(self.source, self.key_path(key), problem)

    def has(self, key: str) -> bool:
        return key in self.data

    def raw(self, key: str, default: Any = _MISSING) -> Any:
        self._used.add(key)
        if key not in self.data:
            if default is _MISSING:
                guess = _respelling(key, self.data)
                hint = f'; is "{guess}" a misspelling of it?' if guess is not None else ""
                raise self.error(key, f"missing (required){hint}")
            return default
        return self.data[key]

    def keys(self) -> Iterator[str]:
        return iter(self.data)

    # -- typed getters -------------------------------------------------------------
    def section(self, key: str, required: bool = True) -> Section | None:
        if not required and key not in self.data:
            self._used.add(key)
            return None
        value = self.raw(key)
        if not isinstance(value, dict):
            raise self.error(key, f"expected a table, got {_kind(value)}")
        return Section(value, self.source, self.key_path(key))

    def text(self, key: str, default: Any = _MISSING, choices: Iterable[str] | None = None) -> Any:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if not isinstance(value, str):
            raise self.error(key, f"expected text, got {_kind(value)}")
        if "\x00" in value:
            raise self.error(key, "contains a NUL character (\\u0000); remove it")
        if choices is not None:
            options = list(choices)
            if value not in options:
                raise self.error(key, f"'{value}' is not one of: {', '.join(options)}")
        return value

    def integer(
        self,
        key: str,
        default: Any = _MISSING,
        minimum: int | None = None,
        maximum: int | None = None,
    ) -> Any:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(key, f"expected a whole number, got {_kind(value)}")
        if minimum is not None and value < minimum:
            raise self.error(key, f"{value} is below the minimum {minimum}")
        if maximum is not None and value > maximum:
            raise self.error(key, f"{value} is above the maximum {maximum}")
        return value

    def flag(self, key: str, default: Any = _MISSING) -> Any:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if not isinstance(value, bool):
            raise self.error(key, f"expected true or false, got {_kind(value)}")
        return value

    def number(self, key: str, default: Any = _MISSING, positive: bool = False) -> Any:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.error(key, f"expected a number, got {_kind(value)}")
        if not math.isfinite(_as_float(value)):
            raise self.error(key, f"expected a finite number, got {_kind(value)}")
        if positive and not value > 0:
            raise self.error(key, f"must be greater than zero, got {value}")
        return float(value)

    def quantity(
        self,
        key: str,
        dimension: str,
        default: Any = _MISSING,
        positive: bool = False,
        nonnegative: bool = False,
        within: Range | None = None,
    ) -> Any:
        """A quantity such as '4.7 uF'; ``dimension`` as in benchseq.units.parse_quantity;
        ``within``: the allowed range (benchseq.ranges), refused with the range named."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        number = self._check_sign(
            key, self.parse_value(value, dimension, key), positive, nonnegative
        )
        return self.check_range(key, number, value, within)

    def check_range(self, key: str | int, number: float, written: Any, within: Range | None) -> Any:
        """``number`` if it lies in ``within`` (None: any), else an error naming the range."""
        if within is not None and not within.contains(number):
            shown = f"'{written}'" if isinstance(written, str) else f"{written!r}"
            raise self.error(key, f"{shown} is outside the allowed range {within.describe()}")
        return number

    def amplitude(self, key: str, default: Any = _MISSING) -> Any:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return self.parse_amplitude_value(value, key)

    def parse_value(self, value: Any, dimension: str, key: str | int) -> float:
        try:
            return parse_quantity(value, dimension, self.key_path(key))
        except QuantityError as exc:
            raise FileKeyError(self.source, self.key_path(key), _drop_where(exc)) from None

    def parse_amplitude_value(self, value: Any, key: str | int) -> Amplitude:
        try:
            amplitude = parse_amplitude(value, self.key_path(key))
        except QuantityError as exc:
            raise FileKeyError(self.source, self.key_path(key), _drop_where(exc)) from None
        if not amplitude.peak > 0:
            raise self.error(key, "an amplitude must be greater than zero")
        return amplitude

    def items_list(self, key: str, default: Any = _MISSING, allow_scalar: bool = True) -> Any:
        """A list value (a single scalar counts as a list of one when ``allow_scalar``)."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if isinstance(value, list):
            if not value:
                raise self.error(key, "an empty list; give at least one value")
            return value
        if allow_scalar and not isinstance(value, dict):
            return [value]
        raise self.error(key, f"expected a list, got {_kind(value)}")

    def _check_sign(self, key: str | int, value: float, positive: bool, nonnegative: bool) -> float:
        if positive and not value > 0:
            raise self.error(key, f"must be greater than zero, got {value:g}")
        if nonnegative and value < 0:
            raise self.error(key, f"must not be negative, got {value:g}")
        return value

    def done(self) -> None:
        """Raise for any key that was never read (a misspelling, or a key that does not exist)."""
        for key in self.data:
            if key not in self._used:
                raise self.error(key, unknown_key_message(key, self._used)) from None


def _drop_where(exc: QuantityError) -> str:
    """The quantity message without its ' at key' part (the FileKeyError names the key)."""
    message = f"'{exc.text}' where "
    message += f"{DIMENSION_WORDS.get(exc.expected, exc.expected)} is expected"
    text = str(exc)
    if "(" in text and text.endswith(")"):
        message += " " + text[text.rindex("(") :]
    return message


def _respelling(key: str, data: dict[str, Any]) -> str | None:
    """A key of ``data`` that is ``key`` written differently (case, '_'/'-'/' ', a plural s):
    conservative on purpose, so a missing key is never blamed on another valid one."""

    def plain(name: str) -> str:
        return "".join(ch for ch in name.lower() if ch.isalnum()).removesuffix("s")

    wanted = plain(key)
    for other in data:
        if isinstance(other, str) and other != key and plain(other) == wanted:
            return other
    return None


def _as_float(value: float) -> float:
    """float(value), or inf for an integer too large for a float."""
    try:
        return float(value)
    except OverflowError:
        return math.inf


def _kind(value: object) -> str:
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, str):
        return f"text '{value}'"
    if isinstance(value, int) and abs(value) > 10**30:
        return "a number too large to use"
    if isinstance(value, int | float):
        return f"the number {value}"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__
