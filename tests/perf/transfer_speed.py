"""Transfer speed of the driver path over pyvisa-py TCP on 127.0.0.1 (prints figures).

1,000,000 int8 samples as an IEEE 488.2 block from a local server, read three ways in the
same run: the driver (VisaTransport.query_block), a plain socket reading the same bytes,
and pyvisa's generic read path (query_binary_values with a newline read termination).
Then write-then-query and query round-trip latency through the driver.
Goals: driver within 1.5x of the raw socket; round trips under 1 ms on loopback.

    python tests/perf/transfer_speed.py [--samples N] [--repeats R]
"""

from __future__ import annotations

import argparse
import socket
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import pyvisa

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from test_drivers_visa import TinyInstrument

from benchseq.bench import InstrumentSpec
from benchseq.drivers.blocks import format_block, header_length
from benchseq.drivers.visa import VisaTransport


def _best(times: list[float]) -> tuple[float, float]:
    return min(times), statistics.median(times)


def raw_socket_read(port: int, length: int, repeats: int) -> list[float]:
    times = []
    with socket.create_connection(("127.0.0.1", port)) as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        for _ in range(repeats):
            start = time.perf_counter()
            sock.sendall(b"DATA?\n")
            head = b""
            while True:
                size, _ = header_length(head[:11])
                if size >= 0:
                    break
                head += sock.recv(64)
            buffer = bytearray(length + 1)
            view = memoryview(buffer)
            have = len(head) - size
            view[:have] = head[size:]
            while have < length + 1:
                have += sock.recv_into(view[have:], length + 1 - have)
            times.append(time.perf_counter() - start)
    return times


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=1_000_000)
    parser.add_argument("--repeats", type=int, default=15)
    args = parser.parse_args()
    payload = np.random.default_rng(1).integers(-128, 128, args.samples, dtype=np.int8).tobytes()
    server = TinyInstrument(payload)
    manager = pyvisa.ResourceManager("@py")
    try:
        spec = InstrumentSpec("scope", server.address, "scpi-scope", None, 1, 10.0)
        driver = VisaTransport(manager, spec, "\n", "\n")
        assert driver.query_block("DATA?") == payload
        driver_times, copy_times = [], []
        for _ in range(args.repeats):
            start = time.perf_counter()
            view = driver.query_block_view("DATA?")  # the path Scope.read_waveform takes
            np.frombuffer(view, dtype=np.int8)
            driver_times.append(time.perf_counter() - start)
            start = time.perf_counter()
            data = driver.query_block("DATA?")  # the Protocol's bytes (one more copy)
            np.frombuffer(data, dtype=np.int8)
            copy_times.append(time.perf_counter() - start)

        raw_times = raw_socket_read(server.port, len(payload), args.repeats)

        generic = manager.open_resource(
            server.address, read_termination="\n", write_termination="\n", timeout=20000
        )
        generic_times = []
        for _ in range(max(2, args.repeats // 5)):
            start = time.perf_counter()
            values = generic.query_binary_values(
                "DATA?", datatype="b", container=np.array, expect_termination=True
            )
            generic_times.append(time.perf_counter() - start)
        assert values.tobytes() == payload
        generic.close()

        pairs = []
        for _ in range(500):
            start = time.perf_counter()
            driver.write("SOUR1:FREQ 1000")
            driver.query("SOUR1:FREQ?")
            pairs.append(time.perf_counter() - start)
        queries = []
        for _ in range(500):
            start = time.perf_counter()
            driver.query("*IDN?")
            queries.append(time.perf_counter() - start)
        driver.close()
    finally:
        manager.close()
        server.close()

    megabytes = len(format_block(payload)) / 1e6
    print(
        f"block of {args.samples:,} int8 samples over pyvisa-py TCP, 127.0.0.1, best / median of runs"
    )
    rows = [
        ("driver, query_block_view", driver_times),
        ("driver, query_block (bytes)", copy_times),
        ("raw socket", raw_times),
        ("pyvisa read_binary_values", generic_times),
    ]
    for name, times in rows:
        best, median = _best(times)
        print(
            f"  {name:<28} {best * 1e3:8.2f} ms {median * 1e3:8.2f} ms   {megabytes / best:8.0f} MB/s"
        )
    ratio = min(driver_times) / min(raw_times)
    print(f"  driver / raw socket (best): {ratio:.2f}x   (goal <= 1.5x)")
    print(
        f"  driver / raw socket (median): {statistics.median(driver_times) / statistics.median(raw_times):.2f}x"
    )
    for name, times in (("write then query", pairs), ("query round trip", queries)):
        print(
            f"{name:<18} median {statistics.median(times) * 1e3:.3f} ms, "
            f"95th percentile {np.percentile(times, 95) * 1e3:.3f} ms   (goal < 1 ms)"
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
