"""Container primitives against outside references."""
import zlib

import crc32c as crc32c_pkg
import pytest
from hypothesis import given, settings, strategies as st

from lcodec import container as C
from lcodec.errors import DataError


def test_crc32c_check_value():
    # reference: the CRC-32C check value for "123456789" is 0xE3069283 (recalled from
    # memory), and the `crc32c` package computes the same
    assert C.crc32c(b"123456789") == 0xE3069283 == crc32c_pkg.crc32c(b"123456789")
    assert C.crc32c(b"123456789") != zlib.crc32(b"123456789")  # not the zlib polynomial


@settings(max_examples=200, deadline=None)
@given(st.integers(min_value=0, max_value=(1 << 56) - 1))
def test_varint_round_trip(n):
    enc = C.uvarint(n)
    assert len(enc) == max(1, (n.bit_length() + 6) // 7)
    assert C.read_uvarint(memoryview(enc + b"tail"), 0, "x") == (n, len(enc))


def test_varint_refuses_overlong_and_truncated():
    with pytest.raises(DataError, match="overlong"):
        C.read_uvarint(memoryview(b"\xff" * 9), 0, "x")
    with pytest.raises(DataError, match="truncated"):
        C.read_uvarint(memoryview(b"\x80\x80"), 0, "x")


def test_header_layout_matches_docs():
    # docs/FORMAT.md: magic, version, flags, varint size, SHA-256, varints, CRC
    blob = C.header_bytes(300, b"\x11" * 32, 1, 1 << 20, {"model": "x"}, None)
    assert blob[:4] == b"\x9blc\n" and blob[4] == 1 and blob[5] == 0
    assert blob[6:8] == bytes([0xAC, 0x02])  # 300 as LEB128
    assert blob[8:40] == b"\x11" * 32
    h, end = C.read_header(blob + b"\0" * C.MIN_RECORD)
    assert end == len(blob) and h["content_size"] == 300 and h["frame_size"] == 1 << 20
    assert h["identity"] == {"model": "x"}
