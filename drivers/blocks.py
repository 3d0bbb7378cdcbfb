"""IEEE 488.2 definite-length arbitrary blocks (§8.7.9): '#', d, d digits of length, data.

Parsed by the declared length, never by a terminator (the data may contain 0x0A).
"""

from __future__ import annotations

import numpy as np

from benchseq.drivers.errors import TruncatedBlock

DTYPES = {"int8": "i1", "uint8": "u1", "int16": "i2", "uint16": "u2"}


def block_header(length: int) -> bytes:
    """The header '#<d><length>' for ``length`` data bytes."""
    digits = str(length)
    if len(digits) > 9:
        raise ValueError("block too long for a definite-length header")
    return f"#{len(digits)}{digits}".encode("ascii")


def format_block(payload: bytes) -> bytes:
    """A definite-length block holding ``payload`` (without terminator)."""
    return block_header(len(payload)) + payload


def header_length(head: bytes, resource: str = "", command: str = "") -> tuple[int, int]:
    """From the first bytes of a reply, (header size, declared data length).

    ``head`` must hold at least 2 bytes; returns (-1, digits) when more header bytes are needed.
    """
    if len(head) < 2:
        return -1, 2
    if head[:1] != b"#":
        raise TruncatedBlock(
            resource, command, "reply is not an IEEE 488.2 block (no '#')", head[:16]
        )
    digit = head[1:2]
    if not digit.isdigit():
        raise TruncatedBlock(resource, command, "malformed block header", head[:16])
    ndigits = int(digit)
    if ndigits == 0:
        raise TruncatedBlock(
            resource,
            command,
            "indefinite-length block (#0) is not accepted over sockets",
            head[:16],
        )
    if len(head) < 2 + ndigits:
        return -1, 2 + ndigits
    count = head[2 : 2 + ndigits]
    if not count.isdigit():
        raise TruncatedBlock(resource, command, "malformed block length", head[:16])
    return 2 + ndigits, int(count)


def parse_block(data: bytes, resource: str = "", command: str = "") -> bytes:
    """The payload of a complete block in ``data`` (a trailing terminator is allowed)."""
    size, length = header_length(data[:11], resource, command)
    if size < 0:
        raise TruncatedBlock(resource, command, "block header cut short", data[:16])
    payload = data[size : size + length]
    if len(payload) < length:
        raise TruncatedBlock(
            resource,
            command,
            f"block declared {length} bytes but only {len(payload)} arrived",
            data[:16],
        )
    return payload


def decode_samples(
    payload: bytes | bytearray | memoryview,
    dtype: str = "int8",
    big_endian: bool = False,
    resource: str = "",
    command: str = "",
) -> np.ndarray:
    """Samples from a block payload: int8, uint8, int16 or uint16 (byte order for 16-bit)."""
    if dtype not in DTYPES:
        raise ValueError(f"sample type must be one of {', '.join(DTYPES)}, not {dtype!r}")
    code = DTYPES[dtype]
    if code[1] == "2":
        code = (">" if big_endian else "<") + code
    item = np.dtype(code).itemsize
    if len(payload) % item:
        raise TruncatedBlock(
            resource, command, f"{len(payload)} bytes is not a whole number of {dtype} samples"
        )
    return np.frombuffer(payload, dtype=code)
