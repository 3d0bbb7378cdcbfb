"""Reaching the simulated instruments: an in-process transport and a SCPI/TCP server.

InProcessTransport implements benchseq.drivers.transport.Transport on a SimulatedBench
with injected faults raised as the drivers' error classes at once (no real waiting). The TCP
server gives each instrument its own port on 127.0.0.1 (raw socket, newline-terminated,
as LAN instruments on port 5025), reachable by pyvisa-py as TCPIP::127.0.0.1::PORT::SOCKET.
"""

from __future__ import annotations

import contextlib
import json
import re
import socket
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from benchseq.bench import parse_bench
from benchseq.drivers.blocks import parse_block
from benchseq.drivers.errors import ConnectionLost, GarbledReply, InstrumentTimeout
from benchseq.errors import BadInput, BenchseqError
from benchseq.sim.faults import FaultRates
from benchseq.sim.world import SimulatedBench
from benchseq.tomlfile import parse_toml_text

LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1")
INSTRUMENT_ERROR = (-310, "injected instrument error")  # SCPI -310 System error
MAX_REAL_DELAY_S = 30.0


class SimServerError(BenchseqError):
    """The simulated bench's server could not start (e.g. a port already in use)."""


class InProcessTransport:
    """drivers.transport.Transport to one simulated instrument, in this process.

    Injected faults surface at once as the drivers' errors: no reply -> InstrumentTimeout
    (the virtual clock loses the timeout), garbage -> GarbledReply, a truncated block ->
    TruncatedBlock, a dropped connection -> ConnectionLost until reconnect()."""

    def __init__(self, bench: SimulatedBench, role: str, timeout_s: float = 5.0) -> None:
        self.bench = bench
        self.role = role
        self.resource = f"SIM::{role}"
        self.timeout_s = timeout_s
        self.handler = bench.handler(role)
        self.faults = bench.faults[role]
        self.connected = True

    def _exchange(self, command: str, want_reply: bool, block: bool = False) -> bytes | None:
        bench = self.bench
        with bench.lock:
            if not self.connected:
                raise ConnectionLost(self.resource, command, "not connected (call reconnect())")
            self.faults.messages += 1
            if self.faults.fires("disconnect"):
                self.connected = False
                raise ConnectionLost(self.resource, command, "connection reset by the instrument")
            reply = self.handler.handle(command)
            if self.faults.fires("instrument_error"):
                self.handler.push_error(*INSTRUMENT_ERROR)
            delay = self.faults.rates.delay_s
            if not want_reply:
                bench.clock.sleep(min(delay, self.timeout_s))
                return None
            if reply is None or delay > self.timeout_s or self.faults.fires("no_reply"):
                bench.clock.sleep(self.timeout_s)
                raise InstrumentTimeout(
                    self.resource, command, f"no reply within {self.timeout_s:g} s"
                )
            bench.clock.sleep(delay)
            if self.faults.fires("garbage"):
                reply = self.faults.garbage()
            elif block and self.faults.fires("truncated_block"):
                reply = self.faults.truncate(reply)
            return reply

    def write(self, command: str) -> None:
        self._exchange(command, want_reply=False)

    def query(self, command: str) -> str:
        reply = self._exchange(command, want_reply=True)
        assert reply is not None
        try:
            text = reply.decode("ascii")
        except UnicodeDecodeError:
            raise GarbledReply(
                self.resource, command, "reply is not ASCII text", reply[:40]
            ) from None
        return text.rstrip("\r\n")

    def query_block(self, command: str) -> bytes:
        reply = self._exchange(command, want_reply=True, block=True)
        assert reply is not None
        if not reply.startswith(b"#"):
            raise GarbledReply(
                self.resource, command, "reply is not an IEEE 488.2 block", reply[:40]
            )
        return parse_block(reply, self.resource, command)

    def clear(self) -> None:
        if not self.connected:
            raise ConnectionLost(self.resource, "", "not connected (call reconnect())")

    def reconnect(self) -> None:
        self.connected = True

    def close(self) -> None:
        self.connected = False


# -- TCP ------------------------------------------------------------------------------------------
def _check_host(host: str) -> None:
    if host not in LOOPBACK_HOSTS:
        raise BadInput(
            f"the simulated bench serves on this machine only (127.0.0.1), not on {host!r}"
        )


