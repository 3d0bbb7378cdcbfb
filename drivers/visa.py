"""The VISA transport: pyvisa (pyvisa-py, "@py", by default), with every fault mapped.

Why not plain pyvisa reads everywhere (planning experiments on pyvisa-py):
- a newline read termination ends a read at every 0x0A inside binary data (~51 MB/s);
  a block is read here by its declared length with termination off (~0.9-1.8 GB/s);
- a write followed by a query waited ~44 ms (Nagle + delayed ACK): TCP_NODELAY is set on
  the socket of TCPIP SOCKET resources, which pyvisa-py does not expose as a VISA attribute;
- a connection closed by the instrument spun a CPU until the timeout, then raised a raw
  BrokenPipeError; opening a dead port "succeeded": the socket path here checks the
  connection on open and treats an empty recv as the instrument closing the connection;
- after a timeout the next query returned the late reply of the previous one: after any
  failure this transport reconnects (socket path) or clears the device before the next
  command, so a stale reply can never be read as the answer to a new command.

For TCPIP SOCKET resources opened through pyvisa-py the transport reads and writes the
session's socket itself; for every other resource (USB, VXI-11, GPIB, another VISA
library) it goes through pyvisa's resource with the same error mapping.
"""

from __future__ import annotations

import contextlib
import errno
import os
import select
import socket
import time
from collections.abc import Callable
from typing import Any

import pyvisa
from pyvisa import constants
from pyvisa.errors import VisaIOError

from benchseq.bench import InstrumentSpec
from benchseq.drivers.blocks import header_length
from benchseq.drivers.errors import (
    ConnectionLost,
    GarbledReply,
    InstrumentError,
    InstrumentTimeout,
    TruncatedBlock,
)

MAX_BLOCK_BYTES = 512 * 1024 * 1024  # a larger declared length is a garbled header, not data
_CHUNK = 1 << 20
_HEADER_READ = 64
_TIMEOUT_CODES = {constants.StatusCode.error_timeout}


def decode_reply(raw: bytes, resource: str, command: str) -> str:
    """ASCII text of a reply; anything else (binary, control characters) is garbled."""
    try:
        text = raw.decode("ascii")
    except UnicodeDecodeError:
        raise GarbledReply(resource, command, "reply is not ASCII text", raw) from None
    if any(ord(c) < 32 and c not in "\t" for c in text):
        raise GarbledReply(resource, command, "reply holds control characters", raw)
    return text


