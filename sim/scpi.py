"""A small SCPI-1999 / IEEE 488.2 message parser shared by the simulated instruments.

Headers are matched node by node against patterns such as ``[SOURce#]:FREQuency[:CW]``:
upper-case letters are the short form, the whole word the long form, ``[...]`` marks an
optional node, ``#`` allows a numeric suffix (``SOUR1``). Matching is case-insensitive.
A message may hold several commands separated by ';'; a header without a leading ':'
after the first is tried as written, then relative to the previous command's path
(IEEE 488.2 §7.6.1). Errors go to the error queue with standard numbers (SCPI-1999 vol. 2
ch. 21): -113 undefined header, -222 data out of range, and so on.
"""

from __future__ import annotations

import math
import re
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

ERROR_TEXT: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -310: "System error",
    -350: "Queue overflow",
}
ERROR_QUEUE_SIZE = 20  # SCPI-1999 asks for at least 2; a common size (practice)


class ScpiError(Exception):
    """A command that cannot be executed; ``code`` goes to the error queue."""

    def __init__(self, code: int, detail: str = "") -> None:
        self.code = code
        self.detail = detail
        super().__init__(
            f"{code},{ERROR_TEXT.get(code, 'Error')}" + (f"; {detail}" if detail else "")
        )


@dataclass(frozen=True)
class _Node:
    short: str
    long: str
    optional: bool
    suffix: bool


def _compile(pattern: str) -> tuple[_Node, ...]:
    nodes = []
    for raw in re.findall(r"\[:?[^\]]+\]|:?[^:\[]+", pattern):
        optional = raw.startswith("[")
        word = raw.strip("[]").lstrip(":")
        suffix = word.endswith("#")
        word = word.rstrip("#")
        short = "".join(ch for ch in word if ch.isupper() or ch == "*" or ch.isdigit())
        nodes.append(_Node(short.upper(), word.upper(), optional, suffix))
    return tuple(nodes)


_TOKEN = re.compile(r"^([A-Za-z_*][A-Za-z_]*?)(\d*)$")

Handler = Callable[[list[int], list[str]], str | None]


@dataclass(frozen=True)
class Command:
    pattern: str
    query: bool
    handler: Handler
    nodes: tuple[_Node, ...]


def _match(
    nodes: tuple[_Node, ...], tokens: list[tuple[str, str]], suffixes: list[int]
) -> list[int] | None:
    """Suffix list (1 where absent) if ``tokens`` match ``nodes``, else None."""
    if not nodes:
        return suffixes if not tokens else None
    node = nodes[0]
    if tokens:
        name, digits = tokens[0]
        if name in (node.short, node.long) and (node.suffix or not digits):
            taken = [*suffixes, int(digits) if digits else 1] if node.suffix else suffixes
            found = _match(nodes[1:], tokens[1:], taken)
            if found is not None:
                return found
    if node.optional:
        return _match(nodes[1:], tokens, [*suffixes, 1] if node.suffix else suffixes)
    return None


def split_outside_quotes(text: str, separator: str) -> list[str]:
    parts, current, quote = [], [], ""
    for ch in text:
        if quote:
            current.append(ch)
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
            current.append(ch)
        elif ch == separator:
            parts.append("".join(current))
            current = []
        else:
            current.append(ch)
    parts.append("".join(current))
    return parts


_UNIT_SUFFIX = {
    "": 1.0, "HZ": 1.0, "KHZ": 1e3, "MHZ": 1e6, "GHZ": 1e9, "V": 1.0, "MV": 1e-3, "UV": 1e-6,
    "A": 1.0, "MA": 1e-3, "UA": 1e-6, "S": 1.0, "MS": 1e-3, "US": 1e-6, "NS": 1e-9,
    "PS": 1e-12, "OHM": 1.0, "VPP": 1.0,
}  # fmt: skip
_NUMERIC = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z]*)$")


def number(
    args: list[str],
    low: float = -math.inf,
    high: float = math.inf,
    index: int = 0,
    special: dict[str, float] | None = None,
) -> float:
    """The numeric parameter ``args[index]`` (SCPI <NRf> with an optional unit suffix).

    MIN/MAX give ``low``/``high``; outside [low, high] is -222 data out of range."""
    if len(args) <= index or not args[index].strip():
        raise ScpiError(-109)
    text = args[index].strip()
    word = text.upper()
    if special and word in special:
        return special[word]
    if word in ("MIN", "MINIMUM") and math.isfinite(low):
        return low
    if word in ("MAX", "MAXIMUM") and math.isfinite(high):
        return high
    found = _NUMERIC.match(text)
    if found is None or found.group(2).upper() not in _UNIT_SUFFIX:
        raise ScpiError(-104, f"'{text}' is not a number")
    value = float(found.group(1)) * _UNIT_SUFFIX[found.group(2).upper()]
    if not math.isfinite(value):
        raise ScpiError(-104, f"'{text}' is not a finite number")
    if not (low <= value <= high):
        raise ScpiError(-222, f"{value:g} outside {low:g}..{high:g}")
    return value


def integer(args: list[str], low: int, high: int, index: int = 0) -> int:
    value = number(args, low, high, index)
    if value != round(value):
        raise ScpiError(-104, f"{value:g} is not a whole number")
    return round(value)


