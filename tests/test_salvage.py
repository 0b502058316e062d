"""`lcodec unpack --salvage` and lcodec.salvage: every undamaged member and frame of a
damaged archive comes back exactly, damaged ones are left out (or written under a
marked name, zero-filled where damaged), the report says what was lost, where in the
archive and where in the content, and the exit code is 1 whenever anything was damaged.

Outside references: the originals are the Python standard library's own sources
(located with sysconfig), compared byte for byte with what salvage writes; reports are
parsed with the standard library's json module; damaged byte ranges are taken from the
strict reader's own spans (lcodec.container.read_container), not restated offsets.
"""
from __future__ import annotations

import json
import os
import random
import subprocess
import sys

import pytest
from click.testing import CliRunner

from lcodec import api
from lcodec.format import modelfile
from lcodec.format import container as C
from lcodec.archive import salvage as S
from lcodec.cli import main as cli_group
from lcodec.errors import DataError, ModelError
from lcodec.models.strata import Strata
from support import stdlib_file  # noqa: E402




def flip(blob: bytes, pos: int, bit: int = 0) -> bytes:
    b = bytearray(blob)
    b[pos] ^= 1 << bit
    return bytes(b)


def run_cli(*args):
    r = CliRunner().invoke(cli_group, [str(a) for a in args])
    assert "Traceback" not in r.output and "Traceback" not in r.stderr
    return r


def tree_files(root):
    out = {}
    for dp, _, fns in os.walk(root):
        for n in fns:
            p = os.path.join(dp, n)
            with open(p, "rb") as f:
                out[os.path.relpath(p, root).replace(os.sep, "/")] = f.read()
    return out


# -- samples ---------------------------------------------------------------------------------
FRAME = 2048


@pytest.fixture(scope="module")
def three(tmp_path_factory):
    """A 3-member archive (one folder, three stdlib sources, several frames each)."""
    root = tmp_path_factory.mktemp("src") / "station"
    (root / "sub").mkdir(parents=True)
    files = {"colorsys.py": stdlib_file("colorsys.py", 4000), "sub/bisect.py": stdlib_file("bisect.py", 3000),
             "sub/keyword.py": stdlib_file("keyword.py", 1000)}
    for rel, d in files.items():
        (root / rel).write_bytes(d)
    blob, _ = api.pack_paths([str(root)], frame_size=FRAME)
    cont = C.read_container(blob)
    ranges = {}
    for m, first, n in api.Decoded(cont, []).member_ranges():
        if not m.is_dir:
            ranges[m.path] = (first, n)
    assert [n for _, n in ranges.values()] == [2, 2, 1]
    return {"blob": blob, "cont": cont, "files": {"station/" + k: v for k, v in files.items()}, "ranges": ranges}


@pytest.fixture(scope="module")
def single():
    data = stdlib_file("textwrap.py", 9000)
    blob = api.pack(data, frame_size=FRAME)
    cont = C.read_container(blob)
    assert len(cont.frames) == 5 and all(f.method != C.METHOD_STORED for f in cont.frames)
    return {"blob": blob, "cont": cont, "data": data}


def payload_middle(cont, i):
    f = cont.frames[i]
    return f.payload_offset + f.coded_len // 2


# -- the API ---------------------------------------------------------------------------------
def test_intact_archive_salvages_to_everything(three, single):
    res = S.salvage(three["blob"])
    assert res.ok and res.header == "good" and res.report()["damaged_frames"] == []
    got = {r.path: r.data for r in res.members if not r.is_dir}
    assert got == three["files"]
    res = S.salvage(single["blob"])
    assert res.ok and res.content == single["data"]


def test_one_damaged_frame_loses_only_its_member(three):
    first, n = three["ranges"]["station/sub/bisect.py"]
    bad_frame = first + 1
    pos = payload_middle(three["cont"], bad_frame)
    res = S.salvage(flip(three["blob"], pos, 3))
    assert not res.ok
    rec = {r.path: r for r in res.members}
    for path, data in three["files"].items():
        if path == "station/sub/bisect.py":
            assert rec[path].status == "lost" and rec[path].data is None
        else:
            assert rec[path].status == "recovered" and rec[path].data == data  # exact
    rep = res.report()
    assert rep["members"]["recovered"] == ["station/", "station/colorsys.py", "station/sub/", "station/sub/keyword.py"]
    [lost] = rep["members"]["lost"]
    assert lost["path"] == "station/sub/bisect.py" and lost["zero_filled"] == [[FRAME, 3000]]
    [e] = rep["damaged_frames"]
    fr = three["cont"].frames[bad_frame]
    assert e["frames"] == [bad_frame, bad_frame] and e["status"] == "damaged"
    assert e["archive_range"] == [fr.offset, fr.payload_offset + fr.coded_len] and e["archive_range_exact"]
    assert e["archive_range"][0] <= pos < e["archive_range"][1]
    assert e["member"] == "station/sub/bisect.py" and e["member_range"] == [FRAME, 3000]
    assert e["content_range"] == [4000 + FRAME, 7000]  # members in table order: colorsys.py first
    assert "coded bytes" in e["reason"]


