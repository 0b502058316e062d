#!/usr/bin/env python3
"""Fuzz lcodec's readers with malformed inputs made from a handful of valid seeds.

    python scripts/fuzz.py                     # 100,000 inputs, seed 1 (a few minutes)
    python scripts/fuzz.py -n 2000 --seed 7    # a quick run
    python scripts/fuzz.py --replay 4711       # rerun input #4711 of that seed, traceback shown
    python scripts/fuzz.py --json fuzz.json    # the summary as JSON as well

Seeds: archives (a single file, a multi-member folder, a multi-frame file, a stored
frame, empty content, an empty folder, and one made with the weft model file when
tests/golden has it) and model files (modelfile.dump of a strata model, one with arrays
of every dtype, and the golden weft model). Each input is one seed changed by one
operator: bit flips, byte changes, insertions, deletions, truncation, extension,
zero-filled ranges, random bytes, splices of two seeds; "resealed" mutations (a region
changed, then the header CRC, record CRCs and coded-bytes CRCs, or a model file's
SHA-256 trailer, recomputed, so that the change reaches the checks behind the
checksums); and crafted archives and model files with huge or hostile lengths, counts,
shapes, paths, modes and identities, their checksums valid.

Each archive goes to api.info, api.verify, api.decode and (every --salvage-every
inputs) salvage.salvage, and (every 100th input) salvage.salvage_to into a scratch
folder; each model file to modelfile.parse and, when that accepts it, models.load_model.

Counted:
* crash: any exception that is not an lcodec.errors.LcodecError (the input is saved);
* hang: an input that ran longer than --budget seconds (interrupted at that point);
* wrong output: an accepted input whose content differs from what it must be: for a
  seed's mutation, the seed's content (single file) or its members' bytes in table order;
  for a crafted input, the bytes it was built from, or any success at all when it was
  built to be refused. Metadata (member paths, modes, times) is not content: a resealed
  member table may change it and decode legitimately; such inputs are counted apart
  ("accepted, metadata changed"). A not-resealed input that is accepted while differing
  from its seed at all is a wrong output too: every byte of an archive lies under a
  CRC-32C, so that would mean damage got through a checksum.
  Salvage: a member it calls recovered, or content it calls proven, that differs from
  the original; a frame it calls good and places in a seed's own layout whose bytes
  differ from the original's there and are no frame of any seed (damage that got
  through a CRC-32C). A record copied from elsewhere (a splice of two seeds, or of a
  seed with itself) passes its own CRC-32C and carries no frame number, so salvage, like
  any reader of format v1, may take it for the frame whose place it occupies: such
  frames are counted apart ("copied records placed"); they can only ever appear in a
  .lcodec-damaged output, since members and content are written as good only when their
  SHA-256 matches;
* verify/decode disagreement: verify says ok but decode refuses, or the reverse;
* worst time per input, and peak RSS (resource.getrusage maxrss). The address space is
  capped (RLIMIT_AS: what setup used plus --mem-headroom GiB) so that an unbounded
  allocation fails as MemoryError, a crash, instead of passing unnoticed.

Frames whose coded bytes and head are byte-identical to a frame already decoded are not
decoded again (--no-cache decodes every one): decoding is deterministic (the
determinism tests prove it), and this keeps 100,000 inputs to minutes.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import os
import random
import resource
import shutil
import signal
import struct
import sys
import sysconfig
import tempfile
import time
import traceback

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

import numpy as np  # noqa: E402

from lcodec import api
from lcodec.archive import read as _read, salvage as S
from lcodec.format import modelfile  # noqa: E402
from lcodec.format import container as C  # noqa: E402
from lcodec.errors import LcodecError  # noqa: E402
from lcodec.models import default_model, load_model, resolve  # noqa: E402
from lcodec.models.strata import Strata  # noqa: E402

GOLDEN = os.path.join(ROOT, "tests", "golden")


class Hang(KeyboardInterrupt):
    """Raised by the alarm; a KeyboardInterrupt so that no `except Exception` swallows it."""


# -- seeds ----------------------------------------------------------------------------------
class Seed:
    def __init__(self, name, blob, kind, content=None, members=None, model=None, model_path=None):
        self.name, self.blob, self.kind = name, blob, kind
        self.content = content  # single-file archives: the content
        self.members = members  # member archives: [(path, bytes or None for a folder)]
        self.model = model  # the model object to decode with (None: the built-in default)
        self.model_path = model_path
        self.frame_data = set()
        self.layout_key = None
        if kind == "archive":
            cont = C.read_container(blob)
            d = api.decode(blob, model)
            self.frame_data = {bytes(f) for f in d.frames}
            self.layout_key = (cont.frame_size, tuple(C.expected_frame_sizes(cont.content_size, cont.frame_size,
                                                                               cont.members)))
            self.whole = b"".join(d.frames)

    def file_members(self):
        return [d for _, d in self.members if d] if self.members is not None else None


def stdlib_text(name: str, n: int) -> bytes:
    p = os.path.join(sysconfig.get_paths()["stdlib"], name)
    try:
        with open(p, "rb") as f:
            return f.read()[:n]
    except OSError:  # not on this machine: invented text instead
        return b"".join(b"VK-%d 02:%02d pressure %d.%d hPa\n" % (i % 9, i % 60, 990 + i % 40, i % 10)
                        for i in range(n // 30 + 1))[:n]


def make_seeds(work: str):
    """The seed archives and model files (small: every frame decodes in milliseconds)."""
    rnd = random.Random(20310)
    text_a = stdlib_text("colorsys.py", 2200)
    text_b = stdlib_text("bisect.py", 1500)
    noise = bytes(rnd.getrandbits(8) for _ in range(300))
    seeds = [
        Seed("single", api.pack(text_a), "archive", content=text_a),
        Seed("multi-frame", api.pack(text_b + text_a[:1000], frame_size=640), "archive",
             content=text_b + text_a[:1000]),
        Seed("stored", api.pack(noise), "archive", content=noise),
        Seed("mixed", api.pack(noise + text_b[:600], frame_size=300), "archive", content=noise + text_b[:600]),
        Seed("empty", api.pack(b""), "archive", content=b""),
    ]
    root = os.path.join(work, "station")
    files = {"readme.txt": b"VK-7 VK-9 HR-2\n", "2031/vk7.log": b"02:00 VK-7 wind 4.1 m/s\n" * 40,
             "2031/notes.py": text_b[:900], "2031/empty.bin": b"", "cal/gain.bin": noise[:120]}
    for rel, data in files.items():
        os.makedirs(os.path.dirname(os.path.join(root, rel)), exist_ok=True)
        with open(os.path.join(root, rel), "wb") as f:
            f.write(data)
    os.makedirs(os.path.join(root, "spare"), exist_ok=True)
    blob, _ = api.pack_paths([root], frame_size=512)
    cont = C.read_container(blob)
    members = []
    for m in cont.members:
        rel = m.path.split("/", 1)[1] if "/" in m.path else None
        members.append((m.path, None if m.is_dir else files[rel]))
    seeds.append(Seed("folder", blob, "archive", members=members))
    empty_dir = os.path.join(work, "nothing-here")
    os.makedirs(empty_dir, exist_ok=True)
    blob, _ = api.pack_paths([empty_dir])
    seeds.append(Seed("empty-folder", blob, "archive", members=[("nothing-here", None)]))
    weft_path = os.path.join(GOLDEN, "weft-tiny.lcmodel")
    models = []
    if os.path.isfile(weft_path):
        wm = resolve(weft_path)
        wtext = stdlib_text("keyword.py", 500)
        seeds.append(Seed("weft", api.pack(wtext, model=wm), "archive", content=wtext, model=wm,
                          model_path=weft_path))
        with open(weft_path, "rb") as f:
            models.append(Seed("weft-model", f.read(), "model"))
    for name in ("heddle-digits-tiny", "heddle-pixels-tiny"):  # the layer kit's graphs (JSON ops)
        hpath = os.path.join(GOLDEN, name + ".lcmodel")
        if os.path.isfile(hpath):
            with open(hpath, "rb") as f:
                models.append(Seed(name, f.read(), "model"))
    hpath = os.path.join(GOLDEN, "heddle-digits-tiny.lcmodel")
    if os.path.isfile(hpath):
        hm = resolve(hpath)
        digits = bytes(range(17)) * 15 + bytes(64)
        seeds.append(Seed("heddle", api.pack(digits, model=hm), "archive", content=digits, model=hm, model_path=hpath))
    mpath = os.path.join(work, "small.lcm")
    modelfile.dump(mpath, {"name": "strata", "params": Strata(max_order=4, hash_log2=14).params},
                   notes="fuzz seed")
    with open(mpath, "rb") as f:
        models.append(Seed("strata-model", f.read(), "model"))
    arrays = {f"a_{code}": np.arange(6, dtype=dt).reshape(2, 3) for code, dt in modelfile.DTYPES.items()}
    modelfile.dump(mpath, {"name": "strata", "params": {}}, arrays)
    with open(mpath, "rb") as f:
        models.append(Seed("arrays-model", f.read(), "model"))
    return seeds, models


# -- mutation ---------------------------------------------------------------------------------
def _vpos(b, pos):
    """End of a varint at pos (at most 8 bytes), or None."""
    for i in range(8):
        if pos + i >= len(b):
            return None
        if not b[pos + i] & 0x80:
            return pos + i + 1
    return None


def header_regions(b):
    """(crc position, identity span, table span, first record) read without checks, or None."""
    if len(b) < 6:
        return None
    p = _vpos(b, 6)
    if p is None or p + 32 > len(b):
        return None
    p = p + 32
    vals = []
    for _ in range(4):
        q = _vpos(b, p)
        if q is None:
            return None
        vals.append(C.read_uvarint(memoryview(bytes(b)), p, "")[0])
        p = q
    ilen, tlen = vals[2], vals[3]
    if p + 4 + ilen + tlen > len(b):
        return None
    return p, (p + 4, p + 4 + ilen), (p + 4 + ilen, p + 4 + ilen + tlen), p + 4 + ilen + tlen


def record_regions(b, pos):
    """[(record start, head end, payload end)] walked without checks."""
    out = []
    mv = memoryview(bytes(b))
    while pos < len(b) and len(out) < 4096:
        try:
            _, p = C.read_uvarint(mv, pos, "")
            coded, p = C.read_uvarint(mv, p, "")
            _, p = C.read_uvarint(mv, p + 1, "")
        except (LcodecError, IndexError):
            break
        if p + 12 > len(b):
            break
        out.append((pos, p + 12, min(p + 12 + coded, len(b)), p))
        pos = p + 12 + coded
    return out


def reseal_archive(blob: bytes) -> bytes:
    """Recompute the header CRC, then every record's coded-bytes and record CRC."""
    b = bytearray(blob)
    h = header_regions(b)
    if h is None:
        return bytes(b)
    crc_at, _, (_, tend), first = h
    struct.pack_into("<I", b, crc_at, C.crc32c(bytes(b[:crc_at]) + bytes(b[crc_at + 4:tend])))
    for start, head_end, pay_end, p in record_regions(b, first):
        struct.pack_into("<I", b, p + 4, C.crc32c(bytes(b[head_end:pay_end])))
        struct.pack_into("<I", b, p + 8, C.crc32c(bytes(b[start:p + 8])))
    return bytes(b)


