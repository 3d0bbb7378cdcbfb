"""What every role class shares: settings that are checked and remembered, queries that
are retried, and recovery that restores the instrument's whole known state.

Rules (common practice for unattended sweeps, and the planning experiments):
- after each configuration step the error queue is drained (SYST:ERR? until code 0); an
  entry raises InstrumentReportedError naming the instrument, the command and the error;
- an entry of the passing kind (SCPI -3xx device-specific and -4xx query errors, e.g.
  -310 "System error") does not refuse the command itself: the command is sent once more
  (settings here are absolute, so sending one twice leaves the same state) and only a
  second entry is raised; -1xx command and -2xx execution errors are raised at once;
- a read-only query is retried a few times with growing pauses after a timeout or a
  garbled reply;
- a setting is never blindly sent again after an ambiguous failure (timeout, lost
  connection): the connection is renewed, the whole known state is applied again in the
  order it was first set, each item is read back and compared, and only then does the
  call return.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar

from benchseq.bench import InstrumentSpec
from benchseq.drivers.errors import (
    ConnectionLost,
    GarbledReply,
    InstrumentError,
    InstrumentReportedError,
    InstrumentTimeout,
    StateNotRestored,
    TruncatedBlock,
)
from benchseq.drivers.profile import Profile
from benchseq.drivers.transport import Transport

QUERY_ATTEMPTS = 3
RECOVERY_ATTEMPTS = 2
RESTORE_FAULTS = 6  # faults one restore may meet before it gives up
BACKOFF_S = (0.05, 0.2, 0.5)
MAX_ERROR_ENTRIES = 20  # an error queue that never empties is itself a fault
AMBIGUOUS = (InstrumentTimeout, ConnectionLost, GarbledReply, TruncatedBlock)
PASSING_CODES = (-499, -300)  # SCPI-99 vol. 2 ch. 21: -3xx device-specific, -4xx query errors
SEND_ATTEMPTS = 2  # a command met by a passing error entry is sent at most this often

log = logging.getLogger(__name__)  # each setting and its read-back (benchseq -v)


def is_passing(exc: BaseException) -> bool:
    """True for an error-queue entry that does not mean the command itself was refused."""
    return (
        isinstance(exc, InstrumentReportedError)
        and PASSING_CODES[0] <= exc.code <= PASSING_CODES[1]
    )


@dataclass(frozen=True)
class Setting:
    """One remembered setting: the message sent and, if it can be read back, how."""

    command: str
    query: str | None = None
    expected: Any = None  # parsed read-back value (float, bool, int or upper-case word)
    parse: Callable[[str, str, str], Any] | None = None  # how the read-back is parsed
    enables: bool | None = None  # True: switches an output on; False: off; None: a level


def parse_float(text: str, resource: str, command: str) -> float:
    """A number from a reply; anything else is a garbled reply."""
    try:
        value = float(text.strip().split(",")[0])
    except ValueError:
        raise GarbledReply(resource, command, "expected a number", text) from None
    if math.isnan(value):
        raise GarbledReply(resource, command, "expected a number", text)
    return value


def parse_bool(text: str, resource: str, command: str) -> bool:
    word = text.strip().upper()
    if word in ("1", "ON", "+1"):
        return True
    if word in ("0", "OFF", "+0"):
        return False
    raise GarbledReply(resource, command, "expected 1/0 or ON/OFF", text)


def parse_int(text: str, resource: str, command: str) -> int:
    value = parse_float(text, resource, command)
    if not math.isfinite(value) or value != int(value):
        raise GarbledReply(resource, command, "expected a whole number", text)
    return int(value)


def parse_word(text: str, resource: str, command: str) -> str:
    word = text.strip().strip('"').upper()
    if not word:
        raise GarbledReply(resource, command, "empty reply", text)
    return word


def _same(expected: Any, actual: Any) -> bool:
    if isinstance(expected, float):
        return math.isclose(expected, actual, rel_tol=1e-6, abs_tol=1e-12)
    if isinstance(expected, str):
        return str(actual).startswith(expected) or expected.startswith(str(actual))
    return bool(expected == actual)


class Instrument:
    """Base of the role classes. ``sleep`` pauses between retries (a virtual clock's sleep on
    the simulated bench)."""

    role: ClassVar[str] = ""

    def __init__(
        self,
        profile: Profile,
        transport: Transport,
        spec: InstrumentSpec,
        *,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        if self.role and profile.role != self.role:
            raise ValueError(f"{profile.source} is a {profile.role} profile, not a {self.role} one")
        self.profile = profile
        self.transport = transport
        self.spec = spec
        self.channel = spec.channel
        self._sleep = sleep
        self._state: dict[str, Setting] = {}
        self.passing_errors = 0  # passing error entries met and got past by sending again

    @property
    def resource(self) -> str:
        return self.transport.resource

    @property
    def known_state(self) -> list[Setting]:
        """The settings in the order they were (last) made; what restore() applies."""
        return list(self._state.values())

    def restore_order(self) -> list[tuple[str, Setting]]:
        """Outputs to switch off first, then levels and limits in the order they were set,
        outputs to switch on last: nothing turns on before its limits are in place."""
        items = list(self._state.items())
        offs = [item for item in items if item[1].enables is False]
        levels = [item for item in items if item[1].enables is None]
        ons = [item for item in items if item[1].enables is True]
        return offs + levels + ons

    def known_state_items(self) -> list[tuple[str, Setting]]:
        return list(self._state.items())

    def adopt(self, items: list[tuple[str, Setting]]) -> None:
        """Take over settings made through another connection (e.g. the safe state), so a
        later restore() does not undo them."""
        for slot, setting in items:
            self._state.pop(slot, None)
            self._state[slot] = setting

    def cmd(self, key: str, value: Any = None, ch: int | None = None) -> str:
        return self.profile.command(key, ch=self.channel if ch is None else ch, value=value)

    # -- common commands ----------------------------------------------------------------
    def identify(self) -> str:
        """The *IDN? reply (manufacturer, model, serial, firmware)."""
        return self.ask_text(self.profile.io.identify)

    def clear_status(self) -> None:
        """*CLS, then check the queue is empty."""
        self.send_checked(self.profile.io.clear_status)

    def send_checked(self, command: str) -> None:
        """Send ``command`` and drain the error queue; after a passing entry (is_passing)
        send it once more. A refusal, or a second entry, raises InstrumentReportedError."""
        for attempt in range(SEND_ATTEMPTS):
            self.transport.write(command)
            try:
                self.drain_errors(command)
                return
            except InstrumentReportedError as exc:
                if not is_passing(exc) or attempt == SEND_ATTEMPTS - 1:
                    raise
                self.passing_errors += 1

    def wait_complete(self, timeout_s: float | None = None) -> None:
        """*OPC? with ``timeout_s`` (s) for this one query; the reply must be 1."""
        command = self.profile.io.operation_complete
        saved = self.transport.timeout_s
        if timeout_s is not None:
            self.transport.timeout_s = max(saved, timeout_s)
        try:
            reply = self.transport.query(command)
        finally:
            self.transport.timeout_s = saved
        if reply.strip() not in ("1", "+1"):
            raise GarbledReply(self.resource, command, "expected 1", reply)

    def drain_errors(self, after: str) -> None:
        """Read the error queue until it is empty; raise for the first entry found."""
        command = self.profile.io.error_query
        first: tuple[int, str] | None = None
        for _ in range(MAX_ERROR_ENTRIES):
            reply = self.transport.query(command)
            code, message = parse_error_entry(reply, self.resource, command)
            if code == 0:
                break
            if first is None:
                first = (code, message)
        else:
            raise InstrumentError(
                self.resource,
                command,
                f"error queue still not empty after {MAX_ERROR_ENTRIES} reads",
            )
        if first is not None:
            raise InstrumentReportedError(self.resource, after, first[0], first[1])

    # -- settings ------------------------------------------------------------------------
    def configure(
        self,
        key: str,
        value: Any = None,
        *,
        slot: str | None = None,
        query_key: str | None = None,
        parse: Callable[[str, str, str], Any] = parse_float,
        remember: bool = True,
        ch: int | None = None,
        enables: bool | None = None,
    ) -> Any:
        """Send setting ``key`` (a profile command), check the error queue, read it back.

        Returns the read-back value (parsed by ``parse``) when ``query_key`` is given and the
        profile has it, else None. ``slot`` names what the setting controls (settings
        sharing a slot replace each other, e.g. output on/off).
        """
        command = self.cmd(key, value, ch)
        query = self.cmd(query_key, ch=ch) if query_key and self.profile.has(query_key) else None
        slot = slot or key
        previous = self._state.pop(slot, None)
        if remember:
            self._state[slot] = Setting(command, query, None, parse, enables)
        try:
            return self._apply(slot, command, query, parse, remember, enables)
        except InstrumentReportedError:
            # The instrument refused it: the old setting still stands.
            self._state.pop(slot, None)
            if previous is not None:
                self._state[slot] = previous
            raise
        except AMBIGUOUS:
            if not remember:
                raise
            # Did it take effect? Unknown: renew the connection, apply and verify everything.
            self.recover()
            setting = self._state[slot]
            return setting.expected if setting.query else None

    def switch(self, name: str, on: bool) -> None:
        """Switch ``name`` (an output or input) with the profile's ``<name>_on`` /
        ``<name>_off`` commands, read back with ``<name>_query`` and remembered for recovery
        (restore() switches it off first or on last)."""
        self.configure(
            f"{name}_on" if on else f"{name}_off",
            slot=name,
            enables=on,
            query_key=f"{name}_query",
            parse=parse_bool,
        )

    def switched_on(self, name: str) -> bool:
        """The instrument's own answer to ``<name>_query`` (read-only, retried)."""
        return bool(self.ask(f"{name}_query", parse_bool))

    def _apply(
        self,
        slot: str,
        command: str,
        query: str | None,
        parse: Callable[[str, str, str], Any],
        remember: bool,
        enables: bool | None = None,
    ) -> Any:
        self.send_checked(command)
        if query is None:
            log.debug("%s: %s", self.resource, command)
            return None
        actual = parse(self.transport.query(query), self.resource, query)
        log.debug("%s: %s; %s reads back %r", self.resource, command, query, actual)
        if remember:
            self._state[slot] = Setting(command, query, actual, parse, enables)
        return actual

    def recover(self) -> None:
        """Renew the connection and restore the whole known state, verified. Retried a few
        times (with pauses) while the faults are of the passing kind (timeouts, garbage,
        lost connections); a read-back that disagrees is raised at once."""
        for attempt in range(RECOVERY_ATTEMPTS):
            try:
                self.transport.reconnect()
                self.restore()
                return
            except AMBIGUOUS:
                if attempt == RECOVERY_ATTEMPTS - 1:
                    raise
                self._sleep(BACKOFF_S[min(attempt, len(BACKOFF_S) - 1)])

    def restore(self) -> None:
        """Apply every remembered setting again (restore_order()); read back and compare
        each one. A passing fault (timeout, garbage) retries that one setting after a clear;
        a lost connection may mean the instrument reset, so it starts over from the first
        setting; a passing error entry (is_passing) retries that setting. At most
        RESTORE_FAULTS faults, then the last one is raised."""
        order = self.restore_order()
        faults = 0
        position = 0
        while position < len(order):
            slot, setting = order[position]
            try:
                self._restore_one(slot, setting)
                position += 1
            except (*AMBIGUOUS, InstrumentReportedError) as exc:
                if isinstance(exc, InstrumentReportedError) and not is_passing(exc):
                    raise
                faults += 1
                if faults > RESTORE_FAULTS:
                    raise
                self._sleep(BACKOFF_S[min(faults - 1, len(BACKOFF_S) - 1)])
                if isinstance(exc, InstrumentReportedError):
                    continue  # the entry was read: the connection is in step
                if isinstance(exc, ConnectionLost):
                    self.transport.reconnect()
                    order, position = self.restore_order(), 0
                else:
                    try:
                        self.transport.clear()
                    except InstrumentError:
                        self.transport.reconnect()

    def _restore_one(self, slot: str, setting: Setting) -> None:
        self.send_checked(setting.command)
        if setting.query is None:
            return
        reply = self.transport.query(setting.query)
        parse = setting.parse or parse_float
        actual = parse(reply, self.resource, setting.query)
        if setting.expected is None:  # never read back before: this is the first reading
            self._state[slot] = dataclasses.replace(setting, expected=actual, parse=parse)
        elif not _same(setting.expected, actual):
            raise StateNotRestored(
                self.resource,
                setting.query,
                f"{slot} reads back {actual!r} after recovery, expected {setting.expected!r}",
                reply,
            )

    # -- queries ------------------------------------------------------------------------
    def ask_text(self, command: str) -> str:
        """A read-only query, retried with back-off after a timeout or a garbled reply."""
        last: InstrumentError | None = None
        for attempt in range(QUERY_ATTEMPTS):
            try:
                return self.transport.query(command)
            except ConnectionLost as exc:
                last = exc
                self._sleep(BACKOFF_S[min(attempt, len(BACKOFF_S) - 1)])
                try:
                    self.recover()
                except InstrumentError as again:
                    last = again
            except (InstrumentTimeout, GarbledReply, TruncatedBlock) as exc:
                last = exc
                self._sleep(BACKOFF_S[min(attempt, len(BACKOFF_S) - 1)])
                try:
                    self.transport.clear()
                except InstrumentError as again:
                    last = again
        assert last is not None
        raise last

    def ask(
        self, key: str, parse: Callable[[str, str, str], Any] = parse_float, ch: int | None = None
    ) -> Any:
        """Query profile command ``key`` (read-only, retried) and parse its reply."""
        command = self.cmd(key, ch=ch)
        last: InstrumentError | None = None
        for _ in range(QUERY_ATTEMPTS):
            reply = self.ask_text(command)
            try:
                return parse(reply, self.resource, command)
            except GarbledReply as exc:  # a complete but unreadable reply: ask again
                last = exc
                self.transport.clear()
        assert last is not None
        raise last


def parse_error_entry(reply: str, resource: str, command: str) -> tuple[int, str]:
    """(code, message) of a SYST:ERR? reply such as '-113,"Undefined header"'."""
    head, _, rest = reply.partition(",")
    try:
        code = int(head.strip())
    except ValueError:
        raise GarbledReply(resource, command, 'expected <code>,"<message>"', reply) from None
    return code, rest.strip().strip('"')