def test_damaged_record_head_is_found_past_by_scanning(single):
    cont = single["cont"]
    res = S.salvage(flip(single["blob"], cont.frames[2].offset + 1, 2))
    assert res.content is None
    assert [res.frames[i].status for i in range(5)] == ["good", "good", "missing", "good", "good"]
    # version 3: the records carry their frame numbers (version 1 placed them from the end of the file)
    assert res.frames[3].placed_by == "frame number" and res.frames[4].placed_by == "frame number"
    rep = res.report()
    [e] = rep["damaged_frames"]
    f2, f3 = cont.frames[2], cont.frames[3]
    assert e["archive_range"] == [f2.offset, f3.offset] and e["archive_range_exact"]
    assert rep["content"]["zero_filled"] == [[2 * FRAME, 3 * FRAME]]
    assert [g["frame"] for g in rep["good_frames_placed_by_scanning"]] == [3, 4]
    expect = bytearray(single["data"])
    expect[2 * FRAME:3 * FRAME] = bytes(FRAME)
    assert res.partial == bytes(expect)  # good frames in place, the damaged one zero-filled


def test_damaged_header_still_finds_frames_by_scanning(single):
    cont = single["cont"]
    # The content-size varint (from offset 6, after magic, version and flags) made an
    # overlong number: the header cannot be parsed at all, so every record is found by
    # scanning, and nothing can prove the content.
    b = bytearray(single["blob"])
    b[6:14] = b"\xff" * 8
    res = S.salvage(bytes(b))
    assert res.header == "unreadable" and res.layout is None and not res.ok
    assert len(res.pieces) == 5 and all(p.status == "good" for p in res.pieces)
    frames = [single["data"][i:i + FRAME] for i in range(0, len(single["data"]), FRAME)]
    assert [p.data for p in res.pieces] == frames
    assert [tuple(p.archive_range) for p in res.pieces] == [(f.offset, f.payload_offset + f.coded_len)
                                                              for f in cont.frames]
    assert res.content is None  # nothing can prove it: only a marked output


def test_unreadable_version_byte_scans_the_archive_once(single, monkeypatch):
    # with the version byte damaged, salvage learns from one every-offset scan that the
    # records are version 3, and places them by their frame numbers from that same scan
    from lcodec.archive import salvage_bound as B

    b = bytearray(single["blob"])
    b[4] ^= 0xFF  # the version byte
    b[6:14] = b"\xff" * 8  # and no header to lay the frames out
    calls = []
    real = B.scan

    def counted(mv, lo, hi, aid):
        calls.append((lo, hi, aid))
        return real(mv, lo, hi, aid)

    monkeypatch.setattr(B, "scan", counted)
    res = S.salvage(bytes(b))
    assert res.header == "unreadable" and res.layout is None
    frames = [single["data"][i:i + FRAME] for i in range(0, len(single["data"]), FRAME)]
    assert [p.data for p in res.pieces] == frames
    assert calls.count((0, len(b), None)) == 1, calls


def test_damaged_identity_length_still_places_every_frame(single):
    # The identity length (the varint before the member-table length and the header CRC)
    # changed: the header's first record is no longer where it says, so the records are
    # found by scanning (the archive identity most records carry, as the damaged header's
    # own is unproven) and placed by their frame numbers; the content SHA-256 read from
    # the damaged header still proves the content.
    cont = single["cont"]
    res = S.salvage(flip(single["blob"], cont.spans["crc"][0] - 2, 6))
    assert res.header == "damaged" and not res.ok
    assert [res.frames[i].placed_by for i in range(5)] == ["frame number"] * 5
    assert res.content == single["data"]


def test_damaged_header_members_are_proven_by_their_sha256(three):
    res = S.salvage(flip(three["blob"], 12, 4))  # inside the content SHA-256 field
    assert res.header == "damaged" and not res.ok and not res.names_checked
    got = {r.path: r.data for r in res.members if r.status == "recovered"}
    assert got == three["files"]
    assert res.report()["names_checked"] is False


