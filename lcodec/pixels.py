"""Image frames: one frame holds one image's content (docs/FORMAT.md, "Image frames").

The content is `prefix | pixel region | suffix`, where the pixel region holds
rows x columns x channels samples of 1 or 2 bytes, interleaved, in raster order. The
frame payload is a small plain descriptor of that layout followed by one range-coder
stream: first the prefix and suffix bytes (coded with the built-in strata model, one
lane), then the samples (coded with the pixel model in wavefront order).
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import constriction
import numpy as np

from .container import read_uvarint, uvarint
from .errors import DataError, ModelError
from .models.tessel import FLAG_BIG_ENDIAN, FLAG_SIGNED, MAX_SAMPLES, PAYLOAD_VERSION

FLAG_RECORD = 4  # the content is a pixel record (pixel-exact); else the file's own bytes
REPLICATED_VERSION = 2  # payload version of a frame whose samples are an exact block replication
MAX_REPEAT = 16  # the largest replication factor looked for (per axis)

_FAMILY = constriction.stream.model.Categorical(perfect=False)


@dataclass(frozen=True)
class Layout:
    offset: int  # prefix length
    rows: int
    cols: int
    channels: int
    bps: int  # bytes per sample: 1 or 2
    flags: int = 0  # FLAG_BIG_ENDIAN, FLAG_SIGNED (2-byte samples), FLAG_RECORD
    rep_rows: int = 1  # every sample repeats over blocks of rep_rows x rep_cols (1, 1: none)
    rep_cols: int = 1

    @property
    def region_len(self) -> int:
        return self.rows * self.cols * self.channels * self.bps

    @property
    def deep(self) -> bool:
        return self.bps == 2

    def check(self, raw_len: int) -> None:
        ok = (self.rows >= 1 and self.cols >= 1 and 1 <= self.channels <= 4 and self.bps in (1, 2)
              and 0 <= self.flags <= 7 and (self.bps == 2 or self.flags & 3 == 0)
              and self.rows * self.cols * self.channels <= MAX_SAMPLES
              and 0 <= self.offset and self.offset + self.region_len <= raw_len
              and 1 <= self.rep_rows <= MAX_REPEAT and 1 <= self.rep_cols <= MAX_REPEAT
              and self.rows % self.rep_rows == 0 and self.cols % self.rep_cols == 0)
        if not ok:
            raise ValueError("impossible image layout")

    @property
    def replicated(self) -> bool:
        return (self.rep_rows, self.rep_cols) != (1, 1)

    def descriptor(self) -> bytes:
        head = (self.offset, self.rows, self.cols, self.channels, self.bps, self.flags)
        if self.replicated:
            return bytes([REPLICATED_VERSION]) + b"".join(uvarint(x) for x in head + (self.rep_rows, self.rep_cols))
        return bytes([PAYLOAD_VERSION]) + b"".join(uvarint(x) for x in head)


def _repeat_factor(same: np.ndarray) -> int:
    """The largest f <= MAX_REPEAT dividing len(same) + 1 such that every line not at a
    multiple of f equals the line before it (same[k - 1]: line k equals line k - 1)."""
    n = len(same) + 1
    k = np.arange(1, n)
    for f in range(min(MAX_REPEAT, n), 1, -1):
        if n % f == 0 and same[k % f != 0].all():
            return f
    return 1


def replication(v: np.ndarray) -> tuple[int, int]:
    """(rows, columns) factors of an exact block replication of samples v (rows, cols,
    channels): every sample equal to the one above it except on rows at multiples of the
    first factor, and likewise for columns; (1, 1) for an image that is not one."""
    same_r = (v[1:] == v[:-1]).all(axis=(1, 2))
    same_c = (v[:, 1:] == v[:, :-1]).all(axis=(0, 2))
    return _repeat_factor(same_r), _repeat_factor(same_c)


def _dtype(lay: Layout):
    if lay.bps == 1:
        return np.dtype(np.uint8)
    return np.dtype(">u2" if lay.flags & FLAG_BIG_ENDIAN else "<u2")


def region_values(raw, lay: Layout) -> np.ndarray:
    """The pixel region as model samples (rows, cols, channels): uint8, or uint16 with signed
    samples mapped to unsigned order (x xor 0x8000)."""
    a = np.frombuffer(raw, _dtype(lay), count=lay.rows * lay.cols * lay.channels, offset=lay.offset)
    a = a.reshape(lay.rows, lay.cols, lay.channels)
    if lay.bps == 2:
        a = a.astype(np.uint16)
        if lay.flags & FLAG_SIGNED:
            a = a ^ np.uint16(0x8000)
    return a


def values_region(v: np.ndarray, lay: Layout) -> bytes:
    if lay.bps == 1:
        return v.astype(np.uint8).tobytes()
    a = v.astype(np.uint16)
    if lay.flags & FLAG_SIGNED:
        a = a ^ np.uint16(0x8000)
    return a.astype(_dtype(lay)).tobytes()


def side_bytes(raw, lay: Layout) -> bytes:
    return bytes(raw[:lay.offset]) + bytes(raw[lay.offset + lay.region_len:])


def encode_image_frame(model, raw: bytes, lay: Layout) -> tuple[bytes, float, float]:
    """(payload, NLL bits of the side bytes, NLL bits of the samples)."""
    lay.check(len(raw))
    enc = constriction.stream.queue.RangeEncoder()
    side = side_bytes(raw, lay)
    nll_side = nll_pix = 0.0
    if side:
        arr = np.frombuffer(side, np.uint8)
        for syms, tab in model.teacher_chunks(arr, np.zeros(1, np.int64), np.array([len(arr)], np.int64)):
            if len(syms):
                enc.encode(np.ascontiguousarray(syms, np.int32), _FAMILY, np.ascontiguousarray(tab, np.float64))
                nll_side += _nll(syms, tab)
    v = region_values(raw, lay)
    fr, fc = replication(v)
    if (fr, fc) != (1, 1):  # code one sample of each block; the decoder repeats it
        lay = replace(lay, rep_rows=fr, rep_cols=fc)
        v = np.ascontiguousarray(v[::fr, ::fc])
    for syms, tab in model.teacher_tables(v, lay.deep):
        enc.encode(np.ascontiguousarray(syms, np.int32), _FAMILY, tab)
        nll_pix += _nll(syms, tab)
    words = np.asarray(enc.get_compressed(), "<u4").tobytes()
    return lay.descriptor() + words, nll_side, nll_pix


def _nll(syms, tab) -> float:
    chosen = tab[np.arange(len(syms)), syms]
    return float(-np.log2(chosen / tab.sum(axis=1)).sum())


def read_descriptor(payload, raw_len: int) -> tuple[Layout, int]:
    mv = memoryview(payload)
    if len(mv) < 1 or mv[0] not in (PAYLOAD_VERSION, REPLICATED_VERSION):
        raise DataError("image frame damaged (unknown image payload version)")
    pos, vals = 1, []
    for _ in range(6 if mv[0] == PAYLOAD_VERSION else 8):  # offset rows cols channels bytes flags [rep_rows rep_cols]
        x, pos = read_uvarint(mv, pos, "image frame damaged")
        vals.append(x)
    if mv[0] == REPLICATED_VERSION and vals[6:] == [1, 1]:
        raise DataError("image frame damaged (replication factors 1 x 1)")
    lay = Layout(*vals)
    try:
        lay.check(raw_len)
    except ValueError:
        raise DataError("image frame damaged (impossible image layout)") from None
    if (len(mv) - pos) % 4:
        raise DataError("image frame damaged (coded words are not whole 32-bit words)")
    return lay, pos


def decode_image_frame(model, payload, raw_len: int, record=None) -> bytes:
    lay, pos = read_descriptor(payload, raw_len)
    if not model.has_depth(lay.deep):
        raise ModelError(f"this model has no network for {8 * lay.bps}-bit samples")
    words = np.frombuffer(bytes(payload[pos:]), "<u4").astype(np.uint32)
    dec = constriction.stream.queue.RangeDecoder(words)
    n_side = raw_len - lay.region_len
    side = np.empty(n_side, np.uint8)
    if n_side:
        step = model.stepper(np.array([n_side], np.int64))
        prev = np.zeros(1, np.int32)
        try:
            for t in range(n_side):
                tab = np.ascontiguousarray(step(prev, 1 if t else 0, 1), np.float64)
                s = dec.decode(_FAMILY, tab)
                side[t] = s[0]
                prev[0] = s[0]
        finally:
            if hasattr(step, "close"):
                step.close()
    v = model.step_decode(lay.rows // lay.rep_rows, lay.cols // lay.rep_cols, lay.channels, lay.deep,
                          lambda tab: dec.decode(_FAMILY, np.ascontiguousarray(tab, np.float64)), record)
    if lay.replicated:
        v = np.repeat(np.repeat(v, lay.rep_rows, axis=0), lay.rep_cols, axis=1)
    region = values_region(v, lay)
    sb = side.tobytes()
    return sb[:lay.offset] + region + sb[lay.offset:]
