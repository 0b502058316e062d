#!/usr/bin/env python3
"""Coverage-guided fuzzing of lcodec's parsers with atheris (libFuzzer for Python).

    python fuzz/harness.py TARGET [libFuzzer flags...]      e.g. -runs=1000000 -max_total_time=600
    python fuzz/harness.py --list
    python fuzz/harness.py --seeds TARGET FOLDER            the seed inputs, written to FOLDER

Targets (each parses untrusted bytes; the seed corpus is made from the golden vectors in
tests/golden/, see seeds()):

    container    format/container.py read_container, then (small archives) decoding with
                 the model the archive names when it is built in
    salvage      archive/salvage.py salvage: the scanner and placement, with decoding
    salvage-scan the same salvage, scanner, placement and member reassembly, with the
                 decoding of each found frame replaced (see t_salvage_scan): fast enough for
                 1,000,000 executions in about an hour of one core; the decoding of found
                 frames is the `container` target's (and the full `salvage` target's)
    modelfile    format/modelfile.py parse, then the architecture's from_params
    images       inputs/images.py analyse (PGM/PPM, PNG, TIFF, NPY, DICOM) and the pixel
                 record reader on what it returns
    descriptor   inputs/layout.py read_descriptor (image frame payload descriptors)

The first input byte is a switch: when its low bit is set, the harness reseals the rest
(header CRC-32C, archive identity and record CRC-32Cs; a model file's SHA-256 trailer)
so that mutations reach the code behind the checksums. Every target accepts only lcodec's
own refusals (DataError, ModelError, UsageError, or None from `analyse`); any other
exception is a crash, and libFuzzer's -timeout and -rss_limit_mb flags make a hang or a
huge allocation one too. Crashes are written as crash-* files (libFuzzer's -artifact_prefix
chooses where); a minimised one becomes a regression test in tests/test_fuzz_regressions.py.
"""
from __future__ import annotations

import contextlib
import json
import logging
import os
import struct
import sys
import warnings

import atheris

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

# The parsers are instrumented; the models and the coder (numba kernels, which cannot be
# compiled from instrumented bytecode, and not parsers) are not.
UNINSTRUMENTED = ["lcodec.models", "lcodec.models.strata", "lcodec.models.weft", "lcodec.models.braid",
                  "lcodec.models.braid_fork", "lcodec.models.braid_layers", "lcodec.models.recall",
                  "lcodec.models.kernel_cache", "lcodec.models.tessel", "lcodec.coding", "lcodec.coding.coder",
                  "lcodec.inputs.pngfilter"]
with atheris.instrument_imports(include=["lcodec"], exclude=UNINSTRUMENTED):
    from lcodec.archive import salvage as S
    from lcodec.archive.read import decode_stream, Sink
    from lcodec.errors import DataError, LcodecError, ModelError, UsageError
    from lcodec.format import container as C
    from lcodec.format import modelfile
    from lcodec.inputs import images as I
    from lcodec.inputs.layout import read_descriptor
    from lcodec.models import ARCHITECTURES, BUILTIN

REFUSALS = (DataError, ModelError, UsageError)
logging.disable(logging.CRITICAL)  # tifffile and pydicom log what they refuse: noise here
warnings.filterwarnings("ignore")
MAX_DECODE = 1 << 14  # content bytes decoded per input (decoding is the slow part)


# -- resealing: checksums fixed so that mutations reach what lies behind them ----------------
def _varint_end(b, pos):
    for i in range(8):
        if pos + i >= len(b):
            return None
        if not b[pos + i] & 0x80:
            return pos + i + 1
    return None


