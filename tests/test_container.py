"""Container primitives against outside references."""
import zlib

import crc32c as crc32c_pkg
import pytest
from hypothesis import given, settings, strategies as st

from lcodec.format import container as C
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


def test_version_2_identity_of_a_model_file():
    # docs/FORMAT.md, version 2: kind 1, the 32-byte SHA-256, the architecture's name
    sha = "ab" * 32
    blob = C.header_bytes(5, b"\x22" * 32, 1, 1 << 20, {"model": "braid", "sha256": sha}, None)
    assert blob[4] == 2
    h, end = C.read_header(blob + b"\0" * C.MIN_RECORD)
    assert h["identity"] == {"model": "braid", "sha256": sha} and h["version"] == 2
    ident = blob[h["spans"]["identity"][0]:h["spans"]["identity"][1]]
    assert ident == b"\x01" + bytes.fromhex(sha) + b"braid"
    v1 = C.header_bytes(5, b"\x22" * 32, 1, 1 << 20, {"model": "braid", "sha256": sha, "file": "m.lcmodel"}, None)
    assert v1[4] == 1 and len(v1) - len(blob) > 50  # anything more than the digest stays JSON


@pytest.mark.parametrize("ident", [b"", b"\x01" + b"\0" * 32, b"\x02" + b"\0" * 32 + b"braid",
                                   b"\x01" + b"\0" * 32 + b"\xff\xfe", b"\x01" + b"\0" * 32 + b"a\nb",
                                   b"\x01" + b"\0" * 32 + b"x" * 65])
def test_version_2_damaged_identity_is_refused(ident):
    head = (C.MAGIC + bytes([2, 0]) + C.uvarint(5) + b"\x22" * 32 + C.uvarint(1) + C.uvarint(1 << 20)
            + C.uvarint(len(ident)) + C.uvarint(0))
    blob = head + C.struct.pack("<I", C.crc32c(head + ident)) + ident + b"\0" * C.MIN_RECORD
    with pytest.raises(DataError, match="header damaged"):
        C.read_header(blob)


def test_deeply_nested_identity_is_refused_whatever_the_recursion_limit():
    """A model identity nested 5,000 deep is refused by the depth limit of
    decode_identity, not by Python's recursion limit: with the limit raised (as another
    library in the same process did, which made scripts/fuzz.py's crafted archives pass
    after tests/test_layers.py), the answer is the same."""
    import sys

    deep = b'{"model":"strata","preset":"o6m","x":' + b"[" * 5000 + b"]" * 5000 + b"}"
    old = sys.getrecursionlimit()
    try:
        for limit in (old, 100_000):
            sys.setrecursionlimit(limit)
            with pytest.raises(DataError, match="model identity is not readable"):
                C.decode_identity(1, deep)
    finally:
        sys.setrecursionlimit(old)
    # brackets inside strings are not nesting; lcodec's own identities (depth 3) still read
    ok = b'{"model":"strata","note":"' + b"[" * 40 + b'","params":{"discount":[[13,18,24]]}}'
    assert C.decode_identity(1, ok)["params"]["discount"] == [[13, 18, 24]]