class _InstrumentServer:
    """One instrument on one port: a listening socket, one thread per connection."""

    def __init__(self, bench: SimulatedBench, role: str, host: str, port: int, pace: bool) -> None:
        self.bench = bench
        self.role = role
        self.pace = pace
        self.handler = bench.handler(role)
        self.faults = bench.faults[role]
        self.stopping = threading.Event()
        family = socket.AF_INET6 if host == "::1" else socket.AF_INET
        self.listener = socket.socket(family, socket.SOCK_STREAM)
        self.listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            self.listener.bind((host, port))
        except OSError as exc:
            self.listener.close()
            raise SimServerError(
                f"cannot serve the simulated {role} on {host}:{port}: {exc.strerror}"
            ) from None
        self.listener.listen(16)
        self.listener.settimeout(0.2)
        self.port = self.listener.getsockname()[1]
        self.connections: set[socket.socket] = set()
        self.threads: list[threading.Thread] = []
        self.thread = threading.Thread(target=self._accept, name=f"sim-{role}", daemon=True)
        self.thread.start()

    def _accept(self) -> None:
        while not self.stopping.is_set():
            try:
                conn, _ = self.listener.accept()
            except TimeoutError:
                continue
            except OSError:
                break
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            conn.settimeout(0.5)
            self.connections.add(conn)
            worker = threading.Thread(target=self._serve, args=(conn,), daemon=True)
            self.threads = [t for t in self.threads if t.is_alive()]
            self.threads.append(worker)
            worker.start()

    def _serve(self, conn: socket.socket) -> None:
        buffer = b""
        try:
            while not self.stopping.is_set():
                try:
                    chunk = conn.recv(65536)
                except TimeoutError:
                    continue
                if not chunk:
                    return
                buffer += chunk
                while b"\n" in buffer:
                    line, buffer = buffer.split(b"\n", 1)
                    if not self._message(conn, line.decode("latin-1").strip()):
                        return
        except OSError:
            return
        finally:
            self.connections.discard(conn)
            with contextlib.suppress(OSError):
                conn.close()

    def _message(self, conn: socket.socket, message: str) -> bool:
        """Handle one message; False when the connection must end (a dropped connection)."""
        if not message:
            return True
        pause = 0.0
        with self.bench.lock:
            self.faults.messages += 1
            if self.faults.fires("disconnect"):
                with contextlib.suppress(OSError):
                    conn.shutdown(socket.SHUT_RDWR)
                return False
            reply = self.handler.handle(message)
            if self.faults.fires("instrument_error"):
                self.handler.push_error(*INSTRUMENT_ERROR)
            if self.pace and "INIT" in message.upper() and self.role == "scope":
                pause = self.bench.scope.acquisition_time()
            if reply is not None:
                if self.faults.fires("no_reply"):
                    reply = None
                elif self.faults.fires("garbage"):
                    reply = self.faults.garbage()
                elif reply.startswith(b"#") and self.faults.fires("truncated_block"):
                    reply = self.faults.truncate(reply) + b"\n"
        pause += self.faults.rates.delay_s if reply is not None else 0.0
        if pause > 0:
            self.stopping.wait(min(pause, MAX_REAL_DELAY_S))
        if reply is not None:
            conn.sendall(reply)
        return True

    def stop(self) -> None:
        self.stopping.set()
        with contextlib.suppress(OSError):
            self.listener.close()
        for conn in list(self.connections):
            with contextlib.suppress(OSError):
                conn.shutdown(socket.SHUT_RDWR)
        self.thread.join(timeout=2.0)
        for worker in self.threads:
            worker.join(timeout=2.0)


@dataclass
class RunningServer:
    """A served simulated bench: VISA addresses per role and a matching bench file."""

    simulator: SimulatedBench
    addresses: dict[str, str]
    ports: dict[str, int]
    bench_text: str
    _servers: list[_InstrumentServer] = field(default_factory=list, repr=False)
    _log: TextIO | None = field(default=None, repr=False)

    def stop(self) -> None:
        for server in self._servers:
            server.stop()
        self._servers = []
        if self._log is not None:
            with self.simulator.lock:
                self._log.close()
                self._log = None

    def __enter__(self) -> RunningServer:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.stop()


def tcp_bench_text(text: str, addresses: dict[str, str], scenario: str) -> str:
    """A scenario's bench file rewritten for TCP: real addresses, no lab.simulation."""
    lines = []
    for line in text.splitlines():
        if re.match(r"^\s*simulation\s*=", line):
            continue
        for role, address in addresses.items():
            line = line.replace(f'"SIM::{role}"', f'"{address}"')
        lines.append(line)
    header = (
        f"# Bench file for the simulated bench '{scenario}' served over TCP on this machine\n"
        "# (benchseq sim serve). Same wiring and values as the embedded bench.\n"
    )
    return header + "\n".join(lines) + "\n"