def reseal_model(blob: bytes) -> bytes:
    if len(blob) < 32:
        return blob
    return blob[:-32] + hashlib.sha256(blob[:-32]).digest()


def _rand_bytes(rng, n):
    return bytes(rng.getrandbits(8) for _ in range(n))


def plain_mutation(rng, b: bytes, lo=0, hi=None):
    """One generic change inside [lo, hi); returns (operator, bytes)."""
    b = bytearray(b)
    hi = len(b) if hi is None else hi
    span = max(hi - lo, 0)
    op = rng.choice(["flip", "flip", "flips", "byte", "insert", "delete", "zero", "truncate", "extend"])
    if span == 0 and op in ("flip", "flips", "byte", "delete", "zero"):
        op = "insert"
    if op == "flip":
        i = lo + rng.randrange(span)
        b[i] ^= 1 << rng.randrange(8)
    elif op == "flips":
        for _ in range(rng.choice([2, 3, 8, 32])):
            i = lo + rng.randrange(span)
            b[i] ^= 1 << rng.randrange(8)
    elif op == "byte":
        for _ in range(rng.choice([1, 1, 2, 4])):
            i = lo + rng.randrange(span)
            b[i] = rng.choice([0, 0xFF, 0x80, 0x7F, 1, rng.getrandbits(8)])
    elif op == "insert":
        i = lo + rng.randrange(span + 1)
        b[i:i] = rng.choice([_rand_bytes(rng, rng.randint(1, 16)), b"\x00" * rng.randint(1, 8),
                             b"\xff" * rng.randint(1, 8), bytes(b[lo:lo + rng.randint(1, 24)])])
    elif op == "delete":
        i = lo + rng.randrange(span)
        del b[i:i + rng.randint(1, min(32, hi - i))]
    elif op == "zero":
        i = lo + rng.randrange(span)
        n = rng.randint(1, max(1, min(span, rng.choice([4, 64, 4096]))))
        b[i:i + n] = bytes(len(b[i:i + n]))
    elif op == "truncate":
        b = b[:lo + rng.randrange(span + 1)]
    else:  # extend
        tail = rng.choice([b"\x00" * rng.randint(1, 64), _rand_bytes(rng, rng.randint(1, 64)),
                           bytes(b[-rng.randint(1, max(1, min(len(b), 200))):]) if b else b"\x01"])
        b = b + tail
    return op, bytes(b)


