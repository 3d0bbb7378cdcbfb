"""The VISA transport over real pyvisa-py TCP on 127.0.0.1, against a tiny instrument
served by this file (a thread with a socket on port 0) that can inject faults: no reply,
garbage bytes, a truncated block, a close mid-transfer, a slow (late) reply.

Each fault must end as its specific exception or a clean recovery, quickly (never a hang,
never a CPU spin for the whole timeout), and never as a wrong number: after any error the
next query gets its own reply, not the stale one of the query that failed.
"""

from __future__ import annotations

import contextlib
import socket
import threading
from collections.abc import Iterator

import numpy as np
import pytest
import pyvisa
from fakebench import time_bound

from benchseq.bench import InstrumentSpec
from benchseq.drivers.blocks import format_block
from benchseq.drivers.errors import (
    ConnectionLost,
    GarbledReply,
    InstrumentReportedError,
    InstrumentTimeout,
    TruncatedBlock,
)
from benchseq.drivers.generator import Generator
from benchseq.drivers.profile import load_profile
from benchseq.drivers.session import scan
from benchseq.drivers.visa import VisaTransport

IDN = "Fernhollow validation lab,TCP-1,0001,1.0"
TIMEOUT = 0.3  # s, client timeout in these tests


class TinyInstrument:
    """A line-based SCPI-ish instrument on 127.0.0.1. ``fault(cmd, kind, delay)`` arms a
    one-shot fault for the next ``cmd``."""

    def __init__(self, block: bytes = b"") -> None:
        self.block = block
        self.frequency = 1000.0
        self.errors: list[str] = []
        self.faults: dict[str, tuple[str, float]] = {}
        self.received: list[str] = []
        self.lock = threading.Lock()
        self.listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.listener.bind(("127.0.0.1", 0))
        self.listener.listen(8)
        self.port = self.listener.getsockname()[1]
        self.address = f"TCPIP::127.0.0.1::{self.port}::SOCKET"
        self.connections: list[socket.socket] = []
        self.threads: list[threading.Thread] = []
        self.running = True
        self.accepted = 0
        self.late_reply_sent = threading.Event()
        accept = threading.Thread(target=self._accept, daemon=True)
        accept.start()
        self.threads.append(accept)

    def fault(self, command: str, kind: str, delay: float = 0.0) -> None:
        with self.lock:
            self.faults[command] = (kind, delay)

    def _accept(self) -> None:
        while self.running:
            try:
                conn, _ = self.listener.accept()
            except OSError:
                return
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            with self.lock:
                self.connections.append(conn)
                self.accepted += 1
            worker = threading.Thread(target=self._serve, args=(conn,), daemon=True)
            worker.start()
            self.threads.append(worker)

    def _serve(self, conn: socket.socket) -> None:
        pending = b""
        try:
            while self.running:
                data = conn.recv(65536)
                if not data:
                    return
                pending += data
                while b"\n" in pending:
                    line, pending = pending.split(b"\n", 1)
                    if not self._answer(conn, line.decode("ascii").strip()):
                        return
        except OSError:
            return
        finally:
            conn.close()

    def _reply(self, command: str) -> bytes | None:
        if command == "*IDN?":
            return IDN.encode() + b"\n"
        if command == "*OPC?":
            return b"1\n"
        if command == "*CLS":
            self.errors.clear()
            return None
        if command == "SYST:ERR?":
            return (self.errors.pop(0) if self.errors else '+0,"No error"').encode() + b"\n"
        if command.startswith("SOUR1:FREQ "):
            value = float(command.split()[1])
            if value > 1e8:
                self.errors.append('-222,"Data out of range"')
            else:
                self.frequency = value
            return None
        if command == "SOUR1:FREQ?":
            return f"{self.frequency:.12g}\n".encode()
        if command == "DATA?":
            return format_block(self.block) + b"\n"
        self.errors.append('-113,"Undefined header"')
        return None

    def _answer(self, conn: socket.socket, command: str) -> bool:
        """Handle one message; False closes the connection."""
        with self.lock:
            self.received.append(command)
            kind, delay = self.faults.pop(command, ("", 0.0))
        reply = self._reply(command)
        if reply is None:
            return True
        if kind == "no_reply":
            return True
        if kind == "close":
            return False
        if kind == "garbage":
            conn.sendall(b"\x8f\xfe\x00\n\xc3(\n")
            return True
        if kind == "truncated":  # half the block, then silence
            conn.sendall(reply[: len(reply) // 2])
            return True
        if kind == "close_mid":  # half the block, then the connection closes
            conn.sendall(reply[: len(reply) // 2])
            return False
        if kind == "slow":  # an instrument that answers late
            threading.Event().wait(delay)
        try:
            conn.sendall(reply)
        except OSError:
            return False
        finally:
            if kind == "slow":
                self.late_reply_sent.set()
        return True

    def close(self) -> None:
        self.running = False
        with contextlib.suppress(OSError):
            self.listener.shutdown(socket.SHUT_RDWR)  # wakes the accept() thread
        self.listener.close()
        with self.lock:
            for conn in self.connections:
                with contextlib.suppress(OSError):
                    conn.shutdown(socket.SHUT_RDWR)
                conn.close()
        for thread in self.threads:
            thread.join(timeout=2.0)


bounded = time_bound(20)  # no test in this file may take longer, whatever the transport does


@pytest.fixture
def manager() -> Iterator[object]:
    rm = pyvisa.ResourceManager("@py")
    yield rm
    rm.close()


@pytest.fixture
def server() -> Iterator[TinyInstrument]:
    payload = bytes(range(256)) * 40  # every byte value, 0x0A included, 10240 bytes
    tiny = TinyInstrument(payload)
    yield tiny
    tiny.close()


def _spec(server: TinyInstrument, timeout_s: float = TIMEOUT) -> InstrumentSpec:
    return InstrumentSpec("generator", server.address, "scpi-generator", None, 1, timeout_s)


@contextlib.contextmanager
def _connected(manager, server: TinyInstrument, timeout_s: float = TIMEOUT):
    """A VISA transport to the tiny instrument, closed afterwards whatever happens."""
    transport = VisaTransport(manager, _spec(server, timeout_s), "\n", "\n")
    try:
        yield transport
    finally:
        transport.close()


def test_identify_write_then_query_and_nodelay(manager, server):
    with _connected(manager, server) as transport:
        assert transport.uses_socket and transport.nodelay
        sock = transport._socket
        assert sock is not None and sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY)
        assert transport.query("*IDN?") == IDN
        transport.write("SOUR1:FREQ 2500")
        assert float(transport.query("SOUR1:FREQ?")) == 2500.0
        # Nagle + delayed ACK would cost ~40 ms per write/query pair: the option above is what
        # prevents it; tests/perf/transfer_speed.py prints the round-trip time.


def test_block_with_newlines_inside_is_read_by_its_declared_length(manager, server):
    with _connected(manager, server) as transport:
        seen: list[tuple[int, int]] = []
        transport.progress = lambda have, total: seen.append((have, total))
        assert transport.query_block("DATA?") == server.block
        assert transport.query("*IDN?") == IDN  # the terminator after the block was consumed
        assert all(total == len(server.block) for _, total in seen)
        view = transport.query_block_view("DATA?")  # the copy-free read the scope uses
        assert view.readonly and bytes(view) == server.block
        assert [have for have, _ in seen] == sorted(have for have, _ in seen)


def test_block_agrees_with_pyvisa_generic_binary_reader(manager, server):
    """pyvisa's own read_binary_values (reference library) on the same served bytes."""
    with _connected(manager, server) as transport:
        reference = manager.open_resource(
            server.address, read_termination="\n", write_termination="\n", timeout=2000
        )
        try:
            ours = np.frombuffer(transport.query_block("DATA?"), dtype=np.int8)
            theirs = reference.query_binary_values(
                "DATA?", datatype="b", container=np.array, expect_termination=True
            )
            np.testing.assert_array_equal(ours, theirs)
        finally:
            reference.close()


def test_no_reply_is_a_timeout_and_the_next_query_is_answered(manager, server):
    with _connected(manager, server) as transport:
        server.fault("SOUR1:FREQ?", "no_reply")
        with pytest.raises(InstrumentTimeout) as info:
            transport.query("SOUR1:FREQ?")
        assert info.value.resource == server.address and info.value.command == "SOUR1:FREQ?"
        assert transport.query("*IDN?") == IDN


def test_a_late_reply_is_never_read_as_the_answer_to_the_next_query(manager, server):
    with _connected(manager, server) as transport:
        server.fault("SOUR1:FREQ?", "slow", delay=TIMEOUT + 0.2)
        with pytest.raises(InstrumentTimeout):
            transport.query("SOUR1:FREQ?")
        # the late "1000" has gone out (to the old connection) before the next query
        assert server.late_reply_sent.wait(10.0)
        assert transport.query("*IDN?") == IDN
        assert float(transport.query("SOUR1:FREQ?")) == 1000.0


def test_garbage_is_a_garbled_reply_and_leaves_nothing_stale(manager, server):
    with _connected(manager, server) as transport:
        server.fault("*IDN?", "garbage")
        with pytest.raises(GarbledReply) as info:
            transport.query("*IDN?")
        assert info.value.reply  # what came back is in the error
        assert transport.query("*IDN?") == IDN  # the second garbage line is gone too


def test_a_truncated_block_then_silence_is_a_truncated_block(manager, server):
    with _connected(manager, server) as transport:
        server.fault("DATA?", "truncated")
        with pytest.raises(TruncatedBlock, match="declared 10240 bytes"):
            transport.query_block("DATA?")
        assert transport.query_block("DATA?") == server.block


def test_a_close_mid_transfer_is_reported_at_once_not_after_spinning_the_timeout(manager, server):
    # a 60 s timeout: waiting for it would trip this file's 20 s bound
    with _connected(manager, server, timeout_s=60.0) as transport:
        server.fault("DATA?", "close_mid")
        with pytest.raises(TruncatedBlock, match="connection closed"):
            transport.query_block("DATA?")
        assert transport.query_block("DATA?") == server.block  # reconnected cleanly
        assert server.accepted == 2


def test_a_close_before_the_reply_is_a_lost_connection(manager, server):
    with _connected(manager, server, timeout_s=60.0) as transport:  # see above: at once
        server.fault("*IDN?", "close")
        with pytest.raises(ConnectionLost, match="closed the connection"):
            transport.query("*IDN?")
        assert transport.query("*IDN?") == IDN


def test_opening_a_dead_port_fails_at_once_as_a_lost_connection(manager):
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()  # nothing listens there now
    spec = InstrumentSpec(
        "supply", f"TCPIP::127.0.0.1::{port}::SOCKET", "scpi-supply", None, 1, TIMEOUT
    )
    with pytest.raises(ConnectionLost, match="cannot open"):
        VisaTransport(manager, spec, "\n", "\n")


def test_generic_visa_path_reads_blocks_and_maps_timeouts(manager, server, monkeypatch):
    """Resources other than pyvisa-py sockets go through pyvisa's read calls."""
    monkeypatch.setattr(VisaTransport, "_session_socket", lambda self, handle: None)
    with _connected(manager, server) as transport:
        assert not transport.uses_socket
        assert transport.query("*IDN?") == IDN
        assert transport.query_block("DATA?") == server.block
        server.fault("SOUR1:FREQ?", "no_reply")
        with pytest.raises(InstrumentTimeout):
            transport.query("SOUR1:FREQ?")
        assert transport.query("*IDN?") == IDN


def test_generator_over_tcp_reports_the_instrument_error_queue(manager, server):
    with _connected(manager, server) as transport:
        gen = Generator(load_profile("scpi-generator"), transport, _spec(server))
        assert gen.set_frequency(12345.0) == 12345.0
        with pytest.raises(InstrumentReportedError, match="-222") as info:
            gen.set_frequency(5e8)
        assert info.value.resource == server.address
        server.fault("SOUR1:FREQ?", "garbage")
        assert gen.ask("frequency_query") == 12345.0  # retried after the garbled reply


def test_scan_names_each_resource_and_is_bounded(server):
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    dead = f"TCPIP::127.0.0.1::{probe.getsockname()[1]}::SOCKET"
    probe.close()
    server.fault("*IDN?", "no_reply")
    silent = TinyInstrument()
    try:
        entries = scan(
            "@py",
            timeout_s=TIMEOUT,
            resources=[silent.address, dead, server.address],
            total_timeout_s=8.0,
        )  # a scan that ignored its limit would trip this file's 20 s bound
    finally:
        silent.close()
    found = {e.resource: e for e in entries}
    assert "(list resources)" not in found  # pyvisa-py's discovery warnings do not break it
    assert found[silent.address].identity == IDN
    assert found[dead].identity is None and "refused" in (found[dead].error or "")
    assert found[server.address].identity is None and "within" in (
        found[server.address].error or ""
    )


def test_scan_with_an_unknown_visa_library_says_so():
    entries = scan("/no/such/visa/library.so", timeout_s=0.2, total_timeout_s=5.0)
    assert entries and entries[0].identity is None and entries[0].error
