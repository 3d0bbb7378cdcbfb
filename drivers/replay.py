"""A transport that replays a recorded conversation, for driver tests.

The conversation is a list of steps (resource, sent, reply): ``sent`` is the exact message
(or "<clear>", "<reconnect>", "<close>"), ``reply`` is None for a write, a str for a query,
bytes for a block query, or an exception instance to raise instead of replying. Any
message that is not the next step, and any step left over at the end, fails the test.
Several transports may share one Conversation, so the order across instruments is checked.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

CLEAR, RECONNECT, CLOSE = "<clear>", "<reconnect>", "<close>"


class ReplayMismatch(AssertionError):
    """The driver sent something the recorded conversation does not have next."""


class Conversation:
    def __init__(self, steps: Iterable[tuple[str, str, Any]] = ()) -> None:
        self.steps = list(steps)
        self.position = 0
        self.sent: list[tuple[str, str]] = []

    def add(self, resource: str, pairs: Iterable[tuple[str, Any]]) -> Conversation:
        self.steps.extend((resource, sent, reply) for sent, reply in pairs)
        return self

    def take(self, resource: str, sent: str, kind: str) -> Any:
        self.sent.append((resource, sent))
        if self.position >= len(self.steps):
            raise ReplayMismatch(
                f"{resource}: unexpected {kind} {sent!r}: the conversation is over"
            )
        want_resource, want, reply = self.steps[self.position]
        if (want_resource, want) != (resource, sent):
            raise ReplayMismatch(
                f"step {self.position}: expected {want_resource} <- {want!r}, "
                f"got {resource} <- {sent!r} ({kind})"
            )
        if kind == "write" and reply is not None and not isinstance(reply, BaseException):
            raise ReplayMismatch(
                f"step {self.position}: {sent!r} was recorded as a query, sent as a write"
            )
        if kind == "query" and not isinstance(reply, str | BaseException):
            raise ReplayMismatch(
                f"step {self.position}: {sent!r} expects a text reply in the recording"
            )
        if kind == "block" and not isinstance(reply, bytes | BaseException):
            raise ReplayMismatch(
                f"step {self.position}: {sent!r} expects a block reply in the recording"
            )
        self.position += 1
        if isinstance(reply, BaseException):
            raise reply
        return reply

    def assert_done(self) -> None:
        left = self.steps[self.position :]
        if left:
            raise ReplayMismatch(
                f"{len(left)} recorded steps never happened, first: {left[0][:2]!r}"
            )


class ReplayTransport:
    """Implements benchseq.drivers.transport.Transport from a Conversation."""

    def __init__(self, conversation: Conversation, resource: str = "REPLAY::1") -> None:
        self.conversation = conversation
        self.resource = resource
        self.timeout_s = 1.0
        self.timeouts: list[float] = []  # the timeout in force at each query, for checks

    def write(self, command: str) -> None:
        self.conversation.take(self.resource, command, "write")

    def query(self, command: str) -> str:
        self.timeouts.append(self.timeout_s)
        return str(self.conversation.take(self.resource, command, "query"))

    def query_block(self, command: str) -> bytes:
        self.timeouts.append(self.timeout_s)
        return bytes(self.conversation.take(self.resource, command, "block"))

    def clear(self) -> None:
        self.conversation.take(self.resource, CLEAR, "write")

    def reconnect(self) -> None:
        self.conversation.take(self.resource, RECONNECT, "write")

    def close(self) -> None:
        self.conversation.take(self.resource, CLOSE, "write")


def replay(pairs: Iterable[tuple[str, Any]], resource: str = "REPLAY::1") -> ReplayTransport:
    """A transport for one instrument replaying ``pairs`` of (sent, reply)."""
    return ReplayTransport(Conversation().add(resource, pairs), resource)
