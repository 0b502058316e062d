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
    zstd-19-rawdict
                   zstandard, level 19, the train files themselves (up to PRIME_BUDGET_BYTES)
                   as a raw-content dictionary; window and match-finder tables widened so
                   that every byte of the dictionary can be matched (see ZSTD_RAWDICT_*)
    brotli-11      brotli, quality 11, default window (lgwin 22)
    ppmd-o8        pyppmd, PPMd variant I (Ppmd8), max order 8, 256 MiB model memory
    ppmd-o16-primed
                   pyppmd, PPMd variant I, max order 16, 1 GiB model memory, primed with the
                   train files (up to PRIME_BUDGET_BYTES) before each test file; see
                   `PrimedPpmd` for what is stored, counted and timed

    extras (not in the default list, see `make_baseline`):
    brotli-11-w24  brotli, quality 11, lgwin 24 (16 MiB window)
    ppmd-o16       pyppmd, PPMd variant I, max order 16, 256 MiB model memory

zstandard, brotli and pyppmd are optional (`pip install lcodec[bench]`): when one is
missing, its baselines are skipped with a warning.

`model_bytes` is what the decoder must already hold besides each blob: the trained
dictionary (zstd-19-dict), the raw dictionary (zstd-19-rawdict: the train bytes), the
prime's coded bytes (ppmd-o16-primed); 0 for the others.
"""

from __future__ import annotations

import bz2
import lzma
import os
import select
import signal
import struct
import subprocess
import sys
import time
import warnings
import weakref
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

# ---- the train split as context: zstd-19-rawdict and ppmd-o16-primed ----------------

# How many train bytes the raw dictionary and the PPMd prime hold (files picked evenly
# across the sorted train list, as `bench.read_train_sample` reads them). It equals the
# default corpus-memory budget of lcodec's own model, so both sides may keep the same
# amount of training text.
PRIME_BUDGET_BYTES = 32 << 20

# zstd-19-rawdict. Level 19's match finder (btultra2) keeps a binary tree of 2**(chain
# log - 1) positions: at level 19's chain log of 24 it reaches only the last 8 MiB of a
# dictionary. Measured here on 40 test files (seed 1) of each real corpus with a 28-30 MB
# raw dictionary: chain log 26 (the whole dictionary reachable) gives 1.1368 bits per
# byte on Python sources against 1.2076 at level 19's own tables (-5.9%), 1.1447 against
# 1.2181 on C headers (-6.0%), 0.7312 against 0.8258 on package data (-11.5%); encode
# time about 2x (the larger tables are copied into the compressor per file). A larger
# hash log (24, 25) changed nothing (1.1368), nor did a larger chain log (27: 1.1368).
# So the chain log is widened to cover the dictionary; the other settings stay level 19's.
# (The tree's reach is recalled from memory of zstd's design; the figures are measured.)
# Long-distance matching gained 0.00-0.03% (1.1365 vs 1.1368, 1.1445 vs 1.1447, 0.7312 vs
# 0.7312) for up to 30% more encode time: left off.
# The window: zstd stops using a dictionary once the input runs past the window (recalled
# from memory), so the window is sized for dictionary + input. It did nothing for these
# test files (all under 8 MiB, which level 19's own 8 MiB window covers), but on one
# 13.2 MB file (four test splits joined, Python sources last) it gave 1,762,216 bytes
# against 1,833,382 with an 8 MiB window (-3.9%). It is capped at 2**27, the largest
# window a zstd decoder accepts by default (ZSTD_WINDOWLOG_LIMIT_DEFAULT, recalled from
# memory; checked in tests/test_baselines.py: a default zstandard.ZstdDecompressor
# decodes the blobs).
ZSTD_RAWDICT_WINDOW_LOG_MAX = 27
ZSTD_RAWDICT_WINDOW_LOG_MIN = 10  # zstd's smallest window (zstandard.WINDOWLOG_MIN)
ZSTD_RAWDICT_CHAIN_LOG_MAX = 30  # zstd's largest chain log on 64-bit (zstandard.CHAINLOG_MAX)

# ppmd-o16-primed. Model memory: PPMD_MEM_BYTES (256 MiB) is too small for an order-16
# model of a 30 MB prime: the model fills up and restarts (pyppmd's default restore
# method), throwing the prime away. Measured here (40 test files, seed 1, 28-31 MB
# primes), bits per byte at 256 / 512 / 1024 / 2048 MiB: Python sources 1.1278 / 1.0213
# / 1.0213 / 1.0213, C headers 1.2934 / 1.2989 / 1.0250 / 1.0250, package documentation
# 1.5325 / 1.1227 / 1.1227 / 1.1227, package data 0.7006 at every size. The primed
# model's resident memory after the prime was 151-539 MiB (most: C headers, 30.2 MB), so
# 1 GiB leaves about 2x headroom at PRIME_BUDGET_BYTES. (The cut-off restore method at
# 256 MiB gave 1.0610 on Python sources, still 4% worse than 1 GiB, and was 2.8x slower.)
# The decoder needs the same value.
PPMD_PRIMED_ORDER = 16
PPMD_PRIMED_MEM_BYTES = 1 << 30
# The primed decoder stops where the encoder had written at least this many bytes fewer
# than the whole prime's output (its range decoder reads 4 bytes ahead, recalled from memory;
# 16 is a margin, and the decoder's state is checked after); see `PrimedPpmd`.
PPMD_PRIME_READ_MARGIN = 16
# A forked coder that has not answered after this long (plus a second per 100 KB) is
# killed and reported: a safety net (PPMd codes 2-8 MB/s here), not an expected path.
FORK_TIMEOUT_S = 300

DEFAULT_NAMES = ("zlib-9", "bz2-9", "xz-9e", "zstd-19", "zstd-19-dict", "zstd-19-rawdict", "brotli-11",
                 "ppmd-o8", "ppmd-o16-primed")
EXTRA_NAMES = ("brotli-11-w24", "ppmd-o16")
ALL_NAMES = DEFAULT_NAMES + EXTRA_NAMES

# Which optional library each label needs.
_NEEDS = {
    "zstd-19": "zstandard",
    "zstd-19-dict": "zstandard",
    "zstd-19-rawdict": "zstandard",
    "brotli-11": "brotli",
    "brotli-11-w24": "brotli",
    "ppmd-o8": "pyppmd",
    "ppmd-o16": "pyppmd",
    "ppmd-o16-primed": "pyppmd",
}

# One line per label, for reports and help text.
DESCRIPTIONS = {
    "zlib-9": "zlib, level 9",
    "bz2-9": "bz2, level 9",
    "xz-9e": "xz (lzma), preset 9 extreme",
    "zstd-19": "zstd, level 19",
    "zstd-19-dict": "zstd, level 19, with a dictionary (at most 112,640 bytes) trained on the train split",
    "zstd-19-rawdict": f"zstd, level 19, the train split itself (up to {PRIME_BUDGET_BYTES >> 20} MiB) as a "
                       "raw-content dictionary, window and match tables widened to reach all of it",
    "brotli-11": "brotli, quality 11, 4 MiB window",
    "brotli-11-w24": "brotli, quality 11, 16 MiB window",
    "ppmd-o8": "PPMd (variant I), order 8, 256 MiB",
    "ppmd-o16": "PPMd (variant I), order 16, 256 MiB",
    "ppmd-o16-primed": f"PPMd (variant I), order {PPMD_PRIMED_ORDER}, {PPMD_PRIMED_MEM_BYTES >> 20} MiB, primed "
                       f"with the train split (up to {PRIME_BUDGET_BYTES >> 20} MiB) before each test file",
}


@dataclass
class Baseline:
    """A general compressor behind a uniform interface.

    `model_bytes` is the size of any side information the decoder needs besides the
    blob (a zstd dictionary, the PPMd prime's coded bytes; 0 for the others), and
    `side_data`, where set, is that information itself (len(side_data) == model_bytes).
    `note` says anything a reader of the benchmark should know about this row (for
    example a dictionary that could not be trained, or what the timings leave out).
    """

    name: str
    _compress: Callable[[bytes], bytes] = field(repr=False)
    _decompress: Callable[[bytes], bytes] = field(repr=False)
    model_bytes: int = 0
    note: str = ""
    kind: str = "baseline"
    side_data: bytes | None = field(default=None, repr=False)

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


def _ppmd(name: str, order: int, mem: int = PPMD_MEM_BYTES) -> Baseline:
    def compress(data: bytes) -> bytes:
        enc = pyppmd.Ppmd8Encoder(order, mem)
        parts = [enc.encode(data[i : i + PPMD_FEED_BYTES]) for i in range(0, len(data), PPMD_FEED_BYTES)]
        parts.append(enc.flush())  # writes the end mark
        return b"".join(parts)

    def decompress(blob: bytes) -> bytes:
        return pyppmd.decompress(blob, max_order=order, mem_size=mem, variant="I")

    return Baseline(name, compress, decompress)


# ---- the train split as context ---------------------------------------------------


def prime_text(train_files: Sequence[bytes], budget: int = PRIME_BUDGET_BYTES) -> tuple[bytes, int]:
    """(the train files joined, up to `budget` bytes, number of files used).

    Files are picked evenly across the list when they hold more than `budget` bytes,
    by the same rule as `bench.read_train_sample`, so train files read with that
    function and the same budget are used whole and in order.
    """
    picked = _pick_samples(train_files, budget)
    return b"".join(picked), len(picked)


def _nbits(n: int) -> int:
    """ceil(log2(n)) for n >= 1 (0 for n <= 1)."""
    return max(0, (n - 1).bit_length())


def zstd_rawdict_params(dict_len: int, input_len: int | None = None):
    """zstandard compression parameters of zstd-19-rawdict.

    Level 19's parameters for a source of the dictionary's size, with the chain log
    raised to ceil(log2(dict_len)) + 1 so the match finder's tree spans the whole
    dictionary (capped at zstd's maximum) and the window log set to
    ceil(log2(dict_len + input_len)) within [10, ZSTD_RAWDICT_WINDOW_LOG_MAX]
    (input_len None: the cap). The figures behind both choices are beside the
    constants.
    """
    base = zstandard.ZstdCompressionParameters.from_level(ZSTD_LEVEL, source_size=max(dict_len, 1))
    chain = min(ZSTD_RAWDICT_CHAIN_LOG_MAX, max(base.chain_log, _nbits(dict_len) + 1))
    if input_len is None:
        window = ZSTD_RAWDICT_WINDOW_LOG_MAX
    else:
        window = min(ZSTD_RAWDICT_WINDOW_LOG_MAX,
                     max(ZSTD_RAWDICT_WINDOW_LOG_MIN, _nbits(dict_len + input_len)))
    return zstandard.ZstdCompressionParameters.from_level(
        ZSTD_LEVEL, source_size=max(dict_len, 1), window_log=window, chain_log=chain)


class _RawDictZstd:
    """zstd-19-rawdict's coder: one precomputed dictionary, a compressor per window."""

    def __init__(self, raw: bytes):
        self.raw = raw
        self.dictionary = zstandard.ZstdCompressionDict(raw, dict_type=zstandard.DICT_TYPE_RAWCONTENT)
        t0 = time.perf_counter()
        # The match finder's tables over the dictionary are built once, here, not per file.
        self.dictionary.precompute_compress(compression_params=zstd_rawdict_params(len(raw)))
        self.prepare_s = time.perf_counter() - t0
        self._cctx_window = None
        self._cctx = None
        # The default decoder limits (no raised max_window_size): see the window cap.
        self._dctx = zstandard.ZstdDecompressor(dict_data=self.dictionary)

    def compress(self, data: bytes) -> bytes:
        params = zstd_rawdict_params(len(self.raw), len(data))
        if self._cctx_window != params.window_log:  # one compressor kept (its tables are large)
            self._cctx = None
            self._cctx = zstandard.ZstdCompressor(dict_data=self.dictionary, compression_params=params)
            self._cctx_window = params.window_log
        return self._cctx.compress(data)

    def decompress(self, blob: bytes) -> bytes:
        return self._dctx.decompress(blob)


def _zstd_rawdict(train_files: Sequence[bytes]) -> Baseline:
    raw, n_files = prime_text(train_files)
    if not raw:
        cctx = zstandard.ZstdCompressor(level=ZSTD_LEVEL)
        dctx = zstandard.ZstdDecompressor()
        return Baseline("zstd-19-rawdict", cctx.compress, dctx.decompress, 0,
                        "no train bytes: no dictionary, coded as plain zstd -19", side_data=b"")
    coder = _RawDictZstd(raw)
    cut = " (budget reached)" if len(raw) >= PRIME_BUDGET_BYTES else ""
    note = (f"dictionary: {len(raw):,} bytes of {n_files:,} train files{cut} (= model bytes); its match "
            f"tables built once in {coder.prepare_s:.1f} s, not counted in encode s")
    return Baseline("zstd-19-rawdict", coder.compress, coder.decompress, len(raw), note, side_data=raw)


def _encode_pieces(enc, data: bytes) -> list[bytes]:
    """Feed a pyppmd encoder in PPMD_FEED_BYTES pieces (see that constant)."""
    return [enc.encode(data[i : i + PPMD_FEED_BYTES]) for i in range(0, len(data), PPMD_FEED_BYTES)]


def _decode_to_end(dec, data: bytes) -> bytes:
    """Everything a pyppmd decoder gives for `data` up to the end mark, or ValueError."""
    out = dec.decode(data) if data else b""
    if not dec.eof:
        raise ValueError("PPMd stream ends before its end mark (truncated or corrupt)")
    return out


def _prime_encoder(prime: bytes, order: int, mem: int):
    """(encoder that has read `prime`, what it wrote, [(prime offset, bytes written)]).

    The prime goes in PPMD_FEED_BYTES pieces, its last 64 KiB in 1 KiB pieces so that a
    decoder can be stopped close to the prime's end (see `PrimedPpmd`). The bytes
    written do not depend on the pieces (the tests compare with 16 KiB pieces).
    """
    enc = pyppmd.Ppmd8Encoder(order, mem)
    tail = max(0, len(prime) - (64 << 10))
    ends = list(range(PPMD_FEED_BYTES, tail, PPMD_FEED_BYTES)) + [tail]
    ends += list(range(tail + 1024, len(prime), 1024)) + [len(prime)]
    parts, marks, size, start = [], [], 0, 0
    for end in ends:
        if end <= start:
            continue
        part = enc.encode(prime[start:end])
        parts.append(part)
        size += len(part)
        marks.append((end, size))
        start = end
    return enc, b"".join(parts), marks


def _decoder_stop(marks, prime_out_len: int) -> int:
    """The prime offset where a primed decoder stops: the last mark where the encoder had
    written at least PPMD_PRIME_READ_MARGIN bytes fewer than the whole prime's output."""
    limit = prime_out_len - PPMD_PRIME_READ_MARGIN
    return max((n for n, written in marks if written <= limit), default=0)


def _prime_decoder(prime: bytes, prime_out: bytes, upto: int, order: int, mem: int):
    """A decoder that has given the prime's first `upto` bytes and still holds unread
    input, or None where that state was not reached (then decode from scratch)."""
    if upto <= 0:
        return None
    dec = pyppmd.Ppmd8Decoder(order, mem)
    got = dec.decode(prime_out, upto)
    # Input left unread means its worker stopped on the count, not inside a symbol.
    if len(got) == upto and got == prime[:upto] and not dec.needs_input and not dec.eof:
        return dec
    return None


def _finish(enc, data: bytes) -> bytes:
    """The archive: `data` through a (primed) encoder, then its end mark (flush)."""
    return b"".join(_encode_pieces(enc, data)) + enc.flush()


def _decode_rest(dec, prime: bytes, upto: int, blob: bytes) -> bytes:
    """The input, from a decoder that has given prime[:upto] (see `_prime_decoder`)."""
    out = _decode_to_end(dec, blob)
    head = len(prime) - upto
    if out[:head] != prime[upto:]:
        raise ValueError("decoded prime differs from the prime (wrong prime or corrupt archive)")
    return out[head:]


def _decode_fresh(prime: bytes, prime_out: bytes, blob: bytes, order: int, mem: int) -> bytes:
    """The input, decoding prime_out + blob from scratch."""
    return _decode_rest(pyppmd.Ppmd8Decoder(order, mem), prime, 0, prime_out + blob)


def fork_available() -> bool:
    """True where `os.fork` exists (POSIX), which `PrimedPpmd` uses to share its priming."""
    return hasattr(os, "fork") and os.name == "posix"


def _in_child(work: Callable[[], bytes], size_hint: int) -> bytes:
    """Run `work` in a forked child and return its bytes (or raise its error here).

    The child starts from a copy-on-write image of this process, so it continues from
    whatever state this process's objects are in and leaves them untouched. It writes
    one status byte and its result to a pipe and leaves with os._exit (no cleanup
    handlers run twice).
    """
    rfd, wfd = os.pipe()
    pid = os.fork()
    if pid == 0:  # child
        code = 0
        try:
            os.close(rfd)
            try:
                payload = b"\x00" + work()
            except BaseException as e:  # reported to the parent, which raises it
                payload = b"\x01" + f"{type(e).__name__}: {e}".encode("utf-8", "replace")
            view = memoryview(payload)
            while view:
                view = view[os.write(wfd, view):]
            os.close(wfd)
        except BaseException:
            code = 1
        finally:
            os._exit(code)
    os.close(wfd)
    deadline = time.monotonic() + FORK_TIMEOUT_S + size_hint / 100_000
    chunks = []
    try:
        while True:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([rfd], [], [], left)[0]:
                os.kill(pid, signal.SIGKILL)
                raise RuntimeError(f"forked coder gave no answer within {FORK_TIMEOUT_S} s (+1 s per 100 KB)")
            chunk = os.read(rfd, 1 << 20)
            if not chunk:
                break
            chunks.append(chunk)
    finally:
        os.close(rfd)
        _, status = os.waitpid(pid, 0)
    payload = b"".join(chunks)
    if os.waitstatus_to_exitcode(status) != 0 or not payload:
        raise RuntimeError(f"forked coder failed (exit status {os.waitstatus_to_exitcode(status)})")
    if payload[0] != 0:
        raise RuntimeError(payload[1:].decode("utf-8", "replace"))
    return payload[1:]


# Messages between PrimedPpmd and its coder processes: a status byte (0 ok, 1 error,
# whose payload is the message), the payload's length (8 bytes, big-endian), the payload.
_FRAME = struct.Struct(">BQ")


def _write_frame(fd: int, status: int, payload: bytes) -> None:
    view = memoryview(_FRAME.pack(status, len(payload)) + payload)
    while view:
        view = view[os.write(fd, view):]


def _read_exact(fd: int, n: int, deadline: float | None) -> bytes:
    parts, got = [], 0
    while got < n:
        if deadline is not None:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([fd], [], [], left)[0]:
                raise TimeoutError
        chunk = os.read(fd, min(n - got, 1 << 20))
        if not chunk:
            raise EOFError
        parts.append(chunk)
        got += len(chunk)
    return b"".join(parts)


def _read_frame(fd: int, deadline: float | None = None):
    """(status, payload), or None at the end of the stream before a frame."""
    try:
        head = _read_exact(fd, _FRAME.size, deadline)
    except EOFError:
        return None
    status, n = _FRAME.unpack(head)
    return status, _read_exact(fd, n, deadline)


def _coder_process_main() -> None:
    """A coder process of `PrimedPpmd` (argv: ROLE ORDER MEM; ROLE encode or decode).

    It reads one setup frame, primes its coder and answers; then for every request
    frame (an input to encode, or an archive to decode) it forks a child that continues
    from the primed coder, and answers with the child's bytes. It ends at the end of
    its input (when the PrimedPpmd is closed or its process ends).
    """
    # Ctrl-C reaches the whole process group: the caller handles it, and this process
    # ends when the caller closes its input (or exits).
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    rfd, wfd = os.dup(0), os.dup(1)
    null = os.open(os.devnull, os.O_RDWR)
    os.dup2(null, 0)
    os.dup2(2, 1)  # anything printed goes to stderr, not into the answers
    try:
        _serve(rfd, wfd, sys.argv[1], int(sys.argv[2]), int(sys.argv[3]))
    except (OSError, EOFError):  # the caller went away (a broken pipe): nothing left to answer
        pass


def _serve(rfd: int, wfd: int, role: str, order: int, mem: int) -> None:
    """Prime from the setup frame, answer it, then answer requests until the input ends."""
    setup = _read_frame(rfd)
    if setup is None:
        return
    try:
        t0 = time.perf_counter()
        if role == "encode":
            prime = setup[1]
            enc, prime_out, marks = _prime_encoder(prime, order, mem)
            answer = (struct.pack(">dQ", time.perf_counter() - t0, len(marks))
                      + b"".join(struct.pack(">QQ", n, w) for n, w in marks) + prime_out)

            def work(data):
                return _finish(enc, data)
        else:
            n_prime, upto = struct.unpack_from(">QQ", setup[1])
            prime = setup[1][16 : 16 + n_prime]
            prime_out = setup[1][16 + n_prime :]
            dec = _prime_decoder(prime, prime_out, upto, order, mem)
            upto = upto if dec is not None else 0
            answer = struct.pack(">dQ", time.perf_counter() - t0, upto)

            def work(blob):
                if dec is None:
                    return _decode_fresh(prime, prime_out, blob, order, mem)
                return _decode_rest(dec, prime, upto, blob)
    except Exception as e:
        _write_frame(wfd, 1, f"{type(e).__name__}: {e}".encode("utf-8", "replace"))
        return
    _write_frame(wfd, 0, answer)
    while True:
        request = _read_frame(rfd)
        if request is None:
            return
        data = request[1]
        try:
            _write_frame(wfd, 0, _in_child(lambda: work(data), len(data) * (16 if role == "decode" else 1)))
        except Exception as e:
            _write_frame(wfd, 1, f"{e}".encode("utf-8", "replace"))


def _stop_process(proc) -> None:
    try:
        proc.stdin.close()
        proc.wait(timeout=10)
    except Exception:
        proc.kill()
        proc.wait()
    finally:
        if proc.stdout:
            proc.stdout.close()


class _CoderProcess:
    """A `_coder_process_main` process started with this Python, and the calls to it."""

    def __init__(self, role: str, order: int, mem: int):
        here = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))  # the folder holding lcodec/
        env = dict(os.environ)
        env["PYTHONPATH"] = here + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
        # glibc >= 2.35 then backs the model's large allocation with transparent huge pages
        # where the kernel allows them (madvise), so a fork copies a few page tables instead
        # of many. Measured here on a process primed with 28 MB of Python sources (547 MB
        # resident): fork and exit 34 ms -> 3 ms, a test file coded by a fork 89 -> 49 ms
        # on average (the rest is copying the model pages the child writes). The coded
        # bytes are the same; older glibc ignores the setting.
        tunables = [t for t in env.get("GLIBC_TUNABLES", "").split(":") if t]
        env["GLIBC_TUNABLES"] = ":".join(tunables + ["glibc.malloc.hugetlb=1"])
        self.proc = subprocess.Popen(
            [sys.executable, "-c", "from lcodec.measure.baselines import _coder_process_main; _coder_process_main()",
             role, str(order), str(mem)],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, env=env)
        self.role = role
        self._finalizer = weakref.finalize(self, _stop_process, self.proc)

    def call(self, payload: bytes, seconds: float) -> bytes:
        if self.proc.poll() is not None:
            raise RuntimeError(f"PPMd {self.role} process has ended (exit code {self.proc.returncode})")
        try:
            _write_frame(self.proc.stdin.fileno(), 0, payload)
            answer = _read_frame(self.proc.stdout.fileno(), time.monotonic() + seconds)
        except TimeoutError:
            self.close()
            raise RuntimeError(f"PPMd {self.role} process gave no answer within {seconds:.0f} s") from None
        except (BrokenPipeError, EOFError):
            answer = None
        except BaseException:  # interrupted half way: its answer would come to the next call
            self.close()
            raise
        if answer is None:
            self.close()
            raise RuntimeError(f"PPMd {self.role} process ended unexpectedly (exit code {self.proc.returncode})")
        status, body = answer
        if status != 0:
            raise RuntimeError(body.decode("utf-8", "replace"))
        return body

    def close(self) -> None:
        self._finalizer()