def test_truncated_archive_keeps_the_frames_before_the_cut(three):
    first, _ = three["ranges"]["station/sub/bisect.py"]
    cut = payload_middle(three["cont"], first)
    res = S.salvage(three["blob"][:cut])
    rec = {r.path: r for r in res.members}
    assert rec["station/colorsys.py"].data == three["files"]["station/colorsys.py"]
    assert rec["station/sub/bisect.py"].status == rec["station/sub/keyword.py"].status == "lost"
    last = res.report()["damaged_frames"][-1]
    assert last["frames"][1] == len(three["cont"].frames) - 1 and last["status"] == "missing"


def test_nothing_unmarked_is_ever_damaged(three, tmp_path):
    rng = random.Random(8)
    blob = three["blob"]
    for k in range(40):
        b = bytearray(blob)
        for _ in range(rng.choice([1, 1, 2, 5])):
            b[rng.randrange(len(b))] ^= 1 << rng.randrange(8)
        if rng.random() < 0.3:
            i = rng.randrange(len(b))
            del b[i:i + rng.randint(1, 40)]
        out = tmp_path / f"out{k}"
        try:
            res = S.salvage_to(bytes(b), str(out), keep_damaged=True)
        except Exception as e:  # only lcodec's own errors, for an archive too damaged to read
            assert isinstance(e, S.LcodecError), e
            continue
        assert (tmp_path / f"out{k}.salvage.json").is_file()
        for rel, data in (tree_files(out) if out.is_dir() else {}).items():
            if rel.endswith(S.DAMAGED_SUFFIX):
                continue
            assert data == three["files"][rel], (k, rel)
        assert res.ok == (bytes(b) == blob)


# -- the command line -------------------------------------------------------------------------
def test_cli_salvage_writes_good_members_and_a_report(three, tmp_path):
    first, _ = three["ranges"]["station/colorsys.py"]
    arc = tmp_path / "bad.lcodec"
    arc.write_bytes(flip(three["blob"], payload_middle(three["cont"], first), 1))
    out = tmp_path / "restored"
    # the real entry point, in a subprocess, for the exit code
    r = subprocess.run([sys.executable, "-m", "lcodec", "unpack", str(arc), "-o", str(out), "--salvage"],
                       capture_output=True, timeout=120)
    assert r.returncode == 1, r.stderr
    assert b"Traceback" not in r.stderr and b"2 of 3 files recovered" in r.stderr
    assert tree_files(out) == {k: v for k, v in three["files"].items() if k != "station/colorsys.py"}
    rep = json.loads((tmp_path / "restored.salvage.json").read_text())
    assert rep["ok"] is False and rep["archive"] == str(arc)
    assert [x["path"] for x in rep["members"]["lost"]] == ["station/colorsys.py"]
    assert rep["damaged_frames"][0]["member"] == "station/colorsys.py"
    assert str(out) in rep["outputs"] and str(tmp_path / "restored.salvage.json") in rep["outputs"]
    assert arc.read_bytes() == flip(three["blob"], payload_middle(three["cont"], first), 1)  # input untouched
    assert sorted(os.listdir(tmp_path)) == ["bad.lcodec", "restored", "restored.salvage.json"]  # no temp left


def test_cli_keep_damaged_marks_and_zero_fills(three, tmp_path):
    first, _ = three["ranges"]["station/colorsys.py"]
    arc = tmp_path / "bad.lcodec"
    arc.write_bytes(flip(three["blob"], payload_middle(three["cont"], first + 1), 6))
    out = tmp_path / "restored"
    r = run_cli("unpack", arc, "-o", out, "--salvage", "--keep-damaged")
    assert r.exit_code == 1
    got = tree_files(out)
    assert "station/colorsys.py" not in got  # never under its own name
    marked = got["station/colorsys.py" + S.DAMAGED_SUFFIX]
    orig = three["files"]["station/colorsys.py"]
    rep = json.loads((tmp_path / "restored.salvage.json").read_text())
    [lost] = rep["members"]["lost"]
    assert lost["written_as"] == "station/colorsys.py" + S.DAMAGED_SUFFIX
    assert lost["zero_filled"] == [[FRAME, len(orig)]]
    assert marked == orig[:FRAME] + bytes(len(orig) - FRAME)
    assert got["station/sub/bisect.py"] == three["files"]["station/sub/bisect.py"]


