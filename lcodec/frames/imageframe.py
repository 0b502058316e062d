"""The image frame kind: one frame holds one image's content (docs/FORMAT.md, "Image frames").

The content is `prefix | pixel region | suffix` (inputs/layout.py). The frame payload is
the layout's plain descriptor followed by one range-coder stream: first the prefix and
suffix bytes (coded with the built-in strata model, one lane), then the samples (coded
with the pixel model in wavefront order).
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import constriction
import numpy as np

from ..coding import CheckedDecoder, CheckedEncoder
from ..errors import ModelError
from ..format import container as C
from ..inputs.layout import Layout, read_descriptor, region_values, replication, side_bytes, values_region

_FAMILY = constriction.stream.model.Categorical(perfect=False)


@dataclass(frozen=True)
class ImageWork:
    """One image frame's work: its content (the file's own bytes, or its pixel record) and
    where the samples lie. Plain data, so any runner (a worker process, a cluster) takes it."""

    data: bytes
    layout: Layout
    guarantee: str  # "byte-exact" (the file's bytes) or "pixel-exact" (a pixel record)
    kind: str  # the input format's name (png, tiff, ...)

    def __len__(self) -> int:
        return len(self.data)


def code_image(model, work: ImageWork) -> tuple[bytes, float, bool, dict | None]:
    """One image frame -> (record, NLL bits, stored?, the image's figures or None).
    A byte-exact image that does not shrink is stored; a pixel record never is (its
    frame says that unpack rebuilds a file)."""
    raw, lay = work.data, work.layout
    coded, nll_side, nll_pix = encode_image_frame(model, raw, lay)
    if len(coded) >= len(raw) and work.guarantee == "byte-exact":
        return C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw)), 8.0 * len(raw), True, None
    figures = {"kind": work.kind, "guarantee": work.guarantee, "samples": lay.rows * lay.cols * lay.channels,
               "bits": 8 * lay.bps, "coded_bytes": len(coded), "side_bytes": len(raw) - lay.region_len,
               "nll_side_bits": nll_side, "nll_pixel_bits": nll_pix}
    return C.frame_record(len(raw), coded, C.METHOD_IMAGE, 1, C.crc32c(raw)), nll_side + nll_pix, False, figures


def encode_image_frame(model, raw: bytes, lay: Layout, checks: bool = True) -> tuple[bytes, float, float]:
    """(payload, NLL bits of the side bytes, NLL bits of the samples). checks: with
    sub-frame checks (what container version 3 holds)."""
    lay.check(len(raw))
    enc = constriction.stream.queue.RangeEncoder()
    if checks:
        enc = CheckedEncoder(enc)
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


def decode_image_frame(model, payload, raw_len: int, record=None, checks: bool = True) -> bytes:
    """checks: the words carry sub-frame checks (container version 3); the first that
    fails raises SubframeCheckFailed and decoding stops there."""
    lay, pos = read_descriptor(payload, raw_len)
    if not model.has_depth(lay.deep):
        raise ModelError(f"this model has no network for {8 * lay.bps}-bit samples")
    words = np.frombuffer(bytes(payload[pos:]), "<u4").astype(np.uint32)
    dec = constriction.stream.queue.RangeDecoder(words)
    if checks:
        dec = CheckedDecoder(dec)
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