def boolean(args: list[str], index: int = 0) -> bool:
    if len(args) <= index or not args[index].strip():
        raise ScpiError(-109)
    word = args[index].strip().upper()
    if word in ("ON", "1"):
        return True
    if word in ("OFF", "0"):
        return False
    raise ScpiError(-224, f"'{args[index].strip()}' is not ON or OFF")


def choice(args: list[str], options: dict[str, str], index: int = 0) -> str:
    """The canonical name of a character parameter: ``options`` maps accepted words to it."""
    if len(args) <= index or not args[index].strip():
        raise ScpiError(-109)
    word = args[index].strip().strip("\"'").upper()
    if word not in options:
        raise ScpiError(-224, f"'{args[index].strip()}' is not one of {', '.join(options)}")
    return options[word]


def no_args(args: list[str]) -> None:
    if any(a.strip() for a in args):
        raise ScpiError(-108)


class ScpiInstrument:
    """An instrument's message handling: command table, error queue, common commands."""

    identity = "benchseq,SIM,0,0.1"

    def __init__(self) -> None:
        self.errors: deque[tuple[int, str]] = deque()
        self.event_status = 0
        self.commands: list[Command] = []
        self.add("*IDN", True, lambda s, a: self.identity)
        self.add("*RST", False, lambda s, a: self.reset())
        self.add("*CLS", False, lambda s, a: self.clear_status())
        self.add("*OPC", True, lambda s, a: self.operation_complete())
        self.add("*OPC", False, lambda s, a: None)
        self.add("*WAI", False, lambda s, a: None)
        self.add("*ESR", True, lambda s, a: self._read_esr())
        self.add("*TST", True, lambda s, a: "0")
        self.add("SYSTem:ERRor[:NEXT]", True, lambda s, a: self.next_error())
        self.add("SYSTem:ERRor:COUNt", True, lambda s, a: str(len(self.errors)))
        self.add("SYSTem:VERSion", True, lambda s, a: "1999.0")

    # -- table -----------------------------------------------------------------------------
    def add(self, pattern: str, query: bool, handler: Handler) -> None:
        self.commands.append(Command(pattern, query, handler, _compile(pattern)))

    def reset(self) -> None:
        """*RST: back to the power-on settings (subclasses extend it)."""

    def operation_complete(self) -> str:
        return "1"

    def clear_status(self) -> None:
        self.errors.clear()
        self.event_status = 0

    def _read_esr(self) -> str:
        value, self.event_status = self.event_status, 0
        return str(value)

    # -- error queue ---------------------------------------------------------------------------
    def push_error(self, code: int, detail: str = "") -> None:
        """Queue an error (the oldest stays; a full queue ends with -350 Queue overflow)."""
        text = ERROR_TEXT.get(code, "Error") + (f"; {detail}" if detail else "")
        if len(self.errors) >= ERROR_QUEUE_SIZE:
            self.errors[-1] = (-350, ERROR_TEXT[-350])
        else:
            self.errors.append((code, text))
        # ESR bits (IEEE 488.2 §11.5.1): command error 5, execution error 4, device error 3
        self.event_status |= 32 if -199 <= code <= -100 else 16 if -299 <= code <= -200 else 8

    def next_error(self) -> str:
        if not self.errors:
            return '0,"No error"'
        code, text = self.errors.popleft()
        return f'{code},"{text}"'

    # -- messages ------------------------------------------------------------------------------
    def handle(self, message: str) -> bytes | None:
        """Execute one program message; the reply (with '\\n') if it held queries, else None."""
        replies: list[str] = []
        previous: list[tuple[str, str]] = []
        for unit in split_outside_quotes(message.strip(), ";"):
            unit = unit.strip()
            if not unit:
                continue
            try:
                reply, previous = self._execute(unit, previous)
            except ScpiError as exc:
                self.push_error(exc.code, exc.detail)
                break
            if reply is not None:
                replies.append(reply)
        if not replies:
            return None
        return (";".join(replies) + "\n").encode("latin-1")

    def _execute(
        self, unit: str, previous: list[tuple[str, str]]
    ) -> tuple[str | None, list[tuple[str, str]]]:
        head, _, rest = unit.partition(" ")
        if "\t" in head:
            head, _, more = head.partition("\t")
            rest = more + " " + rest
        query = head.endswith("?")
        head = head.rstrip("?")
        absolute = head.startswith(":")
        tokens: list[tuple[str, str]] = []
        for word in head.lstrip(":").split(":"):
            found = _TOKEN.match(word)
            if found is None:
                raise ScpiError(-102 if word else -100, f"header '{unit.split(' ')[0]}'")
            tokens.append((found.group(1).upper(), found.group(2)))
        args = [a.strip() for a in split_outside_quotes(rest, ",")] if rest.strip() else []
        attempts = [tokens]
        if not absolute and previous and not tokens[0][0].startswith("*"):
            attempts.append(previous[:-1] + tokens)
        for candidate in attempts:
            for command in self.commands:
                if command.query != query:
                    continue
                suffixes = _match(command.nodes, candidate, [])
                if suffixes is not None:
                    return command.handler(suffixes, args), candidate
        raise ScpiError(-113, f"'{unit.split(' ')[0]}'")