def test_cli_salvage_keeps_to_the_output_ceiling_over_the_frames_it_finds(single, tmp_path):
    # no readable header, so no claim to refuse up front: the frames found by scanning are
    # decoded while their claimed lengths fit --output-ceiling, and the rest are reported
    b = bytearray(single["blob"])
    b[6:14] = b"\xff" * 8
    arc = tmp_path / "t.lcodec"
    arc.write_bytes(bytes(b))
    r = run_cli("unpack", arc, "-o", tmp_path / "t", "--salvage", "--keep-damaged", "--output-ceiling", "5K")
    assert r.exit_code == 1
    rep = json.loads((tmp_path / "t.salvage.json").read_text())
    # 2 x 2,048 bytes fit in 5,120; the next two frames do not, the last one's 808 bytes do
    assert [("ceiling" in p["reason"], p["status"]) for p in rep["pieces"]] == [
        (False, "good"), (False, "good"), (True, "damaged"), (True, "damaged"), (False, "good")]
    marked = (tmp_path / ("t" + S.DAMAGED_SUFFIX)).read_bytes()
    assert marked.startswith(single["data"][:2 * FRAME])
    r = run_cli("unpack", arc, "-o", tmp_path / "u", "--salvage", "--keep-damaged")
    assert "past the output ceiling" not in (tmp_path / "u.salvage.json").read_text()


def test_cli_single_file(single, tmp_path):
    arc = tmp_path / "t.lcodec"
    arc.write_bytes(single["blob"])
    r = run_cli("unpack", arc, "--salvage")  # default output: the archive name without .lcodec
    assert r.exit_code == 0, r.stderr
    assert (tmp_path / "t").read_bytes() == single["data"]
    assert json.loads((tmp_path / "t.salvage.json").read_text())["ok"] is True
    bad = tmp_path / "bad.lcodec"
    bad.write_bytes(flip(single["blob"], payload_middle(single["cont"], 4), 2))
    r = run_cli("unpack", bad, "-o", tmp_path / "b", "--salvage")
    assert r.exit_code == 1
    assert not (tmp_path / "b").exists() and not (tmp_path / ("b" + S.DAMAGED_SUFFIX)).exists()
    rep = json.loads((tmp_path / "b.salvage.json").read_text())
    assert rep["content"] == {"bytes": len(single["data"]), "recovered": False,
                              "zero_filled": [[4 * FRAME, len(single["data"])]]}
    r = run_cli("unpack", bad, "-o", tmp_path / "c", "--salvage", "--keep-damaged", "--report", tmp_path / "c.json")
    assert r.exit_code == 1
    marked = (tmp_path / ("c" + S.DAMAGED_SUFFIX)).read_bytes()
    assert marked[:4 * FRAME] == single["data"][:4 * FRAME] and marked[4 * FRAME:] == bytes(len(marked) - 4 * FRAME)
    assert not (tmp_path / "c").exists() and json.loads((tmp_path / "c.json").read_text())["ok"] is False


def test_cli_salvage_usage_errors(single, tmp_path):
    arc = tmp_path / "t.lcodec"
    arc.write_bytes(single["blob"])
    (tmp_path / "exists").write_bytes(b"keep me")
    assert run_cli("unpack", arc, "-o", tmp_path / "exists", "--salvage").exit_code == 2
    assert (tmp_path / "exists").read_bytes() == b"keep me"
    (tmp_path / "r.salvage.json").write_text("{}")
    r = run_cli("unpack", arc, "-o", tmp_path / "r", "--salvage")
    assert r.exit_code == 2 and "r.salvage.json exists" in r.stderr and not (tmp_path / "r").exists()
    assert run_cli("unpack", arc, "-o", tmp_path / "r", "--salvage", "--force").exit_code == 0
    assert run_cli("unpack", arc, "-o", tmp_path / "k", "--keep-damaged").exit_code == 2
    assert run_cli("unpack", arc, "-o", "-", "--salvage").exit_code == 2
    r = run_cli("unpack", tmp_path / "exists", "-o", tmp_path / "z", "--salvage")  # not an archive at all
    assert r.exit_code == 1 and "no frame record" in r.stderr


def test_salvage_needs_the_model_file(tmp_path):
    model = tmp_path / "small.lcm"
    modelfile.dump(str(model), {"name": "strata", "params": Strata(max_order=3, hash_log2=12).params})
    data = stdlib_file("colorsys.py", 3000)
    blob = api.pack(data, model=str(model), frame_size=1024)
    with pytest.raises(ModelError) as ei:
        S.salvage(blob)
    assert "model" in str(ei.value)
    res = S.salvage(flip(blob, payload_middle(C.read_container(blob), 1)), model=str(model))
    assert [res.frames[i].status for i in range(3)] == ["good", "damaged", "good"]
    arc = tmp_path / "m.lcodec"
    arc.write_bytes(blob)
    r = run_cli("unpack", arc, "-o", tmp_path / "m", "--salvage")
    assert r.exit_code == 1 and "-m/--model" in r.stderr


