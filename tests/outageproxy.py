"""A TCP proxy on 127.0.0.1 between benchseq and the simulated bench's server, for network
outages: ``outage(seconds)`` resets every open connection and refuses new ones (nothing
listens on the port) for that long, then accepts again on the same port.

One listening port per instrument, forwarding to the server's port for that instrument.
Every loop is bounded by ``stop()``; threads are daemons. Used by the outage tests and by
tests/perf/outage.py."""

from __future__ import annotations

import contextlib
import select
import socket
import struct
import threading
import time

HOST = "127.0.0.1"


def _listener(port: int = 0) -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind((HOST, port))
    sock.listen(16)
    sock.settimeout(0.05)
    return sock


class OutageProxy:
    """Forward ``targets`` (role -> server port on 127.0.0.1); ``ports``: role -> our port."""

    def __init__(self, targets: dict[str, int]) -> None:
        self.targets = dict(targets)
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self._down_until = 0.0  # time.monotonic() until which nothing listens
        self._listeners: dict[str, socket.socket | None] = {}
        self._open: set[socket.socket] = set()
        self.outages: list[tuple[float, float]] = []  # (start, end), time.monotonic()
        self.ports: dict[str, int] = {}
        for role in self.targets:
            sock = _listener()
            self._listeners[role] = sock
            self.ports[role] = sock.getsockname()[1]
        self._threads = [
            threading.Thread(target=self._accept, args=(role,), daemon=True, name=f"proxy-{role}")
            for role in self.targets
        ]
        for thread in self._threads:
            thread.start()

    # -- outages ---------------------------------------------------------------------------
    def outage(self, seconds: float) -> None:
        """From now on, for ``seconds``: every connection reset, every new one refused."""
        now = time.monotonic()
        with self._lock:
            self._down_until = max(self._down_until, now + seconds)
            self.outages.append((now, now + seconds))
            for role, sock in self._listeners.items():
                if sock is not None:
                    with contextlib.suppress(OSError):
                        sock.close()
                    self._listeners[role] = None
            for conn in list(self._open):
                _reset(conn)
            self._open.clear()

    @property
    def down(self) -> bool:
        return time.monotonic() < self._down_until

    def wait_up(self, timeout_s: float) -> bool:
        """Wait (bounded) until the outage is over and every port listens again."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            with self._lock:
                if not self.down and all(s is not None for s in self._listeners.values()):
                    return True
            time.sleep(0.02)
        return False

    # -- forwarding ------------------------------------------------------------------------
    def _accept(self, role: str) -> None:
        while not self._stopping.is_set():
            with self._lock:
                sock = self._listeners[role]
                if sock is None and not self.down:
                    try:
                        sock = self._listeners[role] = _listener(self.ports[role])
                    except OSError:
                        sock = None  # the port is not free yet: try again shortly
            if sock is None:
                time.sleep(0.02)
                continue
            try:
                client, _ = sock.accept()
            except TimeoutError:
                continue
            except OSError:
                continue  # closed by an outage
            try:
                upstream = socket.create_connection((HOST, self.targets[role]), timeout=2.0)
            except OSError:
                _reset(client)
                continue
            for conn in (client, upstream):
                conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            with self._lock:
                if self.down:  # the outage began while this one was being accepted
                    _reset(client)
                    _reset(upstream)
                    continue
                self._open.update((client, upstream))
            threading.Thread(target=self._pump, args=(client, upstream), daemon=True).start()

    def _pump(self, a: socket.socket, b: socket.socket) -> None:
        peers = {a: b, b: a}
        try:
            while not self._stopping.is_set():
                try:
                    ready, _, _ = select.select([a, b], [], [], 0.1)
                except (OSError, ValueError):
                    return
                for sock in ready:
                    data = sock.recv(1 << 16)
                    if not data:
                        return
                    peers[sock].sendall(data)
        except OSError:
            return
        finally:
            with self._lock:
                self._open.discard(a)
                self._open.discard(b)
            _reset(a)
            _reset(b)

    def stop(self) -> None:
        self._stopping.set()
        with self._lock:
            for sock in self._listeners.values():
                if sock is not None:
                    with contextlib.suppress(OSError):
                        sock.close()
            for conn in list(self._open):
                _reset(conn)
            self._open.clear()
        for thread in self._threads:
            thread.join(timeout=2.0)

    def __enter__(self) -> OutageProxy:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


def _reset(conn: socket.socket) -> None:
    """Close with a reset (SO_LINGER 0), as a dropped link looks to the other end."""
    with contextlib.suppress(OSError):
        conn.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    with contextlib.suppress(OSError):
        conn.close()