def reseal_archive(blob: bytes) -> bytes:
    """Header CRC-32C recomputed; for version 3 every record given the archive identity of
    that header; every record's coded-bytes and record CRC-32C recomputed."""
    b = bytearray(blob)
    if len(b) < 6:
        return bytes(b)
    p = _varint_end(b, 6)
    if p is None or p + 32 > len(b):
        return bytes(b)
    p += 32
    vals = []
    for _ in range(4):
        q = _varint_end(b, p)
        if q is None:
            return bytes(b)
        vals.append(C.read_uvarint(memoryview(bytes(b[p:q])), 0, "")[0])
        p = q
    ilen, tlen = vals[2], vals[3]
    end = p + 4 + ilen + tlen
    if end > len(b):
        return bytes(b)
    struct.pack_into("<I", b, p, C.crc32c(bytes(b[:p]) + bytes(b[p + 4:end])))
    v3 = b[4] == C.VERSION_BOUND
    aid = C.archive_id(bytes(b[:p]) + bytes(b[p + 4:end])) if v3 else None
    pos = end
    for _ in range(4096):
        start = pos
        if v3:
            if pos + 8 > len(b):
                break
            b[pos:pos + 8] = aid
            pos = _varint_end(b, pos + 8)
            if pos is None:
                break
        q = _varint_end(b, pos)
        if q is None:
            break
        q2 = _varint_end(b, q)
        if q2 is None:
            break
        coded = C.read_uvarint(memoryview(bytes(b[q:q2])), 0, "")[0]
        q3 = _varint_end(b, q2 + 1)
        if q3 is None or q3 + 12 > len(b):
            break
        pay = q3 + 12
        struct.pack_into("<I", b, q3 + 4, C.crc32c(bytes(b[pay:min(pay + coded, len(b))])))
        struct.pack_into("<I", b, q3 + 8, C.crc32c(bytes(b[start:q3 + 8])))
        pos = pay + coded
        if pos >= len(b):
            break
    return bytes(b)


def reseal_model(blob: bytes) -> bytes:
    import hashlib

    return blob if len(blob) < 32 else blob[:-32] + hashlib.sha256(blob[:-32]).digest()


def _split(data: bytes, reseal) -> bytes:
    if not data:
        return b""
    return reseal(data[1:]) if data[0] & 1 else data[1:]


# -- targets ----------------------------------------------------------------------------------
class _Drop(Sink):
    pass


def t_container(data: bytes) -> None:
    blob = _split(data, reseal_archive)
    try:
        cont = C.read_container(blob)
    except REFUSALS:
        return
    ident = cont.identity
    if cont.content_size > MAX_DECODE or ident.get("model") not in BUILTIN or "sha256" in ident:
        return
    try:
        decode_stream(blob, _Drop(), keep_going=True, ceiling=MAX_DECODE)
    except REFUSALS:
        return


def t_salvage(data: bytes) -> None:
    blob = _split(data, reseal_archive)
    hints = S.read_header_hints(memoryview(blob))
    if hints is not None and hints.content_size > MAX_DECODE:
        return  # salvage does no bounded ceiling of its own: large claims are the unpack target's
    try:
        res = S.salvage(blob, ceiling=MAX_DECODE)  # frames found by scanning claim lengths of their own
        res.report()
    except REFUSALS:
        return


# The salvage-scan target: salvage() as it is, except that the frame decoder it calls
# (salvage.decode_record) is replaced by _scan_decode. Decoding a found frame costs about
# 3.5 ms of uninstrumented numba (strata) against about 0.5 ms for the rest of salvage on
# a seed, and under libFuzzer it held the full target to 22-26 executions/s
# (docs/notes/2026-12-05-hardening.md). _scan_decode:
#   * makes every check that precedes decoding in frames.decode_one, with its message:
#     the CRC-32C of the coded bytes; for an image frame its plain descriptor
#     (inputs/layout.py read_descriptor, as salvage's _is_record reads it);
#   * a stored frame: its bytes, as decode_one gives them (no model runs), then the
#     CRC-32C of the raw bytes;
#   * a coded frame whose record is one of the seeds' (same model identity, same fields,
#     same coded bytes): the content the real decoder gave for it when the seeds were
#     loaded (decode_record is deterministic, so this is its answer, memoised);
#   * any other coded frame: refused as damaged ("not decoded by the salvage-scan target"),
#     which is what salvage then does with a frame whose decoding fails.
# So every scanner, placement and reassembly path runs (good frames, damaged frames, SHA-256
# matches and mismatches, zero-filled ranges); what it does not run is the model's decoding
# of a found frame whose coded bytes were changed: the `container` target covers that
# (and the full `salvage` target, at 26/s).
_REAL_DECODE = S.decode_record
_KNOWN_RECORDS: dict = {}


def _record_key(model, fr) -> tuple:
    return (json.dumps(model.identity, sort_keys=True), fr.method, fr.raw_len, fr.lanes, fr.raw_crc, fr.coded_crc, fr.checks, bytes(fr.payload))