class PrimedPpmd:
    """PPMd (variant I) that has read `prime` before each input: ppmd-o16-primed's coder.

    What a user can run: the encoder encodes the prime, then the input, then its end
    mark. What it wrote while encoding the prime (`prime_out`, known before any input)
    is held by both sides; the archive is the bytes after it. The decoder decodes
    prime_out + archive to the end mark and drops the prime's len(prime) bytes. So an
    archive decodes with a plain pyppmd call:
    `pyppmd.decompress(prime_out + archive, max_order=order, mem_size=mem)[len(prime):]`
    (checked in tests/test_baselines.py). Each input is coded on its own: nothing of one
    test file reaches another's model.

    `model_bytes` of the row is len(prime_out), the coded prime: it is what the decoder
    must hold (the prime's text, len(prime) bytes, is named in the note).

    Speed, without changing a byte: priming is a whole encode (and decode) of the prime,
    seconds per side for 30 MB. Where fork is available (`fork` None or True), two coder
    processes (`_coder_process_main`, one encoder, one decoder) are started with this
    Python and primed once; each input is then coded by a child forked from the primed
    process, which continues from the primed state (copy-on-write; pyppmd's coders
    cannot be copied or pickled) and returns its bytes through a pipe. Forking costs
    time in proportion to the process's memory (measured here: 10 ms at 250 MB, 45 ms
    at 1 GB, 128 ms at 2 GB per fork and exit), so the primed coders live in small
    processes of their own rather than in the caller's, whose size depends on what else
    it holds. Elsewhere (or with fork=False) every call primes a fresh coder itself. The
    two give identical archives (tested).

    The decoder cannot be primed to the prime's very end: a range decoder reads a few
    bytes ahead, and the prime's last symbols need the archive's first bytes. pyppmd's
    Ppmd8Decoder decodes in a worker thread that, when its input runs out inside a
    symbol, stays blocked waiting for more; a forked child has no such thread and hangs
    (seen here with pyppmd 1.3.1). So the primed decoder decodes only the prime's first
    `decoder_primed` bytes (where the encoder had written at least
    PPMD_PRIME_READ_MARGIN bytes fewer than prime_out), leaving input unread and its
    worker finished; each child then decodes the rest of the prime and the archive, and
    drops the prime's remaining bytes (a few KB: counted in its decode time).
    """

    def __init__(self, prime: bytes, order: int = PPMD_PRIMED_ORDER, mem: int = PPMD_PRIMED_MEM_BYTES,
                 fork: bool | None = None):
        self.prime = bytes(prime)
        self.order = order
        self.mem = mem
        self.forked = fork_available() if fork is None else bool(fork and fork_available())
        self.decoder_prime_s = 0.0
        self.decoder_primed = 0
        self._enc_proc = self._dec_proc = None
        if not self.forked:
            t0 = time.perf_counter()
            _, self.prime_out, _ = _prime_encoder(self.prime, order, mem)
            self.encoder_prime_s = time.perf_counter() - t0
            return
        budget = FORK_TIMEOUT_S + len(self.prime) / 100_000
        self._enc_proc = _CoderProcess("encode", order, mem)
        answer = self._enc_proc.call(self.prime, budget)
        self.encoder_prime_s, n_marks = struct.unpack_from(">dQ", answer)
        marks = [struct.unpack_from(">QQ", answer, 16 + 16 * i) for i in range(n_marks)]
        self.prime_out = answer[16 + 16 * n_marks :]
        upto = _decoder_stop(marks, len(self.prime_out))
        self._dec_proc = _CoderProcess("decode", order, mem)
        answer = self._dec_proc.call(struct.pack(">QQ", len(self.prime), upto) + self.prime + self.prime_out, budget)
        self.decoder_prime_s, self.decoder_primed = struct.unpack(">dQ", answer)

    def compress(self, data: bytes) -> bytes:
        data = bytes(data)
        if self._enc_proc is not None:
            return self._enc_proc.call(data, 2 * FORK_TIMEOUT_S + len(data) / 100_000)
        enc, prime_out, _ = _prime_encoder(self.prime, self.order, self.mem)
        if prime_out != self.prime_out:  # pragma: no cover - pyppmd would be nondeterministic
            raise RuntimeError("PPMd priming wrote other bytes than before")
        return _finish(enc, data)

    def decompress(self, blob: bytes) -> bytes:
        blob = bytes(blob)
        if self._dec_proc is not None:
            return self._dec_proc.call(blob, 2 * FORK_TIMEOUT_S + 16 * len(blob) / 100_000)
        return _decode_fresh(self.prime, self.prime_out, blob, self.order, self.mem)

    def close(self) -> None:
        """End the coder processes (also done when this object is collected, or at exit)."""
        for p in (self._enc_proc, self._dec_proc):
            if p is not None:
                p.close()


