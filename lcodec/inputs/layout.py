"""Image layouts: where an image file's samples lie (docs/FORMAT.md, "Image frames").

An image content is `prefix | pixel region | suffix`, where the pixel region holds
rows x columns x channels samples of 1 or 2 bytes, interleaved, in raster order. A
`Layout` says where the region is and how its samples are stored; its plain descriptor
opens every image frame's payload. The readers of image formats (inputs/images.py) find
layouts; the image frame kind (frames/imageframe.py) codes the samples they describe.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import DataError
from ..format.container import read_uvarint, uvarint
from ..models.tessel_common import FLAG_BIG_ENDIAN, FLAG_SIGNED, MAX_SAMPLES, PAYLOAD_VERSION

FLAG_RECORD = 4  # the content is a pixel record (pixel-exact); else the file's own bytes
FLAG_NETS_ONLY = 8  # the samples were coded with the model's networks alone, without its per-image stages
REPLICATED_VERSION = 2  # payload version of a frame whose samples are an exact block replication
BANDED_VERSION = 3  # payload version of a frame whose samples are coded in bands (one stream each)
MAX_REPEAT = 16  # the largest replication factor looked for (per axis)
MAX_BANDS = 64  # bands a reader accepts in one image frame
# The encoder's band rule: an image of S coded samples and R coded rows gets the largest power
# of two bands at most min(S // BAND_SAMPLES, R // BAND_MIN_ROWS, BAND_LIMIT) (none below 2).
# A band restarts the per-image adaptive stages and sees no row above it, so every band costs
# a little size; it buys a decoder thread. Powers of two share out evenly over 2, 4, 8 or 16
# threads (3 bands on 2 threads take as long as 4). Every band walks a whole wavefront (columns
# + 2 x rows steps), and each step's Python runs under the GIL, so fewer, larger bands decode
# faster in threads: a 1-megapixel 16-bit image in 2 threads took 3.8 s in 2 bands and 4.2-4.3
# s in 4. Chosen by measurement (docs/notes/model-tessel.md, "Bands"): a 2-megapixel grey
# photograph costs +0.04% in 2 or 4 bands, +0.14% in 8 and +0.44% in 16.
BAND_SAMPLES = 1 << 19
BAND_MIN_ROWS = 128
BAND_LIMIT = 16

@dataclass(frozen=True)
class Layout:
    offset: int  # prefix length
    rows: int
    cols: int
    channels: int
    bps: int  # bytes per sample: 1 or 2
    flags: int = 0  # FLAG_BIG_ENDIAN, FLAG_SIGNED (2-byte samples), FLAG_RECORD, FLAG_NETS_ONLY
    rep_rows: int = 1  # every sample repeats over blocks of rep_rows x rep_cols (1, 1: none)
    rep_cols: int = 1
    bands: int = 1  # horizontal bands of the coded rows, each its own coder stream (1: one stream)
    band_words: tuple = ()  # read from a frame: the 32-bit word counts of streams 0 .. bands-2

    @property
    def region_len(self) -> int:
        return self.rows * self.cols * self.channels * self.bps

    @property
    def deep(self) -> bool:
        return self.bps == 2

    def check(self, raw_len: int) -> None:
        ok = (self.rows >= 1 and self.cols >= 1 and 1 <= self.channels <= 4 and self.bps in (1, 2)
              and 0 <= self.flags <= 15 and (self.bps == 2 or self.flags & 3 == 0)
              and self.rows * self.cols * self.channels <= MAX_SAMPLES
              and 0 <= self.offset and self.offset + self.region_len <= raw_len
              and 1 <= self.rep_rows <= MAX_REPEAT and 1 <= self.rep_cols <= MAX_REPEAT
              and self.rows % self.rep_rows == 0 and self.cols % self.rep_cols == 0
              and 1 <= self.bands <= min(MAX_BANDS, self.rows // self.rep_rows)
              and len(self.band_words) == (self.bands - 1 if self.band_words else 0))
        if not ok:
            raise ValueError("impossible image layout")

    @property
    def replicated(self) -> bool:
        return (self.rep_rows, self.rep_cols) != (1, 1)

    @property
    def coded_rows(self) -> int:
        return self.rows // self.rep_rows

    def band_bounds(self) -> list[tuple[int, int]]:
        """(first, end) coded row of each band: band b holds rows b R // B .. (b+1) R // B."""
        R, B = self.coded_rows, self.bands
        return [(b * R // B, (b + 1) * R // B) for b in range(B)]

    def descriptor(self, band_words=()) -> bytes:
        """The plain descriptor; a banded layout's needs the word counts of its streams but
        the last (band_words)."""
        head = (self.offset, self.rows, self.cols, self.channels, self.bps, self.flags)
        if self.bands > 1:
            if len(band_words) != self.bands - 1:
                raise ValueError("a banded descriptor needs the word counts of all streams but the last")
            return bytes([BANDED_VERSION]) + b"".join(
                uvarint(x) for x in head + (self.rep_rows, self.rep_cols, self.bands, *band_words))
        if self.replicated:
            return bytes([REPLICATED_VERSION]) + b"".join(uvarint(x) for x in head + (self.rep_rows, self.rep_cols))
        return bytes([PAYLOAD_VERSION]) + b"".join(uvarint(x) for x in head)


def choose_bands(rows: int, cols: int, channels: int) -> int:
    """How many bands the encoder codes an image of this coded size in (1: one stream)."""
    most = min(rows * cols * channels // BAND_SAMPLES, rows // BAND_MIN_ROWS, BAND_LIMIT)
    return 1 << (most.bit_length() - 1) if most > 1 else 1


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


def read_descriptor(payload, raw_len: int) -> tuple[Layout, int]:
    """(layout, where the coded words start). A banded layout carries its streams' word
    counts (all but the last) in band_words."""
    mv = memoryview(payload)
    if len(mv) < 1 or mv[0] not in (PAYLOAD_VERSION, REPLICATED_VERSION, BANDED_VERSION):
        raise DataError("image frame damaged (unknown image payload version)")
    pos, vals = 1, []
    # offset rows cols channels bytes flags [rep_rows rep_cols [bands]]
    for _ in range({PAYLOAD_VERSION: 6, REPLICATED_VERSION: 8, BANDED_VERSION: 9}[mv[0]]):
        x, pos = read_uvarint(mv, pos, "image frame damaged")
        vals.append(x)
    if mv[0] == REPLICATED_VERSION and vals[6:] == [1, 1]:
        raise DataError("image frame damaged (replication factors 1 x 1)")
    words = ()
    if mv[0] == BANDED_VERSION:
        if not 2 <= vals[8] <= MAX_BANDS:
            raise DataError(f"image frame damaged ({vals[8]} bands: a banded frame has 2 to {MAX_BANDS})")
        w = []
        for _ in range(vals[8] - 1):
            x, pos = read_uvarint(mv, pos, "image frame damaged")
            w.append(x)
        words = tuple(w)
    lay = Layout(*vals, band_words=words)
    try:
        lay.check(raw_len)
    except ValueError:
        raise DataError("image frame damaged (impossible image layout)") from None
    if (len(mv) - pos) % 4:
        raise DataError("image frame damaged (coded words are not whole 32-bit words)")
    if 4 * sum(words) > len(mv) - pos:
        raise DataError("image frame damaged (its band streams claim more words than it holds)")
    return lay, pos
