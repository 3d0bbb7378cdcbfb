"""IEEE 488.2 definite-length blocks (§8.7.9): our parser against pyvisa's own binary
reader (pyvisa.util.from_ieee_block, the reference library), a hand-built example
following IEEE 488.2 §8.7.9, and property tests on random bytes: the parser either returns exactly the
declared payload or raises TruncatedBlock, never anything else."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pyvisa import util as visa_util

from benchseq.drivers.blocks import (
    block_header,
    decode_samples,
    format_block,
    header_length,
    parse_block,
)
from benchseq.drivers.errors import TruncatedBlock


def test_measurement_md_example():
    """23 31 35 80 FF 00 7F 81 0A = '#15' + five bytes + newline -> int8
    [-128, -1, 0, 127, -127] (IEEE 488.2 §8.7.9)."""
    raw = bytes.fromhex("233135 80FF007F81 0A".replace(" ", ""))
    payload = parse_block(raw)
    assert decode_samples(payload, "int8").tolist() == [-128, -1, 0, 127, -127]
    assert decode_samples(payload, "uint8").tolist() == [128, 255, 0, 127, 129]
    assert visa_util.from_ieee_block(raw, datatype="b") == [-128, -1, 0, 127, -127]


def test_header_of_a_known_length():
    assert block_header(5) == b"#15"
    assert block_header(1_000_000) == b"#71000000"
    assert header_length(b"#71000000") == (9, 1_000_000)
    assert header_length(b"#7100") == (-1, 9)  # more header bytes needed
    with pytest.raises(ValueError):
        block_header(10**9)


@pytest.mark.parametrize(
    ("raw", "message"),
    [
        (b"15\x01", "no '#'"),
        (b"#A5\x01", "malformed block header"),
        (b"#2x5\x01", "malformed block length"),
        (b"#0\x01\x02\n", "indefinite-length"),
        (b"#3", "cut short"),
        (b"#15\x01\x02", "declared 5 bytes but only 2"),
    ],
)
def test_malformed_and_truncated_blocks_are_refused_clearly(raw, message):
    with pytest.raises(TruncatedBlock, match=message) as info:
        parse_block(raw, "TCPIP::scope", "TRAC:DATA? CH1")
    assert "TCPIP::scope" in str(info.value) and "TRAC:DATA? CH1" in str(info.value)


@pytest.mark.parametrize(
    ("dtype", "visa_code", "big"),
    [
        ("int8", "b", False),
        ("uint8", "B", False),
        ("int16", "h", False),
        ("int16", "h", True),
        ("uint16", "H", True),
    ],
)
def test_samples_agree_with_pyvisa_from_ieee_block(dtype, visa_code, big):
    rng = np.random.default_rng(7)
    raw = rng.integers(0, 256, 2000, dtype=np.uint8).tobytes()
    block = format_block(raw) + b"\n"
    ours = decode_samples(parse_block(block), dtype, big_endian=big)
    theirs = visa_util.from_ieee_block(
        block, datatype=visa_code, is_big_endian=big, container=np.array
    )
    np.testing.assert_array_equal(ours, theirs)
    also = visa_util.from_binary_block(
        raw, datatype=visa_code, is_big_endian=big, container=np.array
    )
    np.testing.assert_array_equal(ours, also)


def test_odd_byte_count_is_not_int16():
    with pytest.raises(TruncatedBlock, match="whole number of int16"):
        decode_samples(b"\x01\x02\x03", "int16")
    with pytest.raises(ValueError, match="sample type"):
        decode_samples(b"\x01", "float64")


PREFIXES = st.sampled_from([b"", b"#", b"#1", b"#2", b"#3", b"#9", b"#0", b"#10"])


@settings(max_examples=400, deadline=None)
@given(st.builds(bytes.__add__, PREFIXES, st.binary(max_size=64)))
def test_random_bytes_give_a_payload_or_truncated_block_only(raw):
    """Whatever the bytes: TruncatedBlock or a payload that is exactly the declared bytes,
    and then pyvisa's reader (reference) returns the same bytes."""
    try:
        payload = parse_block(raw)
    except TruncatedBlock:
        return
    size, length = header_length(raw[:11])
    assert payload == raw[size : size + length] and len(payload) == length
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference = bytes(visa_util.from_ieee_block(raw, datatype="B"))
    assert reference == payload


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=300), st.binary(max_size=4))
def test_any_payload_round_trips_with_trailing_bytes(payload, tail):
    block = format_block(payload) + tail
    assert parse_block(block) == payload
    assert bytes(visa_util.from_ieee_block(block, datatype="B")) == payload


@settings(max_examples=300, deadline=None)
@given(st.binary(min_size=1, max_size=300), st.data())
def test_every_cut_of_a_block_is_a_truncated_block(payload, data):
    block = format_block(payload)
    cut = data.draw(st.integers(min_value=0, max_value=len(block) - 1))
    with pytest.raises(TruncatedBlock):
        parse_block(block[:cut])
