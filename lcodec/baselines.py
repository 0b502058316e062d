"""General-purpose compressors as uniform objects, for `lcodec bench`.

Every baseline is a `Baseline` with a short stable `name`, `compress(data) -> bytes`
and `decompress(blob) -> bytes`. The blob is exactly what the library returns, so
its length is the honest coded size (nothing is added or left out).

Labels and settings:

    zlib-9         zlib, level 9 (stdlib)
    bz2-9          bz2, compresslevel 9 (stdlib)
    xz-9e          lzma, FORMAT_XZ, preset 9 | PRESET_EXTREME (stdlib)
    zstd-19        zstandard, level 19
    zstd-19-dict   zstandard, level 19, with a dictionary trained on the train files
    brotli-11      brotli, quality 11, default window (lgwin 22)
    ppmd-o8        pyppmd, PPMd variant I (Ppmd8), max order 8, 256 MiB model memory

    extras (not in the default list, see `make_baseline`):
    brotli-11-w24  brotli, quality 11, lgwin 24 (16 MiB window)
    ppmd-o16       pyppmd, PPMd variant I, max order 16, 256 MiB model memory

zstandard, brotli and pyppmd are optional (`pip install lcodec[bench]`): when one is
missing, its baselines are skipped with a warning.
"""

from __future__ import annotations

import bz2
import lzma
import warnings
import zlib
from dataclasses import dataclass, field
from typing import Callable, Sequence

try:  # optional
    import zstandard
except ImportError:  # pragma: no cover - depends on the environment
    zstandard = None

try:  # optional
    import brotli
except ImportError:  # pragma: no cover
    brotli = None

try:  # optional
    import pyppmd
except ImportError:  # pragma: no cover
    pyppmd = None


# ---- settings (each one is what the label promises) -------------------------------

ZLIB_LEVEL = 9
BZ2_LEVEL = 9
XZ_PRESET = 9 | lzma.PRESET_EXTREME
ZSTD_LEVEL = 19
BROTLI_QUALITY = 11
BROTLI_WIDE_LGWIN = 24

# Dictionary for zstd-19-dict: at most 112640 bytes (110 KiB; recalled from memory as
# the zstd command-line trainer's default maximum, not checked), and at most a tenth of
# the training bytes so a small train set does not get a dictionary nearly as large as
# itself (zstd's own guidance, also from memory, is ~100x more sample bytes than
# dictionary bytes). The trainer runs with zstandard's default parameters: asking it to
# search its parameters (threads/steps) took 15-250x longer on 8 MB of Python sources
# here and gave a slightly larger total (1.503-1.509 vs 1.493 bits per byte).
ZSTD_DICT_MAX_BYTES = 112640
ZSTD_DICT_TRAIN_FRACTION = 10
# Training reads at most this many sample bytes (files picked evenly across the sorted
# train list), which bounds the trainer's time and memory on large corpora.
ZSTD_DICT_SAMPLE_CAP = 32 << 20
# When training on whole files fails (too few samples), it is retried once on the files
# cut into pieces of this size, which often succeeds for a few large files.
ZSTD_DICT_RETRY_PIECE = 4096

# PPMd model memory for both orders. 256 MiB is enough that the model is not restarted
# on files up to tens of MB (measured here: on 3 MB of Python sources order 8 gained
# nothing above 64 MiB, order 16 gained 4% from 16 to 64 MiB and nothing above); the
# allocation costs well under a millisecond per file. The decoder needs the same value.
PPMD_MEM_BYTES = 256 << 20
# pyppmd 1.3.1's one-shot Ppmd8 encoder was seen here to drop one output byte at output
# offset 32768 on some incompressible inputs (4 of 60 random 70 KB buffers would not
# decode). Feeding the encoder in pieces of 16 KiB keeps every call's output under
# 32 KiB; on compressible text the bytes are identical to `pyppmd.compress` (checked in
# tests/test_baselines.py), and 400 mixed random/text/corrupted inputs up to 1 MB all
# round-tripped. The stream ends with PPMd's end mark (written by `flush`), which is
# part of the blob and so counted in the coded size; no length prefix is needed.
PPMD_FEED_BYTES = 16 << 10