def ppmd_primed_baseline(train_files: Sequence[bytes], fork: bool | None = None,
                         budget: int = PRIME_BUDGET_BYTES) -> Baseline:
    """ppmd-o16-primed: PPMd order 16 primed with the train files (up to `budget`
    bytes). `fork` None forks where the platform can (see `PrimedPpmd`)."""
    name = "ppmd-o16-primed"
    prime, n_files = prime_text(train_files, budget)
    if not prime:
        plain = _ppmd(name, PPMD_PRIMED_ORDER, PPMD_PRIMED_MEM_BYTES)
        plain.note = f"no train bytes: not primed, coded as plain PPMd order {PPMD_PRIMED_ORDER}"
        plain.side_data = b""
        return plain
    coder = PrimedPpmd(prime, PPMD_PRIMED_ORDER, PPMD_PRIMED_MEM_BYTES, fork)
    cut = " (budget reached)" if len(prime) >= budget else ""
    if coder.forked:
        how = (f"encoder and decoder primed once, each in a process of its own ({coder.encoder_prime_s:.1f} s "
               f"and {coder.decoder_prime_s:.1f} s, not counted); each file is coded by a fork of the primed "
               "process (fork, copy-on-write and passing the bytes counted in encode/decode s)")
    else:
        how = "primed afresh for every file (priming counted in encode/decode s)"
    note = (f"prime: {len(prime):,} bytes of {n_files:,} train files{cut}, coded to {len(coder.prime_out):,} "
            f"bytes (= model bytes); {how}")
    return Baseline(name, coder.compress, coder.decompress, len(coder.prime_out), note,
                    side_data=coder.prime_out)