NASTY_PATHS = ["../evil", "a/../../evil", "/abs/evil", "a//b", ".", "..", "a/./b", "x\x00y", "a" * 5000,
               "ok/" + "d" * 300 + "/f", "st\u00e4tion/\u65e5\u672c.txt", "trailing/", "dup", "dup", "f", "f/g",
               "back\\slash", "nl\nname", "x" + S.DAMAGED_SUFFIX]
NASTY_MODES = [0o100644, 0o100755, 0o040755, 0o120777, 0o020644, 0o060644, 0o010644, 0o140755, 0, 0o104755,
               0o102755, 0o041777, 0o170000, 0xFFFFFFFF]
IDENTITIES = [b'{"model":"strata","preset":"o6m"}', b'{"model":"strata","preset":"zz9"}', b'{"model":"strata"}',
              b'{"model":"strata","preset":["o6m"]}', b'{"model":5}', b"[]", b'"strata"', b"{}", b"\xff\xfe{}",
              b'{"model":"strata","params":{"max_order":99,"hash_log2":18,"discount":[[13,18,24]],"match_min":6}}',
              b'{"model":"strata","params":{"max_order":6,"hash_log2":1e400,"discount":[],"match_min":6}}',
              b'{"model":"strata","params":{"max_order":true,"hash_log2":18,"discount":[[1,1,1]],"match_min":0}}',
              b'{"model":"weft","sha256":"' + b"0" * 64 + b'"}', b'{"model":"nonesuch","preset":"x"}',
              b'{"model":"strata","preset":"o6m","x":' + b"[" * 5000 + b"]" * 5000 + b"}",
              b'{"model":"strata","preset":"o6m","n":' + b"9" * 5000 + b"}", b'{"model":"strata","preset":NaN}']
BIG = [0, 1, 2, 3, 127, 128, 255, 256, 4095, 4096, 65535, 65536, 1 << 20, (1 << 26) - 1, 1 << 26, (1 << 26) + 1,
       1 << 28, (1 << 28) + 1, 1 << 31, 1 << 32, 1 << 40, 1 << 50, (1 << 50) + 1, (1 << 56) - 1]