DEFAULT_NAMES = ("zlib-9", "bz2-9", "xz-9e", "zstd-19", "zstd-19-dict", "brotli-11", "ppmd-o8")
EXTRA_NAMES = ("brotli-11-w24", "ppmd-o16")
ALL_NAMES = DEFAULT_NAMES + EXTRA_NAMES

# Which optional library each label needs.
_NEEDS = {
    "zstd-19": "zstandard",
    "zstd-19-dict": "zstandard",
    "brotli-11": "brotli",
    "brotli-11-w24": "brotli",
    "ppmd-o8": "pyppmd",
    "ppmd-o16": "pyppmd",
}


@dataclass
class Baseline:
    """A general compressor behind a uniform interface.

    `model_bytes` is the size of any side information the decoder needs besides the
    blob (the trained zstd dictionary; 0 for the others). `note` says anything a
    reader of the benchmark should know about this row (for example a dictionary
    that could not be trained).
    """

    name: str
    _compress: Callable[[bytes], bytes] = field(repr=False)
    _decompress: Callable[[bytes], bytes] = field(repr=False)
    model_bytes: int = 0
    note: str = ""
    kind: str = "baseline"

    def compress(self, data: bytes) -> bytes:
        return self._compress(bytes(data))

    def decompress(self, blob: bytes) -> bytes:
        return self._decompress(bytes(blob))


def available(name: str) -> bool:
    """True when the library behind `name` can be imported here."""
    lib = _NEEDS.get(name)
    return lib is None or globals()[lib] is not None


# ---- the individual compressors ---------------------------------------------------


def _zlib() -> Baseline:
    return Baseline("zlib-9", lambda d: zlib.compress(d, ZLIB_LEVEL), zlib.decompress)


def _bz2() -> Baseline:
    return Baseline("bz2-9", lambda d: bz2.compress(d, BZ2_LEVEL), bz2.decompress)


def _xz() -> Baseline:
    return Baseline(
        "xz-9e",
        lambda d: lzma.compress(d, format=lzma.FORMAT_XZ, preset=XZ_PRESET),
        lambda b: lzma.decompress(b, format=lzma.FORMAT_XZ),
    )


def _zstd() -> Baseline:
    cctx = zstandard.ZstdCompressor(level=ZSTD_LEVEL)
    dctx = zstandard.ZstdDecompressor()
    return Baseline("zstd-19", cctx.compress, dctx.decompress)