# ---- building them ----------------------------------------------------------------


def make_baseline(name: str, train_files: Sequence[bytes] | None = None,
                  prime_files: Sequence[bytes] | None = None) -> Baseline:
    """Build the baseline called `name` (one of ALL_NAMES).

    `train_files` is used by "zstd-19-dict" (trained dictionary); `prime_files`
    (default: `train_files`) by "zstd-19-rawdict" (raw dictionary) and
    "ppmd-o16-primed" (prime), which take up to PRIME_BUDGET_BYTES of them. Raises
    KeyError for an unknown name and ImportError when its library is missing.
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
    if prime_files is None:
        prime_files = train_files
    if name == "zstd-19-rawdict":
        return _zstd_rawdict(prime_files or [])
    if name == "ppmd-o16-primed":
        return ppmd_primed_baseline(prime_files or [])
    if name == "brotli-11":
        return _brotli(name, 22)
    if name == "brotli-11-w24":
        return _brotli(name, BROTLI_WIDE_LGWIN)
    if name == "ppmd-o8":
        return _ppmd(name, 8)
    return _ppmd(name, 16)  # ppmd-o16


def make_baselines(names: Sequence[str], train_files: Sequence[bytes] | None = None,
                   prime_files: Sequence[bytes] | None = None) -> list[Baseline]:
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
        out.append(make_baseline(name, train_files, prime_files))
    return out


def default_baselines(train_files: Sequence[bytes], prime_files: Sequence[bytes] | None = None) -> list[Baseline]:
    """The default comparison set (DEFAULT_NAMES); `train_files` feed the zstd
    dictionaries and the PPMd prime (`prime_files`, if given, the last two)."""
    return make_baselines(DEFAULT_NAMES, train_files, prime_files)
