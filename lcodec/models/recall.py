"""`recall`: braid's corpus memory. The training text itself, and a predictor that
follows the place in it where the current context occurred before. Integer-only.

A braid model file may carry `memory`: training text, deduplicated (`lcodec train
--memory SIZE`, lcodec/braid_train.py). At load, two hash indexes are built over it
(`build_index`), never stored: for every position i of the text with i % STEP == 0,
the hash of the n bytes before i points at i (the byte that followed them), n being
the short length `recall_min` in one index and the long length `recall_long` in the
other; a later position overwrites an earlier one with the same hash (the index
holds about one position per STEP bytes of text, rounded up to a power of two).

Coding a lane, after each byte (`update`):

  * a followed place that predicted the byte moves on (ptr + 1, run + 1); one that
    did not is kept past the miss (ptr + 1, run 0, misses + 1) if its run was at least
    RECOVER_RUN bytes and it has missed fewer than MAX_MISSES times, else dropped:
    a text that differs from its earlier copy in a byte (a date, a version, a name)
    goes on matching after it;
  * while no place is followed, or the run is shorter than `recall_long`, the lane's
    last `recall_long` (then `recall_min`) bytes are looked up, the candidate is
    verified backwards against the lane's own bytes (at most VERIFY bytes), and taken
    when it agrees over at least the looked-up length and longer than the current run.

Predicting (`predict`), the followed place names a byte e = text[ptr], and e's
probability in the table p (after the chain and the in-frame repeat model) becomes
the hit rate of its cell: (run length in RUN_CLASSES classes, whether the in-frame
repeat model follows a repeat and names the same byte or another, misses so far,
and e's probability level in p, by halvings towards 0 and towards 1). Cells count hits and trials in this frame, started
from the model file's `recall_prior` (fitted on held-out files) or from no change;
they are shared by a frame's lanes. A cell's estimate is (hits * total + k * pe) /
(trials + k), k = max(SHRINK - trials, 0): while a cell has seen fewer than SHRINK
trials, the missing ones count at e's probability before it, so a cell that has seen
nothing changes nothing. Everything is an integer; the text and the
indexes are read-only, shared by lanes, frames and threads.
"""
from __future__ import annotations

from collections import namedtuple

import numpy as np

from . import strata as S
from .kernel_cache import forget_if_changed, inlined, kernel

forget_if_changed(__file__, [S.__file__])  # kernels here inline those modules' kernels

STEP = 2  # positions indexed: every STEP-th, so a repeat is found at most STEP - 1 bytes late
VERIFY = 24  # bytes compared backwards when a candidate is checked (48 and 32 were worse by 0.1%)
RECOVER_RUN = 16  # a place that predicted this many bytes in a row survives a miss
MAX_MISSES = 8  # ... until it has missed this often
RUN_CLASSES = 28  # run lengths 0..15, then two classes per doubling up to 768+
AGREE = 3  # the in-frame repeat model: follows nothing, names the same byte, another
MISS_CLASSES = 4  # misses so far: 0, 1, 2, 3+
LEVELS = 16  # e's probability in the table before: 16 levels, by halvings (level_of)
CELLS = RUN_CLASSES * AGREE * MISS_CLASSES * LEVELS
LIMIT = 4095  # cell counts are halved past this, to keep adapting
SHRINK = 16  # a cell with fewer trials counts e's probability before it as the missing ones
MIN_LEN = (4, 8)  # recall_min's range
LONG_LEN = (9, 16)  # recall_long's range
MAX_TEXT = (1 << 32) - 2  # positions are uint32, 0 means empty
INDEX_MIN_BITS = 10

_K = np.uint64(0x2545F4914F6CDD1D)


@inlined
def _hash(lo, hi, n):
    """Hash of the last n bytes (lo: the last 8, most recent in the low byte; hi: the 8
    before them), a 64-bit number whose top bits index a table."""
    if n < 8:
        lo = lo & np.uint64((1 << (8 * n)) - 1)
        hi = np.uint64(0)
    elif n < 16:
        hi = hi & np.uint64((1 << (8 * (n - 8))) - 1)
    x = (lo + np.uint64(n)) * S._M1
    x = x ^ (x >> np.uint64(29))
    x = (x + hi * _K) * S._M2
    return x ^ (x >> np.uint64(32))


