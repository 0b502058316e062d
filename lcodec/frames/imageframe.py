"""The image frame kind: one frame holds one image's content (docs/FORMAT.md, "Image frames").

The content is `prefix | pixel region | suffix` (inputs/layout.py). The frame payload is
the layout's plain descriptor followed by one range-coder stream: first the prefix and
suffix bytes (coded with the built-in strata model, one lane), then the samples (coded
with the pixel model in wavefront order). A large image is coded in horizontal bands
(`layout.choose_bands`), each band as an image of its own in a stream of its own (the side
bytes open the first), so that workers can code and decode the bands side by side (forked
processes, frames/forked.py; threads where forking is not safe).
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import constriction
import numpy as np

from ..coding import CheckedDecoder, CheckedEncoder
from ..errors import DataError, ModelError
from ..format import container as C
from . import forked
from ..inputs.layout import (FLAG_NETS_ONLY, Layout, choose_bands, read_descriptor, region_values, replication,
                             side_bytes, values_region)

_FAMILY = constriction.stream.model.Categorical(perfect=False)


@dataclass(frozen=True)
class ImageWork:
    """One image frame's work: its content (the file's own bytes, or its pixel record) and
    where the samples lie. Plain data, so any runner (a worker process, a cluster) takes it."""

    data: bytes
    layout: Layout
    guarantee: str  # "byte-exact" (the file's bytes) or "pixel-exact" (a pixel record)
    kind: str  # the input format's name (png, tiff, ...)
    workers: int = 1  # a large image's bands coded by that many forked processes (pack --jobs, lone image)

    def __len__(self) -> int:
        return len(self.data)


def code_image(model, work: ImageWork) -> tuple[bytes, float, bool, dict | None]:
    """One image frame -> (record, NLL bits, stored?, the image's figures or None).
    A byte-exact image that does not shrink is stored; a pixel record never is (its
    frame says that unpack rebuilds a file)."""
    raw, lay = work.data, work.layout
    coded, nll_side, nll_pix = encode_image_frame(model, raw, lay, workers=work.workers)
    if len(coded) >= len(raw) and work.guarantee == "byte-exact":
        return C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw)), 8.0 * len(raw), True, None
    figures = {"kind": work.kind, "guarantee": work.guarantee, "samples": lay.rows * lay.cols * lay.channels,
               "bits": 8 * lay.bps, "coded_bytes": len(coded), "side_bytes": len(raw) - lay.region_len,
               "nll_side_bits": nll_side, "nll_pixel_bits": nll_pix}
    return C.frame_record(len(raw), coded, C.METHOD_IMAGE, 1, C.crc32c(raw)), nll_side + nll_pix, False, figures


def encode_image_frame(model, raw: bytes, lay: Layout, checks: bool = True, bands: int | None = None,
                       workers: int = 1) -> tuple[bytes, float, float]:
    """(payload, NLL bits of the side bytes, NLL bits of the samples). checks: with
    sub-frame checks (what container version 3 holds). bands: how many bands to code the
    samples in (None: `choose_bands`, the encoder's rule; tests and measurements pick).
    workers: the bands are coded by that many forked processes where forking is safe (the
    same bytes; otherwise one after another here)."""
    lay.check(len(raw))
    side = side_bytes(raw, lay)
    arr = np.frombuffer(side, np.uint8)

    def side_coded():
        """A fresh encoder holding the side bytes, and their NLL bits."""
        e, nll = _encoder(checks), 0.0
        if side:
            for syms, tab in model.teacher_chunks(arr, np.zeros(1, np.int64), np.array([len(arr)], np.int64)):
                if len(syms):
                    e.encode(np.ascontiguousarray(syms, np.int32), _FAMILY, np.ascontiguousarray(tab, np.float64))
                    nll += _nll(syms, tab)
        return e, nll

    v = region_values(raw, lay)
    fr, fc = replication(v)
    if (fr, fc) != (1, 1):  # code one sample of each block; the decoder repeats it
        lay = replace(lay, rep_rows=fr, rep_cols=fc)
        v = np.ascontiguousarray(v[::fr, ::fc])
    n_bands = choose_bands(*v.shape) if bands is None else bands
    lay = replace(lay, bands=n_bands)
    lay.check(len(raw))
    bounds = lay.band_bounds()
    workers = min(workers, n_bands)
    stop = forked.shared_array((1,), np.uint8) if workers > 1 else np.zeros(1, np.uint8)
    # a model file with stages_min_gain: its stages must make the coded samples that many
    # ten-thousandths smaller, else the image is coded with the networks alone. Both codings
    # run in one pass (the networks' tables are the stages' input) and the sizes decide: an
    # integer test, so the choice is the same on every machine.
    gain = getattr(model, "stages_min_gain", None)  # (pixel models of the layer kit have no stages)
    weigh = gain is not None and model.has_stages(lay.deep)
    enc, nll_side = side_coded()
    enc2 = side_coded()[0] if weigh else None

    def band(b: int) -> tuple:
        """Band b's stream (band 0's opens with the side bytes) and NLL bits of its samples;
        when weighed, also the stream and NLL bits with the networks alone."""
        r0, r1 = bounds[b]
        e, nll = (enc if b == 0 else _encoder(checks)), 0.0
        e2, nll2 = ((enc2 if b == 0 else _encoder(checks)) if weigh else None), 0.0
        rows = np.ascontiguousarray(v[r0:r1])
        for item in (model.teacher_tables(rows, lay.deep, with_bare=True) if weigh
                     else model.teacher_tables(rows, lay.deep)):
            if stop[0]:
                raise forked.Stopped
            syms = np.ascontiguousarray(item[0], np.int32)
            e.encode(syms, _FAMILY, item[1])
            nll += _nll(item[0], item[1])
            if weigh:
                e2.encode(syms, _FAMILY, np.ascontiguousarray(item[2], np.float64))
                nll2 += _nll(item[0], item[2])
        words = np.asarray(e.get_compressed(), "<u4").tobytes()
        return (words, nll) + ((np.asarray(e2.get_compressed(), "<u4").tobytes(), nll2) if weigh else ())

    if workers > 1 and BAND_PROCESSES and _fork_ready():
        done = forked.in_processes(band, n_bands, workers, stop)
    else:
        done = [band(b) for b in range(n_bands)]
    if weigh:
        staged, bare = sum(len(d[0]) for d in done), sum(len(d[2]) for d in done)
        if (bare - staged) * 10000 < gain * staged:
            done = [(d[2], d[3]) for d in done]
            lay = replace(lay, flags=lay.flags | FLAG_NETS_ONLY)
    streams = [d[0] for d in done]
    head = lay.descriptor([len(w) // 4 for w in streams[:-1]])
    return head + b"".join(streams), nll_side, sum(d[1] for d in done)


def _encoder(checks: bool):
    enc = constriction.stream.queue.RangeEncoder()
    return CheckedEncoder(enc) if checks else enc


def _nll(syms, tab) -> float:
    chosen = tab[np.arange(len(syms)), syms]
    return float(-np.log2(chosen / tab.sum(axis=1)).sum())


def decode_image_frame(model, payload, raw_len: int, record=None, checks: bool = True, threads: int = 1) -> bytes:
    """checks: the words carry sub-frame checks (container version 3); the first that
    fails raises SubframeCheckFailed and decoding stops there. threads: a banded frame's
    bands are decoded side by side by that many threads (the samples are the same);
    `record` (a list: every table, in coding order) decodes them one after another."""
    lay, pos = read_descriptor(payload, raw_len)
    if not model.has_depth(lay.deep):
        raise ModelError(f"this model has no network for {8 * lay.bps}-bit samples")
    if lay.flags & FLAG_NETS_ONLY and getattr(model, "stages_min_gain", None) is None:
        raise DataError("image frame damaged (coded with the networks alone, which this model never does)")
    words = np.frombuffer(bytes(payload[pos:]), "<u4").astype(np.uint32)
    cuts = np.cumsum((0, *lay.band_words, len(words) - sum(lay.band_words)))
    decoders = [_decoder(words[a:b], checks) for a, b in zip(cuts[:-1], cuts[1:])]
    n_side = raw_len - lay.region_len
    side = np.empty(n_side, np.uint8)
    if n_side:
        dec = decoders[0]
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
    cols, C = lay.cols // lay.rep_cols, lay.channels
    workers = 1 if record is not None else min(threads, lay.bands)
    stop = forked.shared_array((1,), np.uint8) if workers > 1 else np.zeros(1, np.uint8)

    def band(b: int, r0: int, r1: int) -> np.ndarray:
        dec = decoders[b]

        def decode(tab):
            if stop[0]:
                raise forked.Stopped
            return dec.decode(_FAMILY, np.ascontiguousarray(tab, np.float64))
        if lay.flags & FLAG_NETS_ONLY:
            return model.step_decode(r1 - r0, cols, C, lay.deep, decode, record, stages=False)
        return model.step_decode(r1 - r0, cols, C, lay.deep, decode, record)

    bounds = lay.band_bounds()
    if workers <= 1:
        parts = [band(b, r0, r1) for b, (r0, r1) in enumerate(bounds)]
        v = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=0)
    elif BAND_PROCESSES and _fork_ready():
        v = forked.shared_array((lay.coded_rows, cols, C), np.int32)
        forked.bands_in_processes(band, bounds, workers, v, stop)
    else:
        v = np.concatenate(_side_by_side(band, bounds, workers, stop), axis=0)
    if lay.replicated:
        v = np.repeat(np.repeat(v, lay.rep_rows, axis=0), lay.rep_cols, axis=1)
    region = values_region(v, lay)
    sb = side.tobytes()
    return sb[:lay.offset] + region + sb[lay.offset:]


def _decoder(words, checks: bool):
    dec = constriction.stream.queue.RangeDecoder(np.ascontiguousarray(words))
    return CheckedDecoder(dec) if checks else dec


# A banded frame's bands go to forked processes where forking is safe (frames/forked.py
# says why processes), else to threads; tests switch this off to try the threads.
BAND_PROCESSES = True


def _fork_ready() -> bool:
    """Whether the bands may go to forked workers; an encoder's idle helper thread (left by
    `pack --verify`, or an earlier pack in this process) is ended first."""
    from ..models.weft import close_pool

    close_pool()
    return forked.may_fork()


def _side_by_side(band, bounds, threads: int, stop: np.ndarray) -> list:
    """Every band decoded by a pool of `threads` threads (the calling thread waits). The first
    failure, or an interruption of the waiting thread, sets stop[0], which stops the other
    bands at their next step; the failure of the lowest band that failed is raised."""
    from concurrent.futures import FIRST_EXCEPTION, ThreadPoolExecutor, wait

    from ..models.tessel_common import limit_blas

    limit_blas()  # in the calling thread too: a limit asked only inside the pool is not always seen
    pool = ThreadPoolExecutor(threads, thread_name_prefix="lcodec-band")
    futs = []
    try:
        futs = [pool.submit(band, b, r0, r1) for b, (r0, r1) in enumerate(bounds)]
        wait(futs, return_when=FIRST_EXCEPTION)
    except BaseException:
        stop[0] = 1
        raise
    finally:
        if any(f.done() and f.exception() is not None for f in futs):
            stop[0] = 1
        pool.shutdown(wait=True, cancel_futures=True)
    for f in futs:
        if not f.cancelled() and f.exception() is not None and not isinstance(f.exception(), forked.Stopped):
            raise f.exception()
    return [f.result() for f in futs]
