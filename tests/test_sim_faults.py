"""Injected faults over the in-process transport, and the TCP server's resilience
(127.0.0.1 only, bounded timeouts)."""

from __future__ import annotations

import socket
import struct
import subprocess
import sys

import pytest

from benchseq.bench import parse_bench
from benchseq.drivers.errors import (
    ConnectionLost,
    GarbledReply,
    InstrumentTimeout,
    TruncatedBlock,
)
from benchseq.drivers.transport import Transport
from benchseq.sim.faults import FaultRates
from benchseq.sim.server import serve
from benchseq.sim.world import SimulatedBench
from benchseq.tomlfile import parse_toml_text


def bench_with(role: str, **rates: float) -> SimulatedBench:
    return SimulatedBench.from_scenario("demo", seed=5, faults={role: FaultRates(**rates)})


def test_in_process_transport_is_a_transport() -> None:
    link = SimulatedBench.from_scenario("demo").transport("generator")
    assert isinstance(link, Transport)
    assert link.query("*IDN?").startswith("benchseq,")


def test_no_reply_times_out_at_once_on_the_virtual_clock() -> None:
    sim = bench_with("generator", no_reply=1.0)
    link = sim.transport("generator", timeout_s=3.0)
    link.write("SOUR1:FREQ 100")  # writes are not affected
    with pytest.raises(InstrumentTimeout):
        link.query("SOUR1:FREQ?")
    assert sim.clock.now() == pytest.approx(3.0)


def test_garbage_reply_is_garbled() -> None:
    link = bench_with("supply", garbage=1.0).transport("supply")
    with pytest.raises(GarbledReply):
        link.query("*IDN?")


def test_truncated_block() -> None:
    sim = bench_with("scope", truncated_block=1.0)
    link = sim.transport("scope")
    link.write("SENS:SWE:POIN 1000;:INIT:IMM")
    assert link.query("*OPC?") == "1"  # text replies unaffected
    with pytest.raises(TruncatedBlock):
        link.query_block("TRAC:DATA? CH1")


def test_dropped_connection_until_reconnect() -> None:
    sim = bench_with("generator", disconnect=1.0)
    link = sim.transport("generator")
    with pytest.raises(ConnectionLost):
        link.query("*IDN?")
    sim.faults["generator"].rates = FaultRates()
    with pytest.raises(ConnectionLost):
        link.query("*IDN?")
    link.reconnect()
    assert link.query("*IDN?").startswith("benchseq,")


def test_queued_instrument_error() -> None:
    link = bench_with("supply", instrument_error=1.0).transport("supply")
    link.write("SOUR1:VOLT 1")
    assert link.query("SYST:ERR?").startswith("-310,")


def test_slow_instrument() -> None:
    sim = bench_with("supply", delay_s=1.5)
    link = sim.transport("supply", timeout_s=5.0)
    link.query("*IDN?")
    assert sim.clock.now() == pytest.approx(1.5)
    with pytest.raises(InstrumentTimeout):
        sim.transport("supply", timeout_s=1.0).query("*IDN?")


def test_faults_are_seeded() -> None:
    def pattern(seed: int) -> list[bool]:
        sim = SimulatedBench.from_scenario(
            "demo", seed=seed, faults={"generator": FaultRates(no_reply=0.5)}
        )
        link = sim.transport("generator")
        out = []
        for _ in range(30):
            try:
                link.query("*OPC?")
                out.append(True)
            except InstrumentTimeout:
                out.append(False)
        return out

    assert pattern(1) == pattern(1)
    assert pattern(1) != pattern(2)
    assert 5 < sum(pattern(1)) < 25


def _ask(port: int, message: bytes) -> bytes:
    with socket.create_connection(("127.0.0.1", port), timeout=3.0) as conn:
        conn.sendall(message)
        reply = b""
        while not reply.endswith(b"\n"):
            chunk = conn.recv(65536)
            if not chunk:
                break
            reply += chunk
        return reply


def test_tcp_server_survives_abrupt_disconnects_and_many_clients() -> None:
    with serve("demo", base_port=0, pace=False) as server:
        assert set(server.addresses) == {"generator", "supply", "scope"}
        port = server.ports["generator"]
        for _ in range(3):  # reset mid-message (RST, no FIN)
            rude = socket.create_connection(("127.0.0.1", port), timeout=3.0)
            rude.sendall(b"SOUR1:FR")
            rude.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
            rude.close()
        idle = [socket.create_connection(("127.0.0.1", port), timeout=3.0) for _ in range(5)]
        assert _ask(port, b"SOUR1:FREQ 1234;:SOUR1:FREQ?\n") == b"1234\n"
        assert _ask(port, b"*IDN?\n").startswith(b"benchseq,")
        for conn in idle:
            conn.close()
        # the served bench file is valid, has TCPIP addresses and no simulation key
        text = server.bench_text
        bench = parse_bench(parse_toml_text(text, "served")[1], "served", text)
        assert bench.simulation is None
        assert bench.instruments["scope"].address == server.addresses["scope"]


def test_tcp_server_drops_connection_on_injected_disconnect() -> None:
    with serve("demo", faults={"supply": FaultRates(disconnect=1.0)}, pace=False) as server:
        assert _ask(server.ports["supply"], b"*IDN?\n") == b""
        server.simulator.faults["supply"].rates = FaultRates()
        assert _ask(server.ports["supply"], b"*IDN?\n").startswith(b"benchseq,")


def test_pyvisa_py_reads_a_block_over_tcp() -> None:
    import pyvisa

    with serve("demo", pace=False) as server:
        rm = pyvisa.ResourceManager("@py")
        try:
            scope = rm.open_resource(server.addresses["scope"])
            scope.read_termination = "\n"
            scope.write_termination = "\n"
            scope.timeout = 3000
            assert scope.query("*IDN?").startswith("benchseq,")
            scope.write("SENS:SWE:POIN 5000;:FORM:DATA INT,8;:INIT:IMM")
            assert scope.query("*OPC?").strip() == "1"
            data = scope.query_binary_values("TRAC:DATA? CH1", datatype="b", container=list)
            assert len(data) == 5000
            scope.close()
        finally:
            rm.close()


def test_simulator_never_imports_the_model_it_checks() -> None:
    """The project's architecture rule: sim solves the circuit on its own (no benchseq.injector / analysis)."""
    code = (
        "import sys, benchseq.sim.world, benchseq.sim.server;"
        "bad=[m for m in sys.modules if m.startswith(('benchseq.injector','benchseq.analysis'))];"
        "assert not bad, bad"
    )
    subprocess.run([sys.executable, "-c", code], check=True, timeout=60)
