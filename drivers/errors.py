"""Instrument exceptions: each names the instrument (resource), the command and what came back."""

from __future__ import annotations

from benchseq.errors import MeasurementFailure


class InstrumentError(MeasurementFailure):
    """Base class for instrument trouble."""

    def __init__(self, resource: str, command: str, problem: str, reply: bytes | str = b"") -> None:
        self.resource = resource
        self.command = command
        self.problem = problem
        self.reply = reply
        text = f"{resource}: {problem}"
        if command:
            text += f" (command {command!r})"
        if reply:
            shown = reply if isinstance(reply, str) else reply[:80]
            text += f"; got {shown!r}"
        super().__init__(text)


class InstrumentTimeout(InstrumentError):
    """No (complete) reply within the timeout."""


class ConnectionLost(InstrumentError):
    """The connection was refused, closed or reset."""


class GarbledReply(InstrumentError):
    """A reply that cannot be decoded or parsed as what the command returns."""


class TruncatedBlock(InstrumentError):
    """An IEEE 488.2 block shorter than its header declared, or a malformed header."""


class InstrumentReportedError(InstrumentError):
    """The instrument's error queue (SYST:ERR?) held an error after a command."""

    def __init__(self, resource: str, command: str, code: int, message: str) -> None:
        self.code = code
        self.message = message
        super().__init__(resource, command, f"instrument error {code}, {message!r}")


class StateNotRestored(InstrumentError):
    """After a reconnect, a setting read back differently from what had been set."""