def crafted_archive(rng):
    """An archive built field by field, checksums valid. Returns (blob, truth, must_fail):
    truth is the content (bytes) or member bytes (list) a successful decode must give."""
    ident = rng.choice([IDENTITIES[0]] * 6 + IDENTITIES)
    must_fail = ident != IDENTITIES[0]
    multi = rng.random() < 0.6
    frame_size = rng.choice([1, 2, 7, 64, 512, 4096, 1 << 20, 1 << 26] + ([0, (1 << 26) + 1] if rng.random() < 0.1 else []))
    if not 1 <= frame_size <= C.MAX_FRAME_RAW:
        must_fail = True
    pieces, members, truth = [], None, None
    if multi:
        members, truth = [], []
        tiny = frame_size < 64  # many one-byte frames: keep the members small
        for _ in range(rng.choice([0, 1, 2, 3, 5] if tiny else [0, 1, 2, 3, 5, 40])):
            path = rng.choice(NASTY_PATHS + [f"d{rng.randrange(4)}/f{rng.randrange(100)}.txt"] * 8)
            mode = rng.choice(NASTY_MODES + [0o100644] * 10 + [0o040755] * 3)
            is_dir = mode & 0o170000 == 0o040000
            data = b"" if is_dir else _rand_bytes(rng, rng.choice([0, 1, 5, 100] if tiny else [0, 1, 5, 100, 700]))
            sha = C.sha256(data)
            if rng.random() < 0.05:
                sha, must_fail = _rand_bytes(rng, 32), True
            size = len(data)
            if rng.random() < 0.05:
                size, must_fail = rng.choice(BIG), True
            members.append(C.Member(path, mode, size, sha, rng.choice([0, 1, -1, 1 << 62, -(1 << 63), 10 ** 18])))
            if not is_dir:
                pieces.append(data)
                truth.append(data)
            if mode & 0o170000 not in (0o100000, 0o040000) or (is_dir and size):
                must_fail = True
        paths = [m.path for m in members]
        for p in paths:  # the reader's path rules, so must_fail is known exactly
            parts = p.split("/")
            if (p.startswith("/") or any(x in ("", ".", "..") for x in parts) or "\x00" in p
                    or len(p.encode()) > C.MAX_PATH or paths.count(p) > 1):
                must_fail = True
        files = {m.path for m in members if not m.is_dir}
        for p in paths:
            parts = p.split("/")
            if any("/".join(parts[:k]) in files for k in range(1, len(parts))):
                must_fail = True
    else:
        data = _rand_bytes(rng, rng.choice([0, 1, 10, 300] if frame_size < 64 else [0, 1, 10, 300, 2000]))
        pieces, truth = [data], data
    content = b"".join(pieces)
    content_size = len(content) if rng.random() > 0.1 else rng.choice(BIG)
    if content_size != len(content):
        must_fail = True
    sha = C.sha256(content) if rng.random() > 0.05 else _rand_bytes(rng, 32)
    if sha != C.sha256(content):
        must_fail = True
    records = []
    for piece in pieces:
        fs = max(frame_size, 1)
        for off in range(0, len(piece), fs):
            raw = piece[off:off + fs]
            roll = rng.random()
            if roll < 0.85:
                records.append(C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw)))
                continue
            must_fail = True
            if roll < 0.90:  # a wrong raw CRC
                records.append(C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw) ^ 1))
            elif roll < 0.93:  # modelled, junk coded words (small, so decoding stays quick)
                records.append(C.frame_record(len(raw), _rand_bytes(rng, 4 * rng.randrange(5)),
                                              rng.choice([1, 2]), rng.choice([1, 2, 4096]), C.crc32c(raw)))
            else:  # odd record fields, the record CRC valid
                head = (C.uvarint(rng.choice([len(raw)] + BIG)) + C.uvarint(rng.choice([len(raw)] + BIG))
                        + bytes([rng.choice([0, 1, 2, 3, 255])]) + C.uvarint(rng.choice([0, 1, 2, 4096, 4097] + BIG))
                        + struct.pack("<II", C.crc32c(raw), C.crc32c(raw)))
                records.append(head + struct.pack("<I", C.crc32c(head)) + raw)
    n_frames = len(records) if rng.random() > 0.1 else rng.choice(BIG)
    if n_frames != len(records):
        must_fail = True
    table = C.encode_members(members) if members is not None else b""
    if multi and rng.random() < 0.1:  # a member count or path length that lies
        t = bytearray(table)
        if rng.random() < 0.5:
            struct.pack_into("<I", t, 0, rng.choice([0xFFFFFFFF, len(members) + 1, 1 << 20]))
        elif len(t) > 6:
            struct.pack_into("<H", t, 4, rng.choice([0, 4097, 0xFFFF]))
        must_fail |= bytes(t) != table
        table = bytes(t)
    flags = C.FLAG_MEMBERS if multi else 0
    if rng.random() < 0.05:
        new = rng.getrandbits(8)
        flags, must_fail = new, must_fail or new != flags
    ilen, tlen = len(ident), len(table)
    if rng.random() < 0.08:
        ilen, tlen = rng.choice([ilen] + BIG), rng.choice([tlen] + BIG)
        must_fail |= (ilen, tlen) != (len(ident), len(table))
    head = (C.MAGIC + bytes([1, flags]) + C.uvarint(content_size) + sha + C.uvarint(n_frames)
            + C.uvarint(frame_size) + C.uvarint(ilen) + C.uvarint(tlen))
    blob = head + struct.pack("<I", C.crc32c(head + ident + table)) + ident + table + b"".join(records)
    return blob, truth, must_fail


def crafted_model(rng):
    """A model file built field by field, its SHA-256 trailer valid (mostly)."""
    arch = rng.choice([{"name": "strata", "params": Strata(max_order=3, hash_log2=12).params},
                       {"name": "strata", "params": {"max_order": 6.0, "hash_log2": True}}, {"name": 5}, [],
                       {"name": "weft", "params": {"window": 10 ** 12, "embed": 0, "hidden": 1, "m1": 1, "s1": 1,
                                                   "mo": 1, "so": 1}},
                       {"name": "weft", "params": {"window": "8"}}, {"name": "nonesuch"}, None])
    shape = rng.choice([[2, 3], [1 << 40], [-1], [0, 10 ** 30], [1.5], ["3"], [True], [[1]], None, 7, [1] * 40,
                        [2 ** 31, 2 ** 31], [0], [], [3] * 8, [1] * 9])
    dtype = rng.choice(["u1", "i2", "i8", "f4", "O", "<u1", "V8", None, ["u1"], 5, "u1 "])
    arrays = rng.choice([[{"name": "w", "dtype": dtype, "shape": shape}],
                         [{"name": "w", "dtype": "u1", "shape": [2]}, {"name": "w", "dtype": "u1", "shape": [2]}],
                         [{"name": 5, "dtype": "u1", "shape": [1]}], "w", [5], [{}], None, []])
    meta = {"architecture": arch, "arrays": arrays, "notes": "x"}
    if rng.random() < 0.1:
        meta = rng.choice([[], "s", 5, None])
    text = json.dumps(meta).encode()
    if rng.random() < 0.1:
        text = rng.choice([b"[" * 100000 + b"]" * 100000, b"\xff\xfe", b'{"architecture":' + b"9" * 5000 + b"}",
                           b'{"architecture":{"name":"strata"},"arrays":[],"x":NaN}'])
    body = _rand_bytes(rng, rng.choice([0, 1, 6, 24, 48]))
    mlen = len(text) if rng.random() > 0.1 else rng.choice([0, 1 << 20, (1 << 20) + 1, 0xFFFFFFFF, len(text) + 1])
    head = modelfile.MAGIC + struct.pack("<HHI", rng.choice([1] * 9 + [0, 2, 0xFFFF]), 0, mlen)
    blob = head + text + body
    blob += hashlib.sha256(blob).digest() if rng.random() > 0.05 else _rand_bytes(rng, 32)
    return blob


