"""The one small interface every driver talks to, whatever is on the other end.

Implementations: the VISA transport (pyvisa, pyvisa-py by default) and the simulated
bench's in-process transport. Every failure surfaces as a benchseq.drivers.errors class.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable


@runtime_checkable
class Transport(Protocol):
    """Message-level I/O with one instrument. Timeouts in seconds."""

    resource: str
    timeout_s: float

    def write(self, command: str) -> None:
        """Send one command (the terminator is added here)."""

    def query(self, command: str) -> str:
        """Send a command and return its reply, without the terminator."""

    def query_block(self, command: str) -> bytes:
        """Send a command whose reply is an IEEE 488.2 definite-length block; return the data."""

    def clear(self) -> None:
        """Discard anything pending (after an error: no stale reply may follow)."""

    def reconnect(self) -> None:
        """Close and open the connection again."""

    def close(self) -> None:
        """Release the connection."""