def _pick_samples(train_files: Sequence[bytes], cap: int) -> list[bytes]:
    """Non-empty train files, evenly strided so their total stays under `cap`."""
    files = [bytes(f) for f in train_files if len(f) > 0]
    total = sum(len(f) for f in files)
    if total <= cap:
        return files
    stride = -(-total // cap)  # ceil
    picked, size = [], 0
    for f in files[::stride]:
        if size + len(f) > cap:
            f = f[: cap - size]
        if f:
            picked.append(f)
            size += len(f)
        if size >= cap:
            break
    return picked


def train_zstd_dictionary(train_files: Sequence[bytes]):
    """Train a zstd dictionary on `train_files`.

    Returns (dictionary or None, note). The note is "" on success and says why not
    otherwise; None means the train set was too small (or unsuitable) to train on.
    """
    samples = _pick_samples(train_files, ZSTD_DICT_SAMPLE_CAP)
    total = sum(len(s) for s in samples)
    size = min(ZSTD_DICT_MAX_BYTES, total // ZSTD_DICT_TRAIN_FRACTION)
    if not samples or size < 256:
        return None, (
            f"train set too small for a zstd dictionary ({len(samples)} files, {total} bytes); "
            "coded without a dictionary"
        )
    try:
        return zstandard.train_dictionary(size, samples), ""
    except zstandard.ZstdError:
        pass
    pieces = [
        s[i : i + ZSTD_DICT_RETRY_PIECE] for s in samples for i in range(0, len(s), ZSTD_DICT_RETRY_PIECE)
    ]
    try:
        return zstandard.train_dictionary(size, pieces), ""
    except zstandard.ZstdError as exc:
        return None, (
            f"zstd dictionary training failed on {len(samples)} files, {total} bytes ({exc}); "
            "coded without a dictionary"
        )


def _zstd_dict(train_files: Sequence[bytes]) -> Baseline:
    dictionary, note = train_zstd_dictionary(train_files)
    if dictionary is None:
        cctx = zstandard.ZstdCompressor(level=ZSTD_LEVEL)
        dctx = zstandard.ZstdDecompressor()
        return Baseline("zstd-19-dict", cctx.compress, dctx.decompress, 0, note)
    cctx = zstandard.ZstdCompressor(level=ZSTD_LEVEL, dict_data=dictionary)
    dctx = zstandard.ZstdDecompressor(dict_data=dictionary)
    dict_bytes = len(dictionary.as_bytes())
    return Baseline("zstd-19-dict", cctx.compress, dctx.decompress, dict_bytes, "")


def _brotli(name: str, lgwin: int) -> Baseline:
    return Baseline(
        name,
        lambda d: brotli.compress(d, quality=BROTLI_QUALITY, lgwin=lgwin),
        brotli.decompress,
    )


def _ppmd(name: str, order: int) -> Baseline:
    def compress(data: bytes) -> bytes:
        enc = pyppmd.Ppmd8Encoder(order, PPMD_MEM_BYTES)
        parts = [enc.encode(data[i : i + PPMD_FEED_BYTES]) for i in range(0, len(data), PPMD_FEED_BYTES)]
        parts.append(enc.flush())  # writes the end mark
        return b"".join(parts)

    def decompress(blob: bytes) -> bytes:
        return pyppmd.decompress(blob, max_order=order, mem_size=PPMD_MEM_BYTES, variant="I")

    return Baseline(name, compress, decompress)


# ---- building them ----------------------------------------------------------------


def make_baseline(name: str, train_files: Sequence[bytes] | None = None) -> Baseline:
    """Build the baseline called `name` (one of ALL_NAMES).

    `train_files` is only used by "zstd-19-dict". Raises KeyError for an unknown
    name and ImportError when its library is missing.
    """
    if name not in ALL_NAMES:
        raise KeyError(f"unknown baseline {name!r}; known: {', '.join(ALL_NAMES)}")
    if not available(name):
        raise ImportError(f"baseline {name} needs the '{_NEEDS[name]}' package (pip install lcodec[bench])")
    if name == "zlib-9":
        return _zlib()
    if name == "bz2-9":
        return _bz2()
    if name == "xz-9e":
        return _xz()
    if name == "zstd-19":
        return _zstd()
    if name == "zstd-19-dict":
        return _zstd_dict(train_files or [])
    if name == "brotli-11":
        return _brotli(name, 22)
    if name == "brotli-11-w24":
        return _brotli(name, BROTLI_WIDE_LGWIN)
    if name == "ppmd-o8":
        return _ppmd(name, 8)
    return _ppmd(name, 16)  # ppmd-o16


def make_baselines(names: Sequence[str], train_files: Sequence[bytes] | None = None) -> list[Baseline]:
    """Build the named baselines, skipping (with a warning) those whose library is missing."""
    out = []
    for name in names:
        if name not in ALL_NAMES:
            raise KeyError(f"unknown baseline {name!r}; known: {', '.join(ALL_NAMES)}")
        if not available(name):
            warnings.warn(
                f"baseline {name} skipped: the '{_NEEDS[name]}' package is not installed "
                "(pip install lcodec[bench])",
                RuntimeWarning,
                stacklevel=2,
            )
            continue
        out.append(make_baseline(name, train_files))
    return out


def default_baselines(train_files: Sequence[bytes]) -> list[Baseline]:
    """The default comparison set (DEFAULT_NAMES); `train_files` feed the zstd dictionary."""
    return make_baselines(DEFAULT_NAMES, train_files)