def _learning_decode(model, fr) -> bytes:
    """The real decoder, remembering what it gives for each record (while seeds load)."""
    raw = _REAL_DECODE(model, fr)
    _KNOWN_RECORDS[_record_key(model, fr)] = raw
    return raw


def _scan_decode(model, fr) -> bytes:
    if C.crc32c(fr.payload) != fr.coded_crc:
        raise DataError(f"frame {fr.index} damaged (CRC-32C of its coded bytes does not match)")
    if fr.method == C.METHOD_STORED:
        raw = bytes(fr.payload)
    else:
        if fr.method == C.METHOD_IMAGE:
            read_descriptor(fr.payload, fr.raw_len)  # DataError as in image_guarantee
        raw = _KNOWN_RECORDS.get(_record_key(model, fr))
        if raw is None:
            raise DataError(f"frame {fr.index} damaged (not decoded by the salvage-scan target)")
    if C.crc32c(raw) != fr.raw_crc:
        raise DataError(f"frame {fr.index} damaged (CRC-32C of its decoded bytes does not match)")
    return raw


@contextlib.contextmanager
def _salvage_decoding_with(decode):
    """salvage's frame decoder replaced by `decode` while the block runs."""
    S.decode_record = decode
    try:
        yield
    finally:
        S.decode_record = _REAL_DECODE


def _learn_seed_records() -> None:
    """Decode every seed once with the real decoder, remembering each record's content."""
    with _salvage_decoding_with(_learning_decode):
        for s in seeds("salvage"):
            try:
                S.salvage(_split(s, reseal_archive))
            except REFUSALS:
                pass


def t_salvage_scan(data: bytes) -> None:
    blob = _split(data, reseal_archive)
    with _salvage_decoding_with(_scan_decode):
        try:
            S.salvage(blob).report()
        except REFUSALS:
            return


def t_modelfile(data: bytes) -> None:
    blob = _split(data, reseal_model)
    try:
        meta, arrays, _ = modelfile.parse(blob)
    except REFUSALS:
        return
    cls = ARCHITECTURES.get(meta["architecture"]["name"])
    if cls is None:
        return
    params = meta["architecture"].get("params", {})
    try:
        cls.from_params(params, arrays) if arrays else cls.from_params(params)
    except (KeyError, TypeError, ValueError, LcodecError):
        return  # load_model's refusals ("bad parameters")


def t_images(data: bytes) -> None:
    info = I.analyse(bytes(data))
    if info is None:
        return
    info.layout.check(len(info.content))  # an analysed image must describe its own content
    if info.guarantee == I.PIXEL_EXACT:
        I.read_record(info.content)


def t_descriptor(data: bytes) -> None:
    if len(data) < 4:
        return
    raw_len = struct.unpack_from("<I", data, 0)[0]
    try:
        lay, pos = read_descriptor(data[4:], raw_len)
    except REFUSALS:
        return
    lay.check(raw_len)  # what the reader accepts must be a layout the decoder can hold
    assert 1 <= pos <= len(data) - 4


TARGETS = {"container": t_container, "salvage": t_salvage, "salvage-scan": t_salvage_scan, "modelfile": t_modelfile,
           "images": t_images, "descriptor": t_descriptor}


# -- seeds from the golden vectors ----------------------------------------------------------------
def seeds(target: str) -> list[bytes]:
    """Seed inputs (with the switch byte first) made from tests/golden/."""
    golden = os.path.join(ROOT, "tests", "golden")
    names = sorted(os.listdir(golden))
    out = []
    if target in ("container", "salvage", "salvage-scan"):
        out.extend(_small_archives())
        for n in names:
            if n.endswith(".lcodec") and os.path.getsize(os.path.join(golden, n)) <= 1 << 12:
                out.append(open(os.path.join(golden, n), "rb").read())
        v3 = os.path.join(golden, "v3")
        for n in sorted(os.listdir(v3)):
            if os.path.getsize(os.path.join(v3, n)) <= 1 << 12:
                out.append(open(os.path.join(v3, n), "rb").read())
        return [bytes([1]) + b for b in out] + [bytes([0]) + b for b in out[:4]]
    if target == "modelfile":
        out.extend(bytes([1]) + m for m in _small_models())
        for n in names:
            if n.endswith(".lcmodel") and os.path.getsize(os.path.join(golden, n)) <= MODEL_MAX_LEN:
                out.append(bytes([1]) + open(os.path.join(golden, n), "rb").read())
        return out
    if target in ("images", "descriptor"):
        origs = [open(os.path.join(golden, n), "rb").read() for n in names if n.endswith(".orig")]
        imgs = [o for o in origs if I.analyse(o) is not None]
        if target == "images":
            return imgs + [I.analyse(o).content for o in imgs]  # the files and their pixel records
        for n in names:
            if n.startswith("tessel-") and n.endswith(".lcodec"):
                cont = C.read_container(open(os.path.join(golden, n), "rb").read())
                for fr in cont.frames:
                    if fr.method == C.METHOD_IMAGE:
                        out.append(struct.pack("<I", fr.raw_len) + bytes(fr.payload[:64]))
        return out
    raise KeyError(target)


