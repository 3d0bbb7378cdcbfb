"""Stop requests from signals: the first Ctrl-C / SIGTERM / SIGHUP asks the run to stop
after the point in progress; the second abandons the point at once. Neither can interrupt
the safe-state sequence, which runs with the handlers shielded."""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator
from types import FrameType

STOP_SIGNALS = tuple(
    s
    for s in (
        getattr(signal, "SIGINT", None),
        getattr(signal, "SIGTERM", None),
        getattr(signal, "SIGHUP", None),
    )
    if s is not None
)


class AbandonPoint(BaseException):
    """Raised by the second stop request to leave the point in progress at once.

    A BaseException so that no ``except Exception`` inside a driver swallows it."""


class StopControl:
    """Shared stop state between signal handlers and the sequencer."""

    def __init__(self) -> None:
        self.requested = threading.Event()
        self.reason = ""
        self.count = 0
        self._shielded = False

    def request(self, reason: str) -> None:
        """Ask the run to stop after the point in progress (also usable from code and tests)."""
        self.count += 1
        if not self.reason:
            self.reason = reason
        self.requested.set()

    @property
    def stop_requested(self) -> bool:
        return self.requested.is_set()

    def _handler(self, signum: int, frame: FrameType | None) -> None:
        name = signal.Signals(signum).name
        self.request(f"{name} received")
        if self.count >= 2 and not self._shielded:
            raise AbandonPoint(f"second stop request ({name})")

    @contextlib.contextmanager
    def installed(self) -> Iterator[StopControl]:
        """Install the handlers for the duration of a run (main thread only)."""
        if threading.current_thread() is not threading.main_thread():
            yield self
            return
        previous = {s: signal.getsignal(s) for s in STOP_SIGNALS}
        for s in STOP_SIGNALS:
            signal.signal(s, self._handler)
        try:
            yield self
        finally:
            for s, handler in previous.items():
                signal.signal(s, handler)

    @contextlib.contextmanager
    def shielded(self) -> Iterator[None]:
        """Within this block a stop request is recorded but never raises."""
        was = self._shielded
        self._shielded = True
        try:
            yield
        finally:
            self._shielded = was
