"""Damaged, truncated and hostile archives: a clear DataError from the API, a failing
VerifyReport that names the frame or member, and through the CLI exit code 1, one line
on stderr, no traceback and nothing left in the output folder.

The archives are made from the Python standard library's own sources (located with
sysconfig), an outside, real input. The byte ranges damaged are taken from the reader's
own spans (lcodec.container.read_container), so the tests follow the layout in
docs/FORMAT.md rather than restating its offsets.
"""
from __future__ import annotations

import concurrent.futures as cf
import os
import struct
import subprocess
import sys

import pytest

from lcodec import api
from lcodec.format import container as C
from lcodec.errors import DataError
from lcodec.models import default_model
from support import stdlib_file  # noqa: E402

FRAME_SIZE = 8192  # the single-file archive is cut into several frames




# -- the two archives ---------------------------------------------------------------------
class Sample:
    """An archive and the byte ranges of its parts (from the reader's own spans)."""

    def __init__(self, kind, blob, original, member_paths=()):
        self.kind, self.blob, self.original, self.member_paths = kind, blob, original, list(member_paths)
        cont = C.read_container(blob)
        self.header = (0, cont.spans["crc"][1])  # magic .. header CRC-32C
        self.ident = cont.spans["identity"]
        self.table = cont.spans["members"]
        self.frames = cont.frames
        self.heads = [(f.offset, f.payload_offset) for f in self.frames]
        self.payloads = [(f.payload_offset, f.payload_offset + f.coded_len) for f in self.frames]


@pytest.fixture(scope="module")
def single():
    data = stdlib_file("textwrap.py")
    blob = api.pack(data, frame_size=FRAME_SIZE)
    s = Sample("file", blob, data)
    assert len(s.frames) >= 3 and all(f.method != C.METHOD_STORED for f in s.frames)
    return s


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    root = tmp_path_factory.mktemp("src") / "station"
    (root / "sub").mkdir(parents=True)
    files = {"readme.py": stdlib_file("colorsys.py"), "sub/b.py": stdlib_file("bisect.py"),
             "sub/c.txt": b"VK-7 02:00 pressure 1013.2 hPa\n" * 120}
    for rel, d in files.items():
        (root / rel).write_bytes(d)
    blob, _ = api.pack_paths([str(root)])
    s = Sample("folder", blob, files, ["station/" + r for r in sorted(files)])
    s.root = root
    assert len(s.frames) == 3
    return s


@pytest.fixture(params=["file", "folder"])
def sample(request):
    return request.getfixturevalue("single" if request.param == "file" else "folder")


def flip(blob: bytes, pos: int, bit: int = 0) -> bytes:
    b = bytearray(blob)
    b[pos] ^= 1 << bit
    return bytes(b)


def fix_header_crc(blob: bytes, s: "Sample") -> bytes:
    """Recompute the header CRC-32C (which covers everything in the header but itself,
    magic and version included) so that only the deliberate change is wrong."""
    c0, c1 = s.header[1] - 4, s.header[1]
    crc = C.crc32c(blob[:c0] + blob[c1:s.table[1]])
    return blob[:c0] + struct.pack("<I", crc) + blob[c1:]


def with_version(s: "Sample", version: int) -> bytes:
    assert s.blob[:4] == C.MAGIC and s.blob[4] == 3  # the version byte follows the 4-byte magic
    return fix_header_crc(s.blob[:4] + bytes([version]) + s.blob[5:], s)


def with_magic(s: "Sample", magic: bytes) -> bytes:
    assert len(magic) == len(C.MAGIC) and magic != C.MAGIC
    return fix_header_crc(magic + s.blob[len(magic):], s)


def expect_refused(s: Sample, blob: bytes, tmp_path=None, names=None, message=None):
    """API: DataError from unpack (and unpack_to_dir); verify fails, naming `names`."""
    with pytest.raises(DataError) as ei:
        api.unpack(blob)
    if message:
        assert message in str(ei.value)
    if tmp_path is not None and s.kind == "folder":
        out = tmp_path / "restored"
        with pytest.raises(DataError):
            api.unpack_to_dir(blob, str(out))
        assert not out.exists()
    rep = api.verify(blob)
    assert not rep.ok and rep.problems
    text = " | ".join(rep.problems)
    for n in names or ():
        assert n in text, (n, text)
    return str(ei.value), text