class VisaTransport:
    """One instrument over pyvisa. ``resource_manager`` is shared by the bench session."""

    def __init__(
        self,
        resource_manager: pyvisa.ResourceManager,
        spec: InstrumentSpec,
        write_termination: str = "\n",
        read_termination: str = "\n",
        *,
        block_terminated: bool = True,
        open_timeout_s: float | None = None,
    ) -> None:
        self.resource = spec.address
        self._manager = resource_manager
        self._write_term = write_termination.encode("ascii")
        self._read_term = read_termination.encode("ascii")
        self._block_terminated = block_terminated
        self._timeout_s = float(spec.timeout_s)
        self._open_timeout_s = open_timeout_s if open_timeout_s is not None else spec.timeout_s
        self._handle: Any = None
        self._socket: socket.socket | None = None
        self._buffer = bytearray()
        self._dirty = False  # a failure happened: reset before the next command
        self.nodelay = False  # True once TCP_NODELAY is set on the socket
        # progress(bytes so far, bytes declared) during long block reads (socket path)
        self.progress: Callable[[int, int], None] | None = None
        self._open()

    # -- properties ---------------------------------------------------------------------
    @property
    def timeout_s(self) -> float:
        return self._timeout_s

    @timeout_s.setter
    def timeout_s(self, value: float) -> None:
        self._timeout_s = float(value)
        if self._handle is not None:
            self._handle.timeout = max(1, round(self._timeout_s * 1000.0))

    @property
    def uses_socket(self) -> bool:
        """True when reads and writes go straight to a TCPIP SOCKET resource's socket."""
        return self._socket is not None

    # -- connection ---------------------------------------------------------------------
    def _open(self) -> None:
        try:
            handle = self._manager.open_resource(
                self.resource,
                write_termination=self._write_term.decode(),
                read_termination=self._read_term.decode(),
                timeout=max(1, round(self._timeout_s * 1000.0)),
                open_timeout=max(1, round(self._open_timeout_s * 1000.0)),
            )
        except VisaIOError as exc:
            raise ConnectionLost(self.resource, "", f"cannot open: {exc.description}") from None
        except (OSError, ValueError) as exc:
            raise ConnectionLost(self.resource, "", f"cannot open: {exc}") from None
        except Exception as exc:  # pyvisa-py raises a bare Exception("could not connect")
            raise ConnectionLost(self.resource, "", f"cannot open: {exc}") from None
        self._handle = handle
        self._buffer.clear()
        self._dirty = False
        self._socket = self._session_socket(handle)
        if self._socket is not None:
            self._check_connected()
            try:
                self._socket.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                self.nodelay = True
            except OSError:
                self.nodelay = False  # still correct, only slower (write-then-query ~40 ms)

    def _session_socket(self, handle: Any) -> socket.socket | None:
        """The socket of a pyvisa-py TCPIP SOCKET session, or None for any other resource."""
        if getattr(handle, "resource_info", None) is not None:
            cls = str(getattr(handle.resource_info, "resource_class", ""))
            if cls != "SOCKET":
                return None
        sessions = getattr(getattr(handle, "visalib", None), "sessions", None)
        if not isinstance(sessions, dict):
            return None
        session = sessions.get(getattr(handle, "session", None))
        sock = getattr(session, "interface", None)
        if not isinstance(sock, socket.socket):
            return None
        pending = getattr(session, "_pending_buffer", None)
        if pending:
            self._buffer.extend(pending)
            pending.clear()
        return sock

    def _check_connected(self) -> None:
        """pyvisa-py's non-blocking connect "succeeds" on a dead port: ask the socket."""
        assert self._socket is not None
        err = self._socket.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
        if err == 0:
            try:
                self._socket.getpeername()
            except OSError as exc:
                err = exc.errno or -1
        if err:
            reason = "connection refused" if err == errno.ECONNREFUSED else os.strerror(err)
            self._release()
            raise ConnectionLost(self.resource, "", f"cannot open: {reason}")

    def _release(self) -> None:
        handle, self._handle, self._socket = self._handle, None, None
        self._buffer.clear()
        if handle is not None:
            with contextlib.suppress(Exception):
                handle.close()

    def reconnect(self) -> None:
        """Close and open the connection again (a fresh session: nothing stale can follow)."""
        self._release()
        self._open()

    def close(self) -> None:
        self._release()

    def clear(self) -> None:
        """Discard anything pending; after a failure, start on a fresh connection."""
        if self._dirty or self._handle is None:
            self.reconnect()
            return
        self._buffer.clear()
        if self._socket is not None:
            self._drain()
        else:
            try:
                self._handle.clear()
            except (VisaIOError, OSError):
                self.reconnect()

    def _drain(self) -> None:
        assert self._socket is not None
        deadline = time.monotonic() + 0.2
        while time.monotonic() < deadline:
            ready, _, _ = select.select([self._socket], [], [], 0.005)
            if not ready:
                return
            try:
                if not self._socket.recv(_CHUNK):
                    self._dirty = True
                    return
            except OSError:
                self._dirty = True
                return

    def _ready(self) -> None:
        if self._dirty or self._handle is None:
            self.reconnect()

    # -- messages -----------------------------------------------------------------------
    def write(self, command: str) -> None:
        self._ready()
        self._guard(command, lambda: self._send(command))

    def query(self, command: str) -> str:
        self._ready()

        def run() -> str:
            self._send(command)
            return decode_reply(self._read_line(command), self.resource, command)

        return self._guard(command, run)

    def query_block(self, command: str) -> bytes:
        return bytes(self.query_block_view(command))

    def query_block_view(self, command: str) -> memoryview:
        """As query_block, without the final copy: a read-only view of a fresh buffer
        (the scope uses it for long waveforms; the copy costs ~40 % at loopback speed)."""
        self._ready()

        def run() -> memoryview:
            self._send(command)
            return memoryview(self._read_block(command)).toreadonly()

        return self._guard(command, run)

    def _guard(self, command: str, action: Any) -> Any:
        """Run one exchange; any failure marks the connection for a reset first."""
        try:
            return action()
        except InstrumentError:
            self._dirty = True
            raise
        except VisaIOError as exc:
            self._dirty = True
            if exc.error_code in _TIMEOUT_CODES:
                raise InstrumentTimeout(
                    self.resource, command, f"no reply within {self._timeout_s:g} s"
                ) from None
            raise ConnectionLost(self.resource, command, exc.description) from None
        except UnicodeDecodeError as exc:
            self._dirty = True
            raise GarbledReply(self.resource, command, "reply is not text", exc.object) from None
        except (ConnectionError, OSError) as exc:
            self._dirty = True
            raise ConnectionLost(self.resource, command, f"connection failed: {exc}") from None

    def _send(self, command: str) -> None:
        data = command.encode("ascii") + self._write_term
        if self._socket is None:
            self._handle.write_raw(data)
            return
        self._socket.settimeout(self._timeout_s)
        try:
            self._socket.sendall(data)
        except TimeoutError:
            raise InstrumentTimeout(
                self.resource, command, "the instrument is not taking input"
            ) from None

    # -- reading: socket path -----------------------------------------------------------
    def _fill(self, command: str, deadline: float, what: str, size: int = _CHUNK) -> None:
        """Receive at least one more chunk into the buffer before ``deadline``."""
        assert self._socket is not None
        remaining = deadline - time.monotonic()
        if remaining <= 0:
            raise InstrumentTimeout(
                self.resource,
                command,
                f"{what} within {self._timeout_s:g} s",
                bytes(self._buffer[:80]),
            )
        self._socket.settimeout(remaining)
        try:
            chunk = self._socket.recv(size)
        except TimeoutError:
            raise InstrumentTimeout(
                self.resource,
                command,
                f"{what} within {self._timeout_s:g} s",
                bytes(self._buffer[:80]),
            ) from None
        if not chunk:
            raise ConnectionLost(
                self.resource,
                command,
                f"the instrument closed the connection ({what})",
                bytes(self._buffer[:80]),
            )
        self._buffer.extend(chunk)

    def _read_line(self, command: str) -> bytes:
        if self._socket is None:
            return self._visa_read_line()
        deadline = time.monotonic() + self._timeout_s
        start = 0
        while True:
            at = self._buffer.find(self._read_term, start)
            if at >= 0:
                line = bytes(self._buffer[:at])
                del self._buffer[: at + len(self._read_term)]
                return line
            start = max(0, len(self._buffer) - len(self._read_term) + 1)
            self._fill(command, deadline, "no complete reply")

    def _read_block(self, command: str) -> bytearray:
        if self._socket is None:
            return self._visa_read_block(command)
        deadline = time.monotonic() + self._timeout_s
        while True:
            size, length = header_length(bytes(self._buffer[:11]), self.resource, command)
            if size >= 0:
                break
            if len(self._buffer) >= length:  # header_length asked for more than it has: cut
                raise TruncatedBlock(
                    self.resource, command, "block header cut short", bytes(self._buffer[:16])
                )
            # a small read: the data itself goes straight into the payload buffer below
            self._fill(command, deadline, "no block header", _HEADER_READ)
        if length > MAX_BLOCK_BYTES:
            raise TruncatedBlock(
                self.resource,
                command,
                f"block header declares {length} bytes; refusing",
                bytes(self._buffer[:16]),
            )
        payload = bytearray(length)
        view = memoryview(payload)
        have = min(length, len(self._buffer) - size)
        view[:have] = self._buffer[size : size + have]
        del self._buffer[: size + have]
        assert self._socket is not None
        while have < length:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise TruncatedBlock(
                    self.resource,
                    command,
                    f"block declared {length} bytes but only {have} arrived in {self._timeout_s:g} s",
                )
            self._socket.settimeout(remaining)
            try:
                got = self._socket.recv_into(view[have:], length - have)
            except TimeoutError:
                raise TruncatedBlock(
                    self.resource,
                    command,
                    f"block declared {length} bytes but only {have} arrived in {self._timeout_s:g} s",
                ) from None
            if got == 0:
                raise TruncatedBlock(
                    self.resource,
                    command,
                    f"block declared {length} bytes but the connection closed after {have}",
                )
            have += got
            if self.progress is not None:
                self.progress(have, length)
        if self._block_terminated:
            while len(self._buffer) < len(self._read_term):
                self._fill(command, deadline, "no terminator after the block", _HEADER_READ)
            if self._buffer[: len(self._read_term)] != self._read_term:
                raise GarbledReply(
                    self.resource,
                    command,
                    "bytes after the block's declared length",
                    bytes(self._buffer[:16]),
                )
            del self._buffer[: len(self._read_term)]
        return payload

    # -- reading: any other VISA resource -------------------------------------------------
    def _visa_read_line(self) -> bytes:
        raw = self._handle.read_raw()
        if raw.endswith(self._read_term):
            raw = raw[: -len(self._read_term)]
        return bytes(raw)

    def _visa_read_block(self, command: str) -> bytearray:
        handle = self._handle
        saved = handle.read_termination
        handle.read_termination = None  # termination off: 0x0A inside the data must not end a read
        try:
            head = bytes(handle.read_bytes(2, break_on_termchar=False))
            size, length = header_length(head, self.resource, command)
            if size < 0:
                head += bytes(handle.read_bytes(length - len(head), break_on_termchar=False))
                size, length = header_length(head, self.resource, command)
            if length > MAX_BLOCK_BYTES:
                raise TruncatedBlock(
                    self.resource, command, f"block header declares {length} bytes; refusing", head
                )
            try:
                payload = (
                    bytes(handle.read_bytes(length, break_on_termchar=False)) if length else b""
                )
            except VisaIOError as exc:
                if exc.error_code in _TIMEOUT_CODES:
                    raise TruncatedBlock(
                        self.resource,
                        command,
                        f"block declared {length} bytes but they did not all arrive",
                    ) from None
                raise
            if self._block_terminated:
                tail = bytes(handle.read_bytes(len(self._read_term), break_on_termchar=False))
                if tail != self._read_term:
                    raise GarbledReply(
                        self.resource, command, "bytes after the block's declared length", tail
                    )
        finally:
            handle.read_termination = saved
        return bytearray(payload)