def index_bits(n_text: int) -> int:
    """log2 of an index's slots: one per STEP bytes of text, rounded up."""
    return max(INDEX_MIN_BITS, int(max(n_text // STEP, 1) - 1).bit_length())


@kernel
def _fill(text, n, index, shift):
    lo = np.uint64(0)
    hi = np.uint64(0)
    for i in range(text.shape[0]):
        if i >= n and i % STEP == 0:
            index[np.int64(_hash(lo, hi, n) >> np.uint64(shift))] = np.uint32(i)
        hi = (hi << np.uint64(8)) | (lo >> np.uint64(56))
        lo = (lo << np.uint64(8)) | np.uint64(text[i])


def build_index(text: np.ndarray, n: int) -> np.ndarray:
    """The index of `text` for contexts of n bytes (uint32 positions, 0 = empty)."""
    bits = index_bits(len(text))
    index = np.zeros(1 << bits, np.uint32)
    if len(text) > n:
        _fill(text, n, index, 64 - bits)
    return index


Recall = namedtuple("Recall", [
    "on",          # 1 when the model has a memory, else 0 (every other field a placeholder)
    "text",        # uint8: the memory
    "short",       # uint32 index of recall_min-byte contexts
    "long",        # uint32 index of recall_long-byte contexts
    "min_len", "long_len",  # the two context lengths
    "short_shift", "long_shift",  # 64 - log2 of each index's size
    "ptr",         # per lane: position in text of the byte the followed place predicts, or -1
    "run",         # per lane: bytes predicted in a row (at the find: the verified length)
    "misses",      # per lane: misses of the followed place
    "older",       # per lane: the 8 bytes before the last 8 (uint64, as braid's history)
    "cells",       # int32 (CELLS, 2): hits, trials
    "cell",        # per lane: the cell used at the prediction, or -1
    "pred",        # per lane: the byte named at the prediction, or -1
])


def new_state(text, short, long, min_len: int, long_len: int, n_lanes: int, prior=None) -> Recall:
    """One frame's state (lanes, cells) over the shared text and indexes; text None: off."""
    nl = max(n_lanes, 1)
    cells = np.zeros((CELLS, 2), np.int32)  # no trials: no change
    if prior is not None:
        cells[:] = prior
    if text is None:
        text, short, long = np.zeros(1, np.uint8), np.zeros(1, np.uint32), np.zeros(1, np.uint32)
        on, ss, ls = 0, 63, 63
    else:
        on = 1
        ss = 64 - int(len(short)).bit_length() + 1
        ls = 64 - int(len(long)).bit_length() + 1
    return Recall(on, text, short, long, min_len, long_len, ss, ls, np.full(nl, -1, np.int64),
                  np.zeros(nl, np.int64), np.zeros(nl, np.int64), np.zeros(nl, np.uint64), cells,
                  np.full(nl, -1, np.int64), np.full(nl, -1, np.int64))


@inlined
def run_class(n):
    """0..15 as they are, then two classes per doubling: 16-23, 24-31, 32-47, ..., 768+."""
    if n < 16:
        return n
    k = 0
    m = n
    while m > 1:
        m >>= 1
        k += 1  # k = floor(log2 n) >= 4
    c = 16 + 2 * (k - 4) + ((n >> (k - 1)) & 1)
    return min(c, RUN_CLASSES - 1)


@inlined
def level_of(pe, total):
    """e's share q = pe / total in 16 levels by halvings: 0 for q below 1/256, 1 from 1/256,
    ..., 6 from 1/8, 7 from 1/4, 8 from 1/2; then by the rest 1 - q: 9 below 1/4, 10 below
    1/8, ..., 15 below 1/256. (Near certainty is where a repeat's cost is decided; equal
    steps of q were 0.4% worse.) pe, total < 2**22: every product stays below 2**31."""
    rest = total - pe
    if 2 * pe >= total:
        lev = 8
        while lev < LEVELS - 1 and rest * (np.int64(1) << (lev - 6)) < total:
            lev += 1
        return lev
    lev = 7
    while lev > 0 and pe * (np.int64(1) << (9 - lev)) < total:
        lev -= 1
    return lev


@inlined
def expected(rc, b):
    """The byte lane b's followed place names, or -1."""
    if rc.on == 0 or rc.ptr[b] < 0:
        return -1
    return np.int64(rc.text[rc.ptr[b]])


@kernel
def predict(rc, b, p, repeat_byte):
    """p (the table so far) <- with the followed place's byte at its cell's hit rate.
    repeat_byte: the byte the in-frame repeat model follows, or -1."""
    rc.cell[b] = -1
    rc.pred[b] = -1
    if rc.on == 0 or rc.ptr[b] < 0:
        return
    e = np.int64(rc.text[rc.ptr[b]])
    rc.pred[b] = e
    total = np.int64(0)
    for s in range(256):
        total += p[s]
    pe = p[e]
    if total - pe < 1024:  # already (nearly) certain of e
        return
    agree = 0 if repeat_byte < 0 else (1 if repeat_byte == e else 2)
    cell = ((run_class(rc.run[b]) * AGREE + agree) * MISS_CLASSES + min(rc.misses[b], MISS_CLASSES - 1)) * LEVELS \
        + level_of(pe, total)
    rc.cell[b] = cell
    st = rc.cells[cell]
    # the cell's hits and trials, and while it has fewer than SHRINK trials the missing ones
    # at e's probability before it (a cell that has seen nothing changes nothing):
    # st[0] <= LIMIT, total < 2**22: < 2**35
    k = max(SHRINK - np.int64(st[1]), np.int64(0))
    S._give_mass(p, e, pe, total, (np.int64(st[0]) * total + k * pe) // (np.int64(st[1]) + k))


@kernel
def _verify(text, q, buf, start, cur):
    """How many bytes before text[q] agree with the lane's bytes up to buf[cur] (at most VERIFY)."""
    n = 0
    while n < VERIFY:
        a = q - 1 - n
        c = cur - n
        if a < 0 or c < start or text[a] != buf[c]:
            break
        n += 1
    return n


@inlined
def touch(rc, b, sym, before):
    """A first read of the index entries update(rc, b, ..., sym, before) will look up: the
    same hashes, nothing written. The steps read every lane's entries in one pass, so
    their loads overlap instead of waiting one lane at a time."""
    if rc.on == 0:
        return np.uint32(0)
    hist = (before << np.uint64(8)) | np.uint64(sym)
    older = (rc.older[b] << np.uint64(8)) | (before >> np.uint64(56))
    h1 = _hash(hist, older, rc.long_len)
    h2 = _hash(hist, older, rc.min_len)
    return np.uint32(rc.long[h1 >> np.uint64(rc.long_shift)]) ^ np.uint32(rc.short[h2 >> np.uint64(rc.short_shift)])


@kernel
def update(rc, b, buf, start, t, sym, before):
    """After lane b coded sym (at buf[start + t]; before: its history without sym):
    score the cell, move or drop the followed place, look for a better one. Reads only
    the lane's bytes up to step t."""
    if rc.on == 0:
        return
    cur = start + t
    if rc.cell[b] >= 0:
        S._score_cell(rc.cells[rc.cell[b]], rc.pred[b] == sym, LIMIT)
    rc.older[b] = (rc.older[b] << np.uint64(8)) | (before >> np.uint64(56))
    hist = (before << np.uint64(8)) | np.uint64(sym)
    n_text = rc.text.shape[0]
    q = rc.ptr[b]
    if q >= 0:
        if np.int64(rc.text[q]) == sym:
            rc.run[b] += 1
        elif rc.run[b] >= RECOVER_RUN and rc.misses[b] < MAX_MISSES:
            rc.run[b] = 0
            rc.misses[b] += 1
        else:
            q = -1
        if q >= 0:
            q += 1
            if q >= n_text:
                q = -1
        rc.ptr[b] = q
        if q < 0:
            rc.run[b] = 0
            rc.misses[b] = 0
    have = t + 1  # the lane's bytes so far
    if q >= 0 and rc.run[b] >= rc.long_len:
        return
    for k in range(2):
        n = rc.long_len if k == 0 else rc.min_len
        if have < n:
            continue
        h = _hash(hist, rc.older[b], n)
        c = np.int64(rc.long[h >> np.uint64(rc.long_shift)]) if k == 0 \
            else np.int64(rc.short[h >> np.uint64(rc.short_shift)])
        if c == 0 or c >= n_text:
            continue
        v = _verify(rc.text, c, buf, start, cur)
        if v >= n and (rc.ptr[b] < 0 or v > rc.run[b]):
            rc.ptr[b] = c
            rc.run[b] = v
            rc.misses[b] = 0
            return
