"""The VISA transport's generic path (any VISA library, no direct socket) through pyvisa-sim,
a second VISA backend written independently of pyvisa-py and of this project.

The fast path (straight reads from a pyvisa-py TCPIP SOCKET session's socket) is checked in
test_drivers_visa.py, where ``uses_socket`` must be true: a pyvisa-py update that dropped it
fails there. Here the same transport runs on a backend with no socket at all, so every read
goes through pyvisa's public read calls. IEEE 488.2 §8.7.9 gives the definite-length block
format; the instrument's dialogue is written in pyvisa-sim's own YAML format below."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from pathlib import Path

import pytest
import pyvisa

from benchseq.bench import InstrumentSpec
from benchseq.cli import main
from benchseq.drivers.errors import InstrumentTimeout
from benchseq.drivers.visa import VisaTransport

DEVICE = """\
spec: "1.1"
devices:
  generator:
    eom:
      ASRL INSTR:
        q: "\\n"
        r: "\\n"
    error: ERROR
    dialogues:
      - q: "*IDN?"
        r: "Fernhollow validation lab,SIM-GEN,0002,1.0"
      - q: "DATA?"
        r: "#210ABCDEFGHIJ"
    properties:
      frequency:
        default: 1000.0
        getter:
          q: "SOUR1:FREQ?"
          r: "{:.6g}"
        setter:
          q: "SOUR1:FREQ {:.6g}"
        specs:
          min: 1
          max: 100000000
          type: float
resources:
  ASRL1::INSTR:
    device: generator
"""


@pytest.fixture
def library(tmp_path: Path) -> str:
    path = tmp_path / "generator.yaml"
    path.write_text(DEVICE, encoding="utf-8")
    return f"{path}@sim"


@contextlib.contextmanager
def _transport(library: str, timeout_s: float = 1.0) -> Iterator[VisaTransport]:
    manager = pyvisa.ResourceManager(library)
    spec = InstrumentSpec("generator", "ASRL1::INSTR", "scpi-generator", None, 1, timeout_s)
    transport = VisaTransport(manager, spec, "\n", "\n")
    try:
        yield transport
    finally:
        transport.close()
        manager.close()


def test_generic_path_identifies_writes_and_queries(library: str) -> None:
    with _transport(library) as transport:
        assert not transport.uses_socket  # the generic path, not the socket fast path
        assert transport.query("*IDN?") == "Fernhollow validation lab,SIM-GEN,0002,1.0"
        transport.write("SOUR1:FREQ 2500")
        assert float(transport.query("SOUR1:FREQ?")) == 2500.0


def test_generic_path_reads_a_definite_length_block(library: str) -> None:
    """#2 10 ABCDEFGHIJ: two length digits, ten data bytes (IEEE 488.2 §8.7.9)."""
    with _transport(library) as transport:
        assert bytes(transport.query_block("DATA?")) == b"ABCDEFGHIJ"
        assert transport.query("*IDN?").startswith("Fernhollow")  # nothing left behind


def test_generic_path_maps_a_missing_reply_to_a_timeout(library: str) -> None:
    """A command that has no reply, sent as a query: the read times out, and the next query
    is answered (the transport starts afresh after a failure)."""
    with _transport(library, timeout_s=0.2) as transport:
        with pytest.raises(InstrumentTimeout) as info:
            transport.query("SOUR1:FREQ 3000")
        assert info.value.command == "SOUR1:FREQ 3000"
        assert float(transport.query("SOUR1:FREQ?")) == 3000.0


def test_scan_through_another_visa_library(library: str, capsys: pytest.CaptureFixture) -> None:
    assert main(["scan", "--visa-library", library]) == 0
    out = capsys.readouterr().out
    assert "ASRL1::INSTR" in out and "SIM-GEN" in out