MODEL_MAX_LEN = 1 << 15  # the weft and tessel golden model files fit; braid's (88-267 KB) do not


def _small_models() -> list[bytes]:
    """Small model files: strata parameters alone, and arrays of every dtype the format has."""
    import tempfile

    import numpy as np

    from lcodec.models.strata import Strata

    out = []
    with tempfile.TemporaryDirectory() as d:
        p = os.path.join(d, "m.lcmodel")
        modelfile.dump(p, {"name": "strata", "params": Strata(max_order=4, hash_log2=14).params}, notes="seed")
        out.append(open(p, "rb").read())
        arrays = {f"a_{code}": np.arange(6, dtype=dt).reshape(2, 3) for code, dt in modelfile.DTYPES.items()}
        modelfile.dump(p, {"name": "strata", "params": {}}, arrays)
        out.append(open(p, "rb").read())
    return out


def _small_archives() -> list[bytes]:
    """Archives small enough to decode in every execution: version 3 from today's writer
    (many frames, a member table, stored frames) and version 1 built by hand."""
    import random
    import tempfile

    from lcodec.archive.write import pack, pack_paths
    from lcodec.models import default_model

    text = b"".join(b"%d orrin-%d gust=%d\n" % (1_700_000_000 + 7 * k, k % 5, k % 37) for k in range(40))
    noise = random.Random(7).randbytes(300)
    out = [pack(text, frame_size=97), pack(noise, frame_size=128), pack(b"")]
    with tempfile.TemporaryDirectory() as d:
        os.makedirs(os.path.join(d, "mast", "north"))
        for name, data in (("mast/a.log", text[:200]), ("mast/north/b.log", text[200:500]), ("mast/c", b"")):
            with open(os.path.join(d, *name.split("/")), "wb") as f:
                f.write(data)
        out.append(pack_paths([os.path.join(d, "mast")], frame_size=150)[0])
    recs = [C.frame_record(len(p), p, C.METHOD_STORED, 1, C.crc32c(p)) for p in (text[:64], text[64:100])]
    out.append(C.header_bytes(100, C.sha256(text[:100]), 2, 64, default_model().identity, None) + b"".join(recs))
    return out


def write_seeds(target: str, folder: str) -> str:
    os.makedirs(folder, exist_ok=True)
    for i, s in enumerate(seeds(target)):
        with open(os.path.join(folder, f"seed-{i:03d}"), "wb") as f:
            f.write(s)
    return folder


def main(argv: list[str]) -> None:
    if len(argv) == 4 and argv[1] == "--seeds":  # python fuzz/harness.py --seeds TARGET FOLDER
        write_seeds(argv[2], argv[3])
        return
    if len(argv) < 2 or argv[1] in ("-h", "--help", "--list"):
        print(__doc__ if len(argv) < 2 or argv[1] != "--list" else "\n".join(TARGETS))
        return
    target = argv[1]
    fn = TARGETS[target]
    if target == "salvage-scan":
        _learn_seed_records()
    flags = argv[2:]
    if not any(not f.startswith("-") for f in flags):  # no corpus folder given: seeds in a scratch one
        import tempfile

        flags.append(write_seeds(target, tempfile.mkdtemp(prefix=f"lcodec-fuzz-{target}-")))
    atheris.Setup([argv[0]] + flags, fn)
    atheris.Fuzz()


if __name__ == "__main__":
    main(sys.argv)