def test_a_marked_name_never_overwrites_a_member(tmp_path):
    root = tmp_path / "box"
    root.mkdir()
    real = stdlib_file("colorsys.py", 2000)
    (root / "x").write_bytes(real)
    (root / ("x" + S.DAMAGED_SUFFIX)).write_bytes(b"a real member with the marked name\n")
    blob, _ = api.pack_paths([str(root)], frame_size=1024)  # x: two frames, the first damaged
    cont = C.read_container(blob)
    res = S.salvage_to(flip(blob, payload_middle(cont, 0)), str(tmp_path / "out"), keep_damaged=True)
    got = tree_files(tmp_path / "out")
    assert got == {"box/x" + S.DAMAGED_SUFFIX: b"a real member with the marked name\n"}
    [lost] = [r for r in res.members if r.status == "lost"]
    assert lost.path == "box/x" and lost.written_as is None and "a member has that name" in lost.reason


def test_every_offset_scan_finds_what_read_record_finds():
    """The every-offset scan of a version-3 file (its archive identity unknown) tests each
    offset's head CRC-32C cheaply before read_record: it must find exactly the records
    read_record accepts at some offset (the reference: read_record at every offset), on an
    archive with damaged bytes in its header and in a record."""
    from lcodec.archive import salvage_bound as SB

    text = b"".join(b"%d kestrel-ridge gust=%d\n" % (1_700_000_000 + 11 * k, k % 29) for k in range(300))
    blob = bytearray(api.pack(text, frame_size=500))
    blob[10] ^= 0x40  # in the header
    blob[len(blob) // 2] ^= 0x01  # in a record
    mv = memoryview(bytes(blob))
    want = {q: fr for q in range(len(mv)) if (fr := SB.record_at(mv, q)) is not None}
    got = SB.scan(mv, 0, len(mv), None)
    assert sorted(got) == sorted(want) and len(want) >= 10
    assert all(got[q].raw_len == want[q].raw_len and got[q].number == want[q].number for q in want)


def _read_record_everywhere(mv, version):
    """The reference: read_record (container.py, the strict reader's own check) at every offset."""
    out = []
    for q in range(len(mv)):
        if _read_record_or_none(mv, q, version) is not None:
            out.append(q)
    return out


@pytest.mark.parametrize("version", [1, 3])
def test_every_offset_head_test_keeps_exactly_what_read_record_accepts(version):
    """salvage_bound.head_offsets (numpy: where varints end, the method byte, the stored
    CRC-32C, then one CRC-32C per surviving offset) followed by read_record must accept the
    same offsets as read_record alone at every offset, for version-3 heads and for version
    1/2 heads (salvage.scan_records), on damaged archives, random bytes, zeros, and a
    buffer that straddles the numpy block boundary (SCAN_BLOCK made small)."""
    from lcodec.archive import salvage_bound as SB

    text = b"".join(b"%d kestrel-ridge gust=%d\n" % (1_700_000_000 + 11 * k, k % 29) for k in range(200))
    v3 = api.pack(text, frame_size=300)
    v1 = open(os.path.join(os.path.dirname(__file__), "golden", "strata-v1-text.lcodec"), "rb").read()
    rng = random.Random(version)
    bufs = [v3, v1, bytes(300), rng.randbytes(2000)]
    for _ in range(40):
        b = bytearray(rng.choice([v3, v1]))
        for _ in range(rng.randrange(1, 6)):
            b[rng.randrange(len(b))] = rng.randrange(256)
        bufs.append(bytes(b[rng.randrange(40):]))
    wants = [_read_record_everywhere(memoryview(b), version) for b in bufs]
    for block in (SB.SCAN_BLOCK, 97):
        old = SB.SCAN_BLOCK
        SB.SCAN_BLOCK = block
        try:
            for b, want in zip(bufs, wants):
                mv = memoryview(b)
                got = [q for q in SB.head_offsets(mv, 0, len(mv), version == 3)
                       if _read_record_or_none(mv, q, version) is not None]
                assert got == want
                if version == 1:
                    assert sorted(S.scan_records(mv, 0, len(mv))) == want
        finally:
            SB.SCAN_BLOCK = old
    assert sum(map(len, wants)) >= 20  # the archives' own records were among them


def _read_record_or_none(mv, q, version):
    try:
        return C.read_record(mv, q, -1, None, version)
    except DataError:
        return None
