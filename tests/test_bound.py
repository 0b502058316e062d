"""Container version 3: records bound to their archive and frame, sub-frame checks that stop
a decoder early, and the output ceiling of unpack and verify (docs/FORMAT.md)."""
import os
import subprocess
import sys

import numpy as np
import pytest

import lcodec
from lcodec import api
from lcodec.archive import salvage as S
from lcodec.coding import CHECK_EVERY, CheckedEncoder, SubframeCheckFailed, decode_frame, encode_frame
from lcodec.coding import coder as coding
from lcodec.errors import CeilingError, DataError
from lcodec.format import container as C
from lcodec.models import default_model

FRAME = 2000


def _text(seed: int, n: int) -> bytes:
    rng = np.random.default_rng(seed)
    words = [b"kestrel", b"ridge", b"wind", b"gust", b"tremor", b"battery", b"link", b"vale"]
    out = bytearray()
    while len(out) < n:
        out += words[rng.integers(len(words))] + b"=%d " % rng.integers(1000)
    return bytes(out[:n])


@pytest.fixture(scope="module")
def pair():
    a, b = _text(1, 5 * FRAME), _text(2, 5 * FRAME)
    return a, lcodec.pack(a, frame_size=FRAME), b, lcodec.pack(b, frame_size=FRAME)


def test_records_carry_frame_number_and_archive_identity(pair):
    _, blob, _, other = pair
    cont = C.read_container(blob)
    assert cont.version == 3 and cont.archive_id == C.header_id(blob[:cont.frames[0].offset])
    assert [f.number for f in cont.frames] == list(range(5))
    assert all(f.archive_id == cont.archive_id and f.checks for f in cont.frames)
    assert C.read_container(other).archive_id != cont.archive_id
    assert blob[cont.frames[0].offset:cont.frames[0].offset + 8] == cont.archive_id  # the record's first bytes


def _splice(blob: bytes, other: bytes, i: int) -> bytes:
    """`blob` with its frame i's record replaced by frame i of `other` (same raw lengths)."""
    a, b = C.read_container(blob).frames[i], C.read_container(other).frames[i]
    return blob[:a.offset] + other[b.offset:b.payload_offset + b.coded_len] + blob[a.payload_offset + a.coded_len:]


def test_record_from_another_archive_is_refused_where_it_is_read(pair):
    _, blob, _, other = pair
    bad = _splice(blob, other, 2)
    with pytest.raises(DataError, match="belongs to another archive"):
        C.read_container(bad)
    with pytest.raises(DataError, match="another archive"):
        lcodec.unpack(bad)


def test_salvage_refuses_the_spliced_record_and_keeps_the_others(pair):
    data, blob, _, other = pair
    res = S.salvage(_splice(blob, other, 2))
    assert [res.frames[i].status for i in range(5)] == ["good", "good", "missing", "good", "good"]
    assert res.content is None and bytes(res.partial[:2 * FRAME]) == data[:2 * FRAME]
    rep = res.report()
    assert any("another archive" in u["reason"] for u in rep["unplaced_records"])
    assert any("another archive" in p for p in rep["problems"])


def test_swapped_records_are_refused_by_unpack_and_placed_by_salvage(pair):
    data, blob, _, _ = pair
    fr = C.read_container(blob).frames
    r1 = blob[fr[1].offset:fr[2].offset]
    r2 = blob[fr[2].offset:fr[3].offset]
    swapped = blob[:fr[1].offset] + r2 + r1 + blob[fr[3].offset:]
    with pytest.raises(DataError, match="says it is frame"):
        C.read_container(swapped)
    res = S.salvage(swapped)
    assert res.content == data  # each record placed by the frame number it carries, SHA-256 proven
    assert {res.frames[i].placed_by for i in (1, 2)} == {"frame number"}


def test_salvage_without_header_orders_records_by_frame_number(pair):
    data, blob, _, other = pair
    cont = C.read_container(blob)
    o = C.read_container(other).frames[0]
    body = blob[cont.frames[0].offset:]
    res = S.salvage(b"\0" * 40 + body + other[o.offset:o.payload_offset + o.coded_len])
    assert res.header == "unreadable" and [p.index for p in res.pieces] == [0, 1, 2, 3, 4]
    assert res.partial == data
    assert any("another archive" in p for p in res.problems)


def test_version_1_and_2_archives_still_decode():
    golden = os.path.join(os.path.dirname(__file__), "golden")
    for name, model in (("strata-v1-text", None), ("braid-v2-text", "braid-tiny.lcmodel")):
        blob = open(os.path.join(golden, name + ".lcodec"), "rb").read()
        assert blob[4] in (1, 2)
        m = os.path.join(golden, model) if model else None
        assert lcodec.unpack(blob, model=m) == open(os.path.join(golden, name + ".orig"), "rb").read()