def _open_log(path: str | Path) -> TextIO:
    try:
        return open(path, "a", encoding="utf-8", buffering=1)  # closed by RunningServer.stop
    except OSError as exc:
        raise BadInput(f"cannot write the state-change log {path}: {exc.strerror}") from None


def log_state_changes(simulator: SimulatedBench, log: TextIO) -> None:
    """Append every state change of ``simulator`` (outputs, levels, limits, in order) to
    ``log`` as one JSON object per line: wall time, virtual time, role, what, value."""
    record = simulator.record

    def logged(role: str, what: str, value: Any) -> None:
        record(role, what, value)
        if not log.closed:
            entry = {"wall": time.time(), "time": simulator.clock.now(), "role": role,
                     "what": what, "value": value}  # fmt: skip
            log.write(json.dumps(entry, default=str) + "\n")

    simulator.record = logged  # type: ignore[method-assign]


def read_state_log(path: str | Path) -> list[dict[str, Any]]:
    """The entries of a state-change log written by ``serve(log=...)``, in order."""
    text = Path(path).read_text(encoding="utf-8")
    return [json.loads(line) for line in text.splitlines() if line.strip()]


def serve(
    scenario: str = "demo",
    host: str = "127.0.0.1",
    base_port: int = 0,
    faults: dict[str, FaultRates] | None = None,
    seed: int = 0,
    pace: bool = True,
    log: str | Path | None = None,
) -> RunningServer:
    """Serve a scenario's instruments on ``host`` (loopback only), one port per role:
    ``base_port``, +1, +2, ... in the bench file's role order, or free ports when 0.
    ``pace``: after INIT:IMM the scope answers only once the acquisition would be done.
    ``log``: a file to append every instrument state change to (JSON lines; see
    log_state_changes), so another process can check what the instruments went through."""
    _check_host(host)
    simulator = SimulatedBench.from_scenario(scenario, seed=seed, faults=faults)
    log_file = _open_log(log) if log is not None else None
    if log_file is not None:
        log_state_changes(simulator, log_file)
    servers: list[_InstrumentServer] = []
    try:
        for k, role in enumerate(simulator.bench.instruments):
            port = 0 if base_port == 0 else base_port + k
            servers.append(_InstrumentServer(simulator, role, host, port, pace))
    except BaseException:
        for server in servers:
            server.stop()
        if log_file is not None:
            log_file.close()
        raise
    shown = f"[{host}]" if ":" in host else host
    ports = {s.role: s.port for s in servers}
    addresses = {role: f"TCPIP::{shown}::{port}::SOCKET" for role, port in ports.items()}
    text = tcp_bench_text(simulator.bench.text, addresses, scenario)
    parse_bench(parse_toml_text(text, "served bench")[1], "served bench", text)  # stays valid
    return RunningServer(simulator, addresses, ports, text, servers, log_file)


def sim_serve_main(
    scenario: str = "demo",
    base_port: int = 5025,
    seed: int = 0,
    console: Any = None,
    faults: dict[str, FaultRates] | None = None,
    host: str = "127.0.0.1",
    stop: threading.Event | None = None,
    on_ready: Callable[[RunningServer], None] | None = None,
    log: str | Path | None = None,
) -> int:
    """`benchseq sim serve`: serve until Ctrl-C (or ``stop`` is set); returns exit code 0.

    ``console`` (a rich Console) gets the addresses and a matching bench file; or pass
    ``on_ready`` to receive the RunningServer instead. ``log``: see serve()."""
    server = serve(scenario, host=host, base_port=base_port, faults=faults, seed=seed, log=log)
    try:
        if on_ready is not None:
            on_ready(server)
        if console is not None:
            console.print(f"Simulated bench '{scenario}' (seed {seed}) on {host}:", markup=False)
            for role, address in server.addresses.items():
                console.print(f"  {role:<10} {address}", markup=False, highlight=False)
            console.print("\nBench file for these addresses:\n", markup=False)
            console.print(server.bench_text, markup=False, highlight=False, soft_wrap=True)
            console.print("Serving; press Ctrl-C to stop.", markup=False)
        event = stop or threading.Event()
        while not event.is_set():
            event.wait(0.5)
    except KeyboardInterrupt:
        pass
    finally:
        server.stop()
    return 0


def wait_for_port(host: str, port: int, timeout_s: float = 5.0) -> None:
    """Block until a TCP connection to host:port succeeds (tests and tools)."""
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            with socket.create_connection((host, port), timeout=0.5):
                return
        except OSError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.02)