# -- API: every region ---------------------------------------------------------------------
def test_undamaged_samples_are_fine(sample):
    assert api.verify(sample.blob).ok


def test_every_bit_of_the_header_fields(sample):
    for pos in range(*sample.header):
        for bit in range(8):
            expect_refused(sample, flip(sample.blob, pos, bit))


def test_every_byte_of_the_identity_json(sample, tmp_path):
    a, b = sample.ident
    for pos in range(a, b):
        expect_refused(sample, flip(sample.blob, pos, pos % 8))
    expect_refused(sample, flip(sample.blob, a + 3, 2), tmp_path)


def test_every_byte_of_the_member_table(folder, tmp_path):
    a, b = folder.table
    assert b - a > 100
    for pos in range(a, b):
        expect_refused(folder, flip(folder.blob, pos, pos % 8))
    expect_refused(folder, flip(folder.blob, a + 10, 1), tmp_path)


def test_every_bit_of_every_frame_record_head(sample, tmp_path):
    for i, (a, b) in enumerate(sample.heads):
        for pos in range(a, b):
            for bit in range(8):
                expect_refused(sample, flip(sample.blob, pos, bit), names=[f"frame {i}"])
    expect_refused(sample, flip(sample.blob, sample.heads[-1][0] + 4, 3), tmp_path)