def test_stack_records_are_refused_in_version_3(pair):
    data = b"vale-of-tess gust 3\n" * 20
    rec = C.frame_record(len(data), b"\0\0\0\1", C.METHOD_STACK, 1, C.crc32c(data))
    blob = C.build_archive(len(data), C.sha256(data), 1 << 20, default_model().identity, None, [rec])
    with pytest.raises(DataError, match="impossible record"):
        C.read_container(blob)


# -- sub-frame checks ---------------------------------------------------------------------------
def test_sub_frame_checks_round_trip_and_cost_two_bytes_each():
    m = default_model()
    data = _text(3, 3 * CHECK_EVERY + 17)
    for lanes in (1, 5):
        with_checks, _ = encode_frame(m, data, lanes, "queue", checks=True)
        plain, _ = encode_frame(m, data, lanes, "queue")
        assert decode_frame(m, with_checks, len(data), lanes, checks=True) == data
        assert 0 <= len(with_checks) - len(plain) <= 2 * 3 + 8  # three checks, word rounding


def test_a_wrong_sub_frame_check_stops_the_decoder(monkeypatch):
    m = default_model()
    data = _text(4, CHECK_EVERY + 500)
    monkeypatch.setattr(coding, "check_values", lambda j: np.array([1, 2], np.int32))
    bad, _ = encode_frame(m, data, 1, "queue", checks=True)
    monkeypatch.undo()
    with pytest.raises(SubframeCheckFailed, match="sub-frame check 0 failed"):
        decode_frame(m, bad, len(data), 1, checks=True)
    assert isinstance(CheckedEncoder, type)


def test_a_made_up_claim_is_refused_long_before_its_length():
    # A record claiming 64 MiB with 1 KiB of coded words (the words of a real 3 KB frame):
    # the decoder stops at the first sub-frame check (or earlier, where constriction finds
    # the words invalid), not after 64 Mi symbols. (Its time is in scripts/bench_hostile.py.)
    m = default_model()
    real = _text(5, 3000)
    coded, _ = encode_frame(m, real, 16, "queue", checks=True)
    n = 1 << 26
    rec = C.frame_record(n, coded, C.METHOD_QUEUE, 16, 0x1234)
    blob = C.build_archive(n, b"\x11" * 32, n, m.identity, None, [rec])
    with pytest.raises(DataError, match="frame 0 damaged"):
        api.unpack(blob, ceiling=None)


# -- the output ceiling ---------------------------------------------------------------------------
def test_ceiling_refuses_before_decoding(pair, tmp_path):
    data, blob, _, _ = pair
    with pytest.raises(CeilingError, match="output ceiling"):
        api.unpack(blob, ceiling=len(data) - 1)
    with pytest.raises(CeilingError):
        api.verify(blob, ceiling=100)
    with pytest.raises(CeilingError):
        api.unpack_to_file(blob, str(tmp_path / "out"), ceiling=100)
    assert not (tmp_path / "out").exists()
    assert api.unpack(blob, ceiling=len(data)) == data and api.unpack(blob, ceiling=None) == data


def test_cli_ceiling_exits_1_with_one_line(pair, tmp_path):
    _, blob, _, _ = pair
    arc = tmp_path / "a.lcodec"
    arc.write_bytes(blob)
    for cmd in (["unpack", str(arc), "-o", str(tmp_path / "a")], ["verify", str(arc)]):
        r = subprocess.run([sys.executable, "-m", "lcodec", *cmd, "--output-ceiling", "4K"],
                           capture_output=True, text=True)
        assert r.returncode == 1 and r.stderr.count("\n") == 1 and "output ceiling" in r.stderr
    assert not (tmp_path / "a").exists()
    r = subprocess.run([sys.executable, "-m", "lcodec", "unpack", str(arc), "-o", str(tmp_path / "a"),
                        "--output-ceiling", "none"], capture_output=True, text=True)
    assert r.returncode == 0


def test_version_1_salvage_still_places_records_without_numbers():
    # the legacy path (archive/salvage.py _place): records carry no frame number
    golden = os.path.join(os.path.dirname(__file__), "golden")
    blob = bytearray(open(os.path.join(golden, "strata-v1-text.lcodec"), "rb").read())
    orig = open(os.path.join(golden, "strata-v1-text.orig"), "rb").read()
    cont = C.read_container(bytes(blob))
    assert cont.version == 1 and len(cont.frames) == 3
    blob[cont.frames[1].offset + 1] ^= 0x40  # the second record's head
    res = S.salvage(bytes(blob))
    assert [res.frames[i].status for i in range(3)] == ["good", "missing", "good"]
    assert res.frames[2].placed_by == "end of file"
    assert res.partial[:8192] == orig[:8192] and res.partial[16384:] == orig[16384:]