def mutate(rng, seed: Seed, seeds: list) -> tuple[str, bytes, bool]:
    """(operator, input, resealed)."""
    b = seed.blob
    roll = rng.random()
    if roll < 0.55:
        op, out = plain_mutation(rng, b)
        return op, out, False
    if roll < 0.60:
        kind = rng.choice(["random", "random-magic", "zeros"])
        n = rng.randrange(2 * len(b) + 2)
        out = {"random": lambda: _rand_bytes(rng, n),
               "random-magic": lambda: (C.MAGIC if seed.kind == "archive" else modelfile.MAGIC) + _rand_bytes(rng, n),
               "zeros": lambda: bytes(n)}[kind]()
        return kind, out, False
    if roll < 0.65:
        other = rng.choice([s for s in seeds if s.kind == seed.kind])
        i, j = rng.randrange(len(b) + 1), rng.randrange(len(other.blob) + 1)
        return "splice", b[:i] + other.blob[j:], False
    if roll < 0.68:  # the whole file's bytes zeroed in one region
        i = rng.randrange(len(b) + 1)
        j = rng.randrange(i, len(b) + 1)
        return "zero-fill", b[:i] + bytes(j - i) + b[j:], False
    # resealed: a region changed, checksums recomputed
    if seed.kind == "model":
        mlen = struct.unpack_from("<I", b, 12)[0]
        region = rng.choice([(8, 16), (16, 16 + mlen), (16 + mlen, len(b) - 32)])
        op, out = plain_mutation(rng, b[:-32], *region)
        if rng.random() < 0.3:  # a JSON-aware change inside the metadata
            out = _json_tweak(rng, b[:-32])
        return "resealed-" + op, reseal_model(out + b"\0" * 32), True
    h = header_regions(b)
    crc_at, ident, table, first = h
    recs = record_regions(b, first)
    choices = [("header", (4, crc_at)), ("identity", ident)]
    if table[1] > table[0]:
        choices += [("table", table)] * 3
    for r in recs:
        choices += [("record-head", (r[0], r[3] + 4)), ("payload", (r[1], r[2]))]
    name, region = rng.choice(choices)
    if name == "table" and rng.random() < 0.5:
        out = _table_tweak(rng, b, table)
    else:
        _, out = plain_mutation(rng, b, *region)
    return "resealed-" + name, reseal_archive(out), True


def _json_tweak(rng, b: bytes) -> bytes:
    mlen = struct.unpack_from("<I", b, 12)[0]
    try:
        meta = json.loads(b[16:16 + mlen])
    except ValueError:
        return b
    arch = meta.get("architecture") if isinstance(meta, dict) else None
    if isinstance(arch, dict) and isinstance(arch.get("params"), dict) and arch["params"] and rng.random() < 0.5:
        key = rng.choice(sorted(arch["params"]))
        arch["params"][key] = rng.choice([0, -1, 1, 2, 10 ** 12, 1.5, "8", True, None, [], 1 << 31, 40, 41])
    elif isinstance(meta, dict) and meta.get("arrays"):
        a = rng.choice(meta["arrays"])
        key = rng.choice(["shape", "dtype", "name"])
        a[key] = rng.choice([[1 << 40], [-2], [0, 10 ** 20], "i8", "f8", None, [3.0], "x", [1] * 33])
    elif isinstance(meta, dict):
        meta["arrays"] = rng.choice([[{"name": "x", "dtype": "u1", "shape": [1 << 30]}], None, "bad"])
    text = json.dumps(meta).encode()
    return b[:12] + struct.pack("<I", len(text)) + text + b[16 + mlen:]


def _table_tweak(rng, b: bytes, table) -> bytes:
    """Change one member field: mode, size, mtime, path bytes or the count."""
    t = bytearray(b[table[0]:table[1]])
    count = struct.unpack_from("<I", t, 0)[0]
    pos, fields = 4, []
    for _ in range(count):
        if pos + 2 > len(t):
            break
        plen = struct.unpack_from("<H", t, pos)[0]
        fields.append((pos, plen))
        pos += 2 + plen + 52
    what = rng.choice(["mode", "size", "mtime", "path", "count"])
    if what == "count" or not fields:
        struct.pack_into("<I", t, 0, rng.choice([0, count + 1, max(count - 1, 0), 0xFFFFFFFF]))
    else:
        p, plen = rng.choice(fields)
        at = p + 2 + plen
        if what == "mode":
            struct.pack_into("<I", t, at, rng.choice(NASTY_MODES))
        elif what == "size":
            struct.pack_into("<Q", t, at + 4, rng.choice(BIG[:20] + [(1 << 64) - 1]))
        elif what == "mtime":
            struct.pack_into("<q", t, at + 40, rng.choice([0, -1, 1 << 62, -(1 << 63)]))
        elif plen:
            t[p + 2 + rng.randrange(plen)] = rng.choice(b"/.\x00\\\xff" + b"ab")
    return b[:table[0]] + bytes(t) + b[table[1]:]


# -- checks --------------------------------------------------------------------------------------
class Tally:
    def __init__(self):
        self.n = self.archives = self.models = self.resealed = self.crafted = 0
        self.refused = self.accepted = self.accepted_meta = 0
        self.crashes, self.hangs, self.wrong, self.disagree = [], [], [], []
        self.salvage_runs = self.salvage_writes = 0
        self.worst = (0.0, None)
        self.total_s = 0.0
        self.by_op = {}

    def problem(self, bucket, i, op, seed, detail, blob, out_dir):
        key = detail.splitlines()[-1][:200] if detail else ""
        entry = {"input": i, "operator": op, "seed": seed, "detail": detail[-2000:]}
        if out_dir and not any(e.get("key") == key for e in bucket):
            os.makedirs(out_dir, exist_ok=True)
            p = os.path.join(out_dir, f"{len(bucket):03d}-input-{i}.bin")
            with open(p, "wb") as f:
                f.write(blob)
            entry["saved"] = p
        entry["key"] = key
        bucket.append(entry)


class Wrong(Exception):
    pass


