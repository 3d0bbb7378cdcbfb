"""Shared set-up of the driver tests: role instruments on a recorded conversation
(benchseq.drivers.replay), a bench whose connections are replay transports, a virtual
clock, retried opening of a faulty bench, and a wall-clock bound for tests on real sockets.

SYST:ERR? replies follow IEEE 488.2 / SCPI-1999: '<code>,"<text>"', code 0 = empty queue
(SCPI-1999 Vol. 2 §21.8, from memory).
"""

from __future__ import annotations

import signal
from collections.abc import Callable, Iterable, Iterator
from typing import Any, TypeVar

import pytest

from benchseq.bench import InstrumentSpec
from benchseq.drivers.errors import ConnectionLost, InstrumentError
from benchseq.drivers.profile import load_profile
from benchseq.drivers.replay import Conversation, ReplayTransport, replay
from benchseq.drivers.session import open_session as _open_session

NO_ERROR = '+0,"No error"'
OK = ("SYST:ERR?", NO_ERROR)  # the empty error queue read after every setting
RES = "REPLAY::1"

T = TypeVar("T")


def role_spec(role: str, channel: int = 1, timeout_s: float = 5.0) -> InstrumentSpec:
    """A bench entry for ``role`` on the shipped SCPI profile, at the replay resource."""
    return InstrumentSpec(role, RES, f"scpi-{role}", None, channel, timeout_s)


def on_replay(
    cls: type[Any],
    pairs: Iterable[tuple[str, Any]],
    *,
    channel: int = 1,
    timeout_s: float = 5.0,
    **extra: Any,
) -> tuple[Any, ReplayTransport, list[float]]:
    """(instrument, transport, pauses): role class ``cls`` on its shipped SCPI profile,
    talking to a replay of ``pairs``; the pauses it would sleep are recorded, not slept.
    ``extra`` goes to the class (e.g. a scope's ``setup``)."""
    transport = replay(pairs, RES)
    pauses: list[float] = []
    role = cls.role
    instrument = cls(
        load_profile(f"scpi-{role}", role),
        transport,
        role_spec(role, channel, timeout_s),
        sleep=pauses.append,
        **extra,
    )
    return instrument, transport, pauses


def done(transport: ReplayTransport) -> None:
    """Fail unless every recorded step of the transport's conversation happened."""
    transport.conversation.assert_done()


class FakeClock:
    """A virtual clock: sleep() moves now() on at once."""

    def __init__(self) -> None:
        self.t = 0.0

    def now(self) -> float:
        return self.t

    def sleep(self, s: float) -> None:
        self.t += s


class Connector:
    """connect(role) -> a replay transport named '<role>#<n>' (n = 1 for the session's own);
    roles in ``fail`` refuse every connection after the first."""

    def __init__(self, conversation: Conversation, fail: set[str] = frozenset()) -> None:
        self.conversation = conversation
        self.count: dict[str, int] = {}
        self.fail = set(fail)

    def __call__(self, role: str) -> ReplayTransport:
        n = self.count[role] = self.count.get(role, 0) + 1
        if n > 1 and role in self.fail:
            raise ConnectionLost(f"{role}#{n}", "", "cannot open: connection refused")
        return ReplayTransport(self.conversation, f"{role}#{n}")


def first_opened(open_one: Callable[[int], T], attempts: int = 5) -> T | None:
    """``open_one(attempt)`` until it does not raise an InstrumentError (opening a bench with
    injected faults may itself meet one); None if every attempt failed."""
    for attempt in range(attempts):
        try:
            return open_one(attempt)
        except InstrumentError:
            continue
    return None


def time_bound(seconds: int) -> Any:
    """An autouse fixture failing any test of the module that runs over ``seconds`` of
    wall time, whatever the transport does. Use: ``bounded = time_bound(20)``."""

    @pytest.fixture(autouse=True)
    def bounded() -> Iterator[None]:
        def expired(signum: int, frame: Any) -> None:  # pragma: no cover - only on a hang
            raise TimeoutError(f"test exceeded its {seconds} s bound")

        previous = signal.signal(signal.SIGALRM, expired)
        signal.alarm(seconds)
        yield
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)

    return bounded


class Keeper:
    """A session factory for runs (``session_factory=``) that keeps every session it opened,
    so a test can read the simulator's log and counts afterwards (none opened: nothing on)."""

    def __init__(self) -> None:
        self.sessions: list[Any] = []

    def __call__(self, bench: Any, seed: int = 0, faults: Any = None) -> Any:
        # the function itself, taken at import: tests monkeypatch the module's name to a Keeper
        session = _open_session(bench, seed=seed, faults=faults)
        self.sessions.append(session)
        return session