def test_frame_payload_bit_flips_name_the_frame(sample, tmp_path):
    for i, (a, b) in enumerate(sample.payloads):
        # away from the last coded word, whose low bits may be unused by the decoder
        for pos in (a + 1, (a + b) // 2):
            names = [f"frame {i}"]
            if sample.kind == "folder":
                names.append(sample.member_paths[i])  # one frame per member here
            expect_refused(sample, flip(sample.blob, pos, pos % 8), names=names)
    a, b = sample.payloads[0]
    expect_refused(sample, flip(sample.blob, (a + b) // 2, 5), tmp_path)


def test_payload_damage_never_gives_wrong_output():
    # Every bit of the first and last 8 payload bytes of a small frame: either a DataError
    # or exactly the original (the last word's unused low bits may change nothing).
    data = stdlib_file("keyword.py")[:700]
    blob = api.pack(data)
    fr = C.read_container(blob).frames[0]
    a, b = fr.payload_offset, fr.payload_offset + fr.coded_len
    assert fr.method != C.METHOD_STORED and b - a >= 16
    refused = 0
    for pos in list(range(a, a + 8)) + list(range(b - 8, b)):
        for bit in range(8):
            try:
                out = api.unpack(flip(blob, pos, bit))
            except DataError:
                refused += 1
                continue
            assert out == data, (pos - a, bit)
    assert refused >= 64  # at least all of the first 8 bytes


def test_multi_frame_damage_names_that_frame_and_others_recover(single):
    a, b = single.payloads[1]
    bad = flip(single.blob, (a + b) // 2, 3)
    rep = api.verify(bad)
    assert not rep.ok
    assert any("frame 1" in p for p in rep.problems)
    assert not any("frame 0" in p or "frame 2" in p for p in rep.problems)
    d = api.decode(bad, keep_going=True)  # undamaged frames stay recoverable
    assert d.frames[1] is None
    assert d.frames[0] == single.original[:FRAME_SIZE]
    assert d.frames[2] == single.original[2 * FRAME_SIZE: 3 * FRAME_SIZE]


def truncation_points(s: Sample):
    head_end = s.heads[0][0]
    h = s.header[1]
    pts = {0, 1, 3, 4, 5, 6, 7, 20, h - 5, h - 4, h - 1, h, (s.ident[0] + s.ident[1]) // 2,
           s.ident[1], head_end - 1, head_end, head_end + 10, len(s.blob) - 1}
    if s.table[1] > s.table[0]:
        pts.add((s.table[0] + s.table[1]) // 2)
    for (ha, _), (pa, pb) in zip(s.heads, s.payloads):
        pts.update({ha + 5, pa, (pa + pb) // 2, pb - 1})
    return sorted(p for p in pts if p < len(s.blob))


def test_truncation_at_many_points(sample, tmp_path):
    for cut in truncation_points(sample):
        msg, _ = expect_refused(sample, sample.blob[:cut])
        if cut >= len(C.MAGIC):
            assert "truncated" in msg, (cut, msg)
    for i, (pa, pb) in enumerate(sample.payloads):
        expect_refused(sample, sample.blob[: (pa + pb) // 2], names=[f"frame {i}"])
    expect_refused(sample, sample.blob[: len(sample.blob) // 2], tmp_path)


@pytest.mark.parametrize("tail", [b"\x00", b"trailing notes " * 20, "copy of the last record"])
def test_appended_garbage(sample, tail, tmp_path):
    if tail == "copy of the last record":
        tail = sample.blob[sample.heads[-1][0]:]
    expect_refused(sample, sample.blob + tail, tmp_path, message="unexpected bytes")


def test_unknown_format_version(sample, tmp_path):
    bad = with_version(sample, 4)
    msg, text = expect_refused(sample, bad, tmp_path, message="unsupported format version")
    assert "unsupported format version" in text


def test_wrong_magic(sample, tmp_path):
    bad = with_magic(sample, b"\x9bLC\n")
    expect_refused(sample, bad, tmp_path, message="not an lcodec archive")
    expect_refused(sample, b"PK\x03\x04" + bytes(200), message="not an lcodec archive")
    expect_refused(sample, b"", message="not an lcodec archive")


# -- hostile member paths -----------------------------------------------------------------
def craft(members_data) -> bytes:
    """An archive with a hand-made member list and stored frames."""
    members, recs, content = [], [], b""
    for path, data, mode in members_data:
        members.append(C.Member(path, mode, len(data), C.sha256(data), 0))
        if data:
            recs.append(C.frame_record(len(data), data, C.METHOD_STORED, 1, C.crc32c(data)))
        content += data
    return (C.header_bytes(len(content), C.sha256(content), len(recs), 1 << 20, default_model().identity, members)
            + b"".join(recs))


FILE, DIR = 0o100644, 0o040755


def test_crafted_archive_is_otherwise_valid(tmp_path):
    out = tmp_path / "out"
    api.unpack_to_dir(craft([("ok", b"", DIR), ("ok/fine.txt", b"hello", FILE)]), str(out))
    assert (out / "ok" / "fine.txt").read_bytes() == b"hello"


def hostile_cases(tmp_path):
    absolute = str(tmp_path / "abs-evil")
    return {
        "climb": [("../evil", b"hello", FILE)],
        "climb inside": [("a/../../evil", b"hello", FILE)],
        "absolute": [(absolute, b"hello", FILE)],
        "plain absolute": [("/abs", b"hello", FILE)],
        "empty component": [("a//evil", b"hello", FILE)],
        "dot": [(".", b"", DIR)],
        "duplicate path": [("twice", b"first", FILE), ("twice", b"second", FILE)],
        "file then folder": [("x", b"a file", FILE), ("x/y", b"under a file", FILE)],
    }


@pytest.mark.parametrize("case", ["climb", "climb inside", "absolute", "plain absolute", "empty component",
                                  "dot", "duplicate path", "file then folder"])
def test_hostile_member_paths_are_refused(tmp_path, case):
    work = tmp_path / "work"
    work.mkdir()
    blob = craft(hostile_cases(work)[case])
    out = work / "out"
    with pytest.raises(DataError):
        api.unpack_to_dir(blob, str(out))
    assert os.listdir(work) == []
    assert not os.path.lexists(tmp_path / "evil") and not os.path.lexists("/abs")
    assert not api.verify(blob).ok


# -- through the CLI ----------------------------------------------------------------------
def cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "lcodec", *args], capture_output=True, cwd=cwd, timeout=120)


def damaged_variants(s: Sample) -> dict:
    v = {
        "header fields": flip(s.blob, 12, 1),
        "identity": flip(s.blob, s.ident[0] + 5, 0),
        "frame head": flip(s.blob, s.heads[0][0] + 1, 2),
        "frame payload": flip(s.blob, (s.payloads[-1][0] + s.payloads[-1][1]) // 2, 6),
        "truncated in header": s.blob[:50],
        "truncated in payload": s.blob[: s.payloads[-1][0] + 3],
        "garbage appended": s.blob + b"\xff" * 33,
        "version 4": with_version(s, 4),
        "wrong magic": with_magic(s, b"\x9bLC\n"),
    }
    if s.kind == "folder":
        v["member table"] = flip(s.blob, s.table[0] + 12, 4)
    return v


FILE_CASES = ["header fields", "identity", "frame head", "frame payload", "truncated in header",
              "truncated in payload", "garbage appended", "version 4", "wrong magic"]
FOLDER_CASES = FILE_CASES + ["member table"]


class CliRun:
    """One damaged archive run through `unpack` and `verify` in subprocesses."""

    def __init__(self, base, s: Sample, name: str, blob: bytes):
        self.name = name
        self.arc_dir, self.out = base / "arc", base / "out"
        self.arc_dir.mkdir(parents=True)
        self.out.mkdir()
        self.arc = self.arc_dir / "damaged.lcodec"
        self.arc.write_bytes(blob)
        self.target = self.out / ("restored" if s.kind == "folder" else "textwrap.py")

    def jobs(self):
        return [(self, "unpack", ["unpack", str(self.arc), "-o", str(self.target)]),
                (self, "verify", ["verify", str(self.arc)])]


@pytest.fixture(scope="module")
def cli_runs(tmp_path_factory, single, folder):
    """Every damaged variant of both archives through the CLI; the processes run side by
    side (they are independent), each test below then checks its own results."""
    runs = {}
    for s, cases in ((single, FILE_CASES), (folder, FOLDER_CASES)):
        variants = damaged_variants(s)
        for name in cases:
            runs[(s.kind, name)] = CliRun(tmp_path_factory.mktemp("cli"), s, name, variants[name])
    a, b = single.payloads[1]
    runs[("file", "payload of frame 1")] = CliRun(tmp_path_factory.mktemp("cli"), single, "payload of frame 1",
                                                  flip(single.blob, (a + b) // 2, 2))
    jobs = [j for r in runs.values() for j in r.jobs()]
    with cf.ThreadPoolExecutor(3) as ex:
        results = list(ex.map(lambda j: cli(*j[2]), jobs))
    for (run, what, _), res in zip(jobs, results):
        setattr(run, what, res)
    return runs


def check_cli_refusal(run: CliRun):
    name = run.name
    for what in ("unpack", "verify"):
        r = getattr(run, what)
        err = r.stderr.decode("utf-8", "replace")
        assert r.returncode == 1, (name, what, r.returncode, err)
        assert "Traceback" not in err and "Traceback" not in r.stdout.decode("utf-8", "replace"), (name, what)
        assert err.strip(), (name, what)
    lines = run.unpack.stderr.decode().strip().splitlines()
    assert len(lines) == 1, (name, lines)
    assert os.listdir(run.out) == [], (name, os.listdir(run.out))  # nothing new, no temporary files
    assert os.listdir(run.arc_dir) == ["damaged.lcodec"]
    return run.unpack.stderr.decode(), run.verify.stderr.decode()


@pytest.mark.parametrize("name", FILE_CASES)
def test_cli_refuses_damaged_file_archive(cli_runs, single, name):
    uerr, verr = check_cli_refusal(cli_runs[("file", name)])
    if name == "version 4":
        assert "unsupported format version" in uerr and "unsupported format version" in verr
    if name == "wrong magic":
        assert "not an lcodec archive" in uerr
    if name in ("frame payload", "truncated in payload"):
        assert f"frame {len(single.frames) - 1}" in verr


@pytest.mark.parametrize("name", FOLDER_CASES)
def test_cli_refuses_damaged_folder_archive(cli_runs, folder, name):
    uerr, verr = check_cli_refusal(cli_runs[("folder", name)])
    if name == "version 4":
        assert "unsupported format version" in uerr and "unsupported format version" in verr
    if name == "frame payload":
        assert folder.member_paths[-1] in verr and "frame 2" in verr


def test_cli_verify_names_the_damaged_frame(cli_runs):
    run = cli_runs[("file", "payload of frame 1")]
    check_cli_refusal(run)
    err = run.verify.stderr.decode()
    assert "frame 1" in err and "frame 0" not in err and "frame 2" not in err


@pytest.mark.parametrize("case", ["climb", "absolute", "duplicate path"])
def test_cli_refuses_hostile_member_paths(tmp_path, case):
    work = tmp_path / "work"
    work.mkdir()
    arc = tmp_path / "hostile.lcodec"
    arc.write_bytes(craft(hostile_cases(work)[case]))
    r = cli("unpack", str(arc), "-o", str(work / "out"), cwd=str(work))
    err = r.stderr.decode()
    assert r.returncode == 1, err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert os.listdir(work) == []
    assert sorted(os.listdir(tmp_path)) == ["hostile.lcodec", "work"]