def _members_of(d) -> list:
    """The file members' bytes in table order, empty ones left out (whether an empty member
    is a file or a folder is metadata: a resealed table may change it)."""
    return [b for b in (b"".join(d.frames[first:first + n]) for m, first, n in d.member_ranges() if not m.is_dir) if b]


def check_archive(blob, seed: Seed, resealed: bool, truth, must_fail: bool, do_salvage: bool, write_dir=None):
    """Feed one archive to every reader. Returns "accepted", "accepted-meta" or "refused";
    raises Wrong for a wrong output or a verify/decode disagreement."""
    model = seed.model if seed is not None else None
    try:
        api.info(blob)
    except LcodecError:
        pass
    try:
        rep = api.verify(blob, model)
        v_ok = rep.ok
    except LcodecError:
        v_ok = False
    try:
        d = api.decode(blob, model)
        ok = True
    except LcodecError:
        ok = False
    if ok != v_ok:
        raise Wrong(f"disagree: verify ok={v_ok} but decode ok={ok}")
    outcome = "refused"
    if ok:
        outcome = "accepted"
        if must_fail:
            raise Wrong("wrong output: an archive built to be refused was accepted")
        got_members = _members_of(d) if d.container.members is not None else None
        got_content = b"".join(d.frames)
        if seed is not None:
            if seed.members is not None:
                if got_members != seed.file_members():
                    raise Wrong("wrong output: decoded member bytes differ from the seed's")
                if blob != seed.blob:
                    if not resealed:
                        raise Wrong("wrong output: a damaged archive (not resealed) was accepted")
                    outcome = "accepted-meta"
            else:
                if got_members is not None or got_content != seed.content:
                    raise Wrong("wrong output: decoded content differs from the seed's")
                if blob != seed.blob and not resealed:
                    raise Wrong("wrong output: a damaged archive (not resealed) was accepted")
                if blob != seed.blob:
                    outcome = "accepted-meta"
        else:
            want = [b for b in truth if b] if isinstance(truth, list) else truth
            got = got_members if isinstance(want, list) else got_content
            if got != want:
                raise Wrong("wrong output: decoded bytes differ from what the archive was built from")
    if do_salvage:
        check_salvage(blob, seed, truth, model, write_dir)
    return outcome


class Originals:
    """What any seed holds: an input spliced from two seeds may legitimately give back the
    other seed's members, so salvage's results are checked against every seed."""

    def __init__(self, seeds):
        self.by_path = {}
        self.member_data, self.contents, self.frame_data, self.layouts = set(), set(), set(), {}
        self.joined = set()
        for sd in seeds:
            if sd.members is not None:
                for p, d in sd.members:
                    if d is not None:
                        self.by_path.setdefault(p, set()).add(d)
                        self.member_data.add(d)
            else:
                self.contents.add(sd.content)
            self.joined.add(sd.whole)
            self.frame_data |= sd.frame_data
            self.layouts.setdefault(sd.layout_key, []).append(sd.whole)


ORIGINALS = None
COPIED = []  # good frames that are copies of other frames (splices), taken for the frame they replace


def check_salvage(blob, seed, truth, model, write_dir):
    try:
        res = S.salvage(blob, model)
    except LcodecError:
        return
    o = ORIGINALS
    crafted = seed is None
    if res.members is not None:
        for r in res.members:
            if r.status != "recovered" or r.is_dir:
                continue
            if crafted:
                if not isinstance(truth, list) or r.data not in truth:
                    raise Wrong(f"salvage wrong output: member {r.path!r} recovered with bytes it was not built from")
            elif r.path in o.by_path and res.names_checked and r.data not in o.by_path[r.path]:
                raise Wrong(f"salvage wrong output: member {r.path!r} recovered with other bytes")
            elif r.data not in o.member_data:
                raise Wrong(f"salvage wrong output: member {r.path!r} recovered with bytes of no original")
    if res.content is not None:
        whole = b"".join(truth) if isinstance(truth, list) else truth  # a damaged flag may make members one content
        ok = (res.content == whole) if crafted else (res.content in o.contents or res.content in o.joined)
        if not ok:
            raise Wrong("salvage wrong output: content proven by SHA-256 differs from the original")
    if not crafted and res.layout is not None:
        lay = res.layout
        key = (lay.fs, tuple(lay.raw_len(i) for i in range(lay.n))) if lay.n <= 4096 else None
        for i, f in res.frames.items():
            if f.status == "good" and key in o.layouts:
                a, b = lay.content_range(i)
                if not any(f.data == whole[a:b] for whole in o.layouts[key]):
                    if f.data not in o.frame_data:
                        raise Wrong(f"salvage misplaced good frame: frame {i} ({f.placed_by})")
                    COPIED.append(i)  # a copy of another frame, taken for this one: see the docstring
    if not crafted:
        for f in res.pieces:
            if f.status == "good" and f.data not in o.frame_data:
                raise Wrong("salvage wrong output: a good piece that is no frame of any seed")
    if write_dir is not None:
        out = os.path.join(write_dir, "out")
        try:
            res2 = S.salvage_to(blob, out, model, keep_damaged=True)
        except LcodecError:
            res2 = None
        left = [n for n in os.listdir(write_dir) if n not in ("out", "out" + S.DAMAGED_SUFFIX, "out.salvage.json")]
        if left:
            raise Wrong(f"salvage left files behind: {left}")
        if res2 is not None and res2.members is not None and os.path.isdir(out):
            for r in res2.members:
                if r.status == "recovered" and not r.is_dir:
                    with open(os.path.join(out, *r.path.split("/")), "rb") as fh:
                        if fh.read() != r.data:
                            raise Wrong(f"salvage wrote other bytes than it recovered: {r.path}")
        elif res2 is not None and res2.content is not None:
            with open(out, "rb") as fh:
                if fh.read() != res2.content:
                    raise Wrong("salvage wrote other bytes than it recovered")
        for n in os.listdir(write_dir):
            p = os.path.join(write_dir, n)
            shutil.rmtree(p) if os.path.isdir(p) else os.unlink(p)


def check_model(blob, seed: Seed, resealed: bool, scratch: str):
    try:
        meta, arrays, sha = modelfile.parse(blob)
    except LcodecError:
        return "refused"
    if seed is not None and blob != seed.blob and not resealed:
        raise Wrong("wrong output: a damaged model file (not resealed) was accepted")
    with open(scratch, "wb") as f:
        f.write(blob)
    try:
        m = load_model(scratch)
    except LcodecError:
        return "refused"
    # A model file that loads, changed or not, must still code exactly.
    sample = b"VK-7 02:00 wind 4.1 m/s\nVK-9 02:00 wind 3.9 m/s\n"
    if api.unpack(api.pack(sample, model=m), model=m) != sample:
        raise Wrong("wrong output: a model file that loads does not round-trip")
    return "accepted" if seed is None or blob == seed.blob else "accepted-meta"


# -- the loop ----------------------------------------------------------------------------------
def _cache_decoding(enabled: bool):
    """Reuse the result of a frame decoded before when its head and coded bytes are the same.
    Returns the function to put back when the run ends."""
    real = _read.decode_record
    if not enabled or getattr(real, "_fuzz_cached", False):
        return real
    cache = {}

    def cached(model, fr, threads=1):  # threads: a lone image's bands; the output is the same
        key = (repr(getattr(model, "identity", None)), fr.method, fr.lanes, fr.raw_len, fr.raw_crc, fr.coded_crc,
               bytes(fr.payload))
        hit = cache.get(key)
        if hit is not None:
            return hit
        raw = real(model, fr, threads)
        if len(cache) > 20000:
            cache.clear()
        cache[key] = raw
        return raw

    cached._fuzz_cached = True
    _use_decoder(cached)
    return real


def _use_decoder(fn) -> None:
    """Every module that decodes a frame of a read container calls it by this name."""
    _read.decode_record = fn
    S.decode_record = fn


def _cap_memory(headroom_gib: float):
    """Cap the address space at what is mapped now plus headroom (Linux)."""
    try:
        with open("/proc/self/status") as f:
            vm = next(int(line.split()[1]) * 1024 for line in f if line.startswith("VmSize:"))
        cap = vm + int(headroom_gib * (1 << 30))
        soft, hard = resource.getrlimit(resource.RLIMIT_AS)
        if hard == resource.RLIM_INFINITY or cap <= hard:
            resource.setrlimit(resource.RLIMIT_AS, (cap, hard))
            return cap
    except (OSError, ValueError, StopIteration):
        pass
    return None


def one_input(i: int, rng_seed: int, seeds, models, crafted_share=0.12, model_share=0.15):
    """Input number i of a run: (kind, operator, seed or None, blob, resealed, truth, must_fail)."""
    rng = random.Random(rng_seed * 1_000_003 + i)
    roll = rng.random()
    if roll < model_share * 0.2:
        return "model", "crafted", None, crafted_model(rng), True, None, False
    if roll < model_share:
        sd = rng.choice(models)
        op, blob, resealed = mutate(rng, sd, models)
        return "model", op, sd, blob, resealed, None, False
    if roll < model_share + crafted_share:
        blob, truth, must_fail = crafted_archive(rng)
        return "archive", "crafted", None, blob, True, truth, must_fail
    sd = rng.choice(seeds)
    op, blob, resealed = mutate(rng, sd, seeds)
    if any(blob == s.blob for s in seeds):  # changed nothing (or made another seed): change one byte
        op, blob = "flip", bytes([blob[0] ^ 1]) + blob[1:] if blob else b"\x00"
    return "archive", op, sd, blob, resealed, None, False


def run(n: int = 100_000, rng_seed: int = 1, budget: float = 10.0, salvage_every: int = 2, out_dir: str | None = None,
        cache: bool = True, mem_headroom: float = 4.0, progress=None, replay: int | None = None) -> dict:
    real_decode_frame = _cache_decoding(cache)
    work = tempfile.mkdtemp(prefix="lcodec-fuzz-")
    t_setup = time.perf_counter()
    try:
        seeds, models = make_seeds(work)
        global ORIGINALS
        ORIGINALS = Originals(seeds)
        COPIED.clear()
        for sd in seeds:  # warm every decoding path once (numba compiles here, not in an input's time)
            S.salvage(sd.blob, sd.model)
        rss_setup = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        limits_before = resource.getrlimit(resource.RLIMIT_AS)
        cap = _cap_memory(mem_headroom) if replay is None and mem_headroom else None
        setup_s = time.perf_counter() - t_setup
        scratch_model = os.path.join(work, "fuzz-input.lcm")
        write_dir = os.path.join(work, "salvage-out")
        os.makedirs(write_dir)
        t = Tally()
        t_all = time.perf_counter()
        old = signal.signal(signal.SIGALRM, lambda *a: (_ for _ in ()).throw(Hang()))
        indices = [replay] if replay is not None else range(n)
        try:
            for i in indices:
                kind, op, sd, blob, resealed, truth, must_fail = one_input(i, rng_seed, seeds, models)
                t.n += 1
                t.archives += kind == "archive"
                t.models += kind == "model"
                t.resealed += resealed and op != "crafted"
                t.crafted += op == "crafted"
                t.by_op[op] = t.by_op.get(op, 0) + 1
                seed_name = sd.name if sd else "crafted"
                do_salvage = kind == "archive" and (i % salvage_every == 0)
                wd = write_dir if (do_salvage and i % 100 == 0) else None
                t0 = time.perf_counter()
                signal.setitimer(signal.ITIMER_REAL, budget)
                try:
                    if kind == "archive":
                        outcome = check_archive(blob, sd, resealed, truth, must_fail, do_salvage, wd)
                        t.salvage_runs += do_salvage
                        t.salvage_writes += wd is not None
                    else:
                        outcome = check_model(blob, sd, resealed, scratch_model)
                    t.refused += outcome == "refused"
                    t.accepted += outcome == "accepted"
                    t.accepted_meta += outcome == "accepted-meta"
                except Hang:
                    t.problem(t.hangs, i, op, seed_name, f"ran past the budget of {budget} s", blob, out_dir)
                except Wrong as e:
                    bucket = t.disagree if str(e).startswith("disagree") else t.wrong
                    t.problem(bucket, i, op, seed_name, str(e), blob, out_dir)
                except LcodecError:
                    t.refused += 1
                except BaseException as e:  # noqa: B902 - a crash is anything else
                    if isinstance(e, KeyboardInterrupt) and not isinstance(e, Hang):
                        raise
                    if replay is not None:
                        traceback.print_exc()
                    t.problem(t.crashes, i, op, seed_name, traceback.format_exc(), blob, out_dir)
                finally:
                    signal.setitimer(signal.ITIMER_REAL, 0)
                dt = time.perf_counter() - t0
                t.total_s += dt
                if dt > t.worst[0]:
                    t.worst = (dt, {"input": i, "seed": seed_name, "operator": op})
                if progress and t.n % 5000 == 0:
                    progress(t)
        finally:
            signal.signal(signal.SIGALRM, old)
            resource.setrlimit(resource.RLIMIT_AS, limits_before)
        wall = time.perf_counter() - t_all
        rss_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    finally:
        _use_decoder(real_decode_frame)
        shutil.rmtree(work, ignore_errors=True)
    return {
        "inputs": t.n, "seed": rng_seed, "archives": t.archives, "model_files": t.models,
        "resealed": t.resealed, "crafted": t.crafted,
        "refused": t.refused, "accepted": t.accepted, "accepted_metadata_changed": t.accepted_meta,
        "crashes": len(t.crashes), "hangs": len(t.hangs), "wrong_outputs": len(t.wrong),
        "verify_decode_disagreements": len(t.disagree),
        "salvage_runs": t.salvage_runs, "salvage_writes": t.salvage_writes,
        "salvage_copied_records_placed": len(COPIED),
        "worst_time_per_input_s": round(t.worst[0], 4), "worst_input": t.worst[1],
        "mean_time_per_input_ms": round(1000 * t.total_s / max(t.n, 1), 3),
        "budget_s": budget, "wall_s": round(wall, 1), "setup_s": round(setup_s, 1),
        "peak_rss_mib": round(rss_peak / 1024, 1), "rss_after_setup_mib": round(rss_setup / 1024, 1),
        "address_space_cap_mib": round(cap / (1 << 20)) if cap else None,
        "decode_cache": cache,
        "by_operator": dict(sorted(t.by_op.items())),
        "crash_list": t.crashes[:50], "hang_list": t.hangs[:50], "wrong_list": t.wrong[:50],
        "disagree_list": t.disagree[:50],
    }


def format_summary(s: dict) -> str:
    lines = [
        f"lcodec fuzz: {s['inputs']:,} inputs (seed {s['seed']}) in {s['wall_s']} s "
        f"(+ {s['setup_s']} s setup), mean {s['mean_time_per_input_ms']} ms per input",
        f"  archives {s['archives']:,}, model files {s['model_files']:,}; resealed {s['resealed']:,}, "
        f"crafted {s['crafted']:,}",
        f"  refused {s['refused']:,}; accepted {s['accepted']:,} (+ {s['accepted_metadata_changed']:,} resealed "
        f"with content intact, metadata changed)",
        f"  crashes {s['crashes']}, hangs {s['hangs']} (budget {s['budget_s']} s), wrong outputs "
        f"{s['wrong_outputs']}, verify/decode disagreements {s['verify_decode_disagreements']}",
        f"  salvage runs {s['salvage_runs']:,} (outputs written and checked {s['salvage_writes']:,}); copied "
        f"records taken for a missing frame {s['salvage_copied_records_placed']}",
        f"  worst time per input {s['worst_time_per_input_s']} s ({s['worst_input']})",
        f"  peak RSS {s['peak_rss_mib']} MiB (after setup {s['rss_after_setup_mib']} MiB; address space capped at "
        f"{s['address_space_cap_mib']} MiB)",
        "  operators: " + ", ".join(f"{k} {v}" for k, v in s["by_operator"].items()),
    ]
    for name in ("crash_list", "hang_list", "wrong_list", "disagree_list"):
        for e in s[name][:10]:
            lines.append(f"  {name.split('_')[0].upper()} #{e['input']} ({e['seed']}, {e['operator']}): {e['key']}"
                         + (f" [saved {e['saved']}]" if e.get("saved") else ""))
    return "\n".join(lines)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter,
                                 epilog="Example:\n  python scripts/fuzz.py -n 100000 --json fuzz.json")
    ap.add_argument("-n", type=int, default=100_000, help="inputs to generate (default 100,000)")
    ap.add_argument("--seed", type=int, default=1, help="random seed of the run (default 1)")
    ap.add_argument("--budget", type=float, default=10.0, help="seconds one input may take before it is a hang")
    ap.add_argument("--salvage-every", type=int, default=2, help="run salvage on every Nth archive input")
    ap.add_argument("--out", default="fuzz-out", help="folder for inputs that crash, hang or decode wrongly")
    ap.add_argument("--json", default=None, help="also write the summary as JSON to this file")
    ap.add_argument("--no-cache", action="store_true", help="decode every frame, even ones decoded before")
    ap.add_argument("--mem-headroom", type=float, default=4.0, help="GiB of address space beyond setup")
    ap.add_argument("--replay", type=int, default=None, help="run only input number N (shows its traceback)")
    a = ap.parse_args(argv)

    def progress(t):
        print(f"  ... {t.n:,} inputs, crashes {len(t.crashes)}, hangs {len(t.hangs)}, wrong {len(t.wrong)}",
              file=sys.stderr, flush=True)

    s = run(a.n, a.seed, a.budget, a.salvage_every, a.out, not a.no_cache, a.mem_headroom, progress, a.replay)
    print(format_summary(s))
    if a.json:
        with open(a.json, "w") as f:
            json.dump(s, f, indent=2)
    return 1 if s["crashes"] or s["hangs"] or s["wrong_outputs"] or s["verify_decode_disagreements"] else 0


if __name__ == "__main__":
    sys.exit(main())
