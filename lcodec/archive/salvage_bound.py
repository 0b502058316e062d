"""Salvage of version-3 archives: records that name their frame and their archive.

A version-3 record begins with the archive's 8-byte identity (from its header) and its
frame number, both under the record's CRC-32C (docs/FORMAT.md). Salvage (archive/
salvage.py) uses both:

* the archive identity: records are found by looking for those 8 bytes (bytes.find, not
  a parse at every offset), and a record that carries another identity is never placed;
  it is listed as from another archive. When the header is damaged, the identity it
  would give is unproven, so every offset is tried and the identity most records carry
  is taken (ties: none is taken, nothing is placed);
* the frame number: a found record goes to the frame it names when that frame's raw
  length (from the header) matches; two records naming one frame place neither unless
  only one of them is intact.
"""
from __future__ import annotations

import bisect
from collections import Counter

import numpy as np

from ..errors import DataError
from ..format import container as C

MAX_SCAN_RECORDS = 1_000_000  # records found by scanning: a hostile file cannot make this unbounded


def record_at(mv, pos: int):
    """The version-3 record at `pos` whose head checks (any archive), or None."""
    try:
        return C.read_record(mv, pos, -1, None, C.VERSION_BOUND)
    except DataError:
        return None


def record_end(fr) -> int:
    """Where the record ends (its coded bytes included)."""
    return fr.payload_offset + fr.coded_len


def intact(fr) -> bool:
    """The record's coded bytes match their CRC-32C (so its extent is right)."""
    return C.crc32c(fr.payload) == fr.coded_crc


def scan(mv, lo: int, hi: int, aid: bytes | None) -> dict:
    """{offset: Frame} of every version-3 record head in [lo, hi) that checks; with `aid`,
    only where those 8 bytes are."""
    found = {}
    lo = max(lo, 0)
    if aid is not None:
        data = bytes(mv[lo:hi])
        j = data.find(aid)
        while j >= 0 and len(found) < MAX_SCAN_RECORDS:
            fr = record_at(mv, lo + j)
            if fr is not None:
                found[lo + j] = fr
            j = data.find(aid, j + 1)
        return found
    for q in head_offsets(mv, lo, hi, True):  # the cheap test, every offset at once
        fr = record_at(mv, q)
        if fr is not None:
            found[q] = fr
            if len(found) >= MAX_SCAN_RECORDS:
                break
    return found


HEAD_MAX = C.ARCHIVE_ID_BYTES + 4 * 8 + 1 + 12  # the longest record head (version 3): 53 bytes
SCAN_BLOCK = 1 << 20  # offsets tested together (numpy arrays of this many entries)


def head_offsets(data, lo: int, hi: int, bound: bool) -> list[int]:
    """The offsets q in [lo, hi) where a record head (version 3 when `bound`, else versions 1
    and 2) fits with a method read_record accepts and its record CRC-32C matching: the
    cheap test of an every-offset scan, made for all offsets at once. numpy finds where the
    varints end (at most 8 bytes each, as read_uvarint reads them) and reads the method
    byte and the stored CRC-32C; only the offsets that pass have their CRC-32C computed.
    Every condition is one read_record checks, so it refuses every offset this drops; a
    kept offset is confirmed by read_record (every other check). The reference is
    read_record at every offset (tests/test_salvage.py compares them). Arrays are compared
    with np.less and np.less_equal, not `<`: atheris' hook on comparison operators keeps
    every numpy array it sees (65 MB per 20 passes over the fuzzing corpus, measured), which
    ended a fuzzing run at its memory limit."""
    n = len(data)
    lo, hi = max(lo, 0), min(hi, n)
    allowed = np.zeros(256, dtype=bool)
    allowed[[m for m in C.METHOD_NAMES if not (bound and m == C.METHOD_STACK)]] = True
    crc = C.crc32c
    out = []
    for b0 in range(lo, hi, SCAN_BLOCK):
        b1 = min(hi, b0 + SCAN_BLOCK)
        w_end = min(n, b1 + HEAD_MAX)  # every head that starts before b1 ends inside the window
        a = np.frombuffer(data[b0:w_end], dtype=np.uint8)
        m = len(a)
        ends = np.flatnonzero(np.less(a, 0x80))  # where a varint can end
        if not len(ends):
            continue
        p = np.arange(b1 - b0, dtype=np.int64) + (C.ARCHIVE_ID_BYTES if bound else 0)
        ok = np.ones(len(p), dtype=bool)
        for field in range(3 if bound else 2):  # (frame number,) raw length, coded length; lanes below
            p, ok = _varint_ends(ends, p, ok, m)
        method = a[np.minimum(p, m - 1)]
        ok &= np.less(p, m) & allowed[method]
        p, ok = _varint_ends(ends, p + 1, ok, m)  # lanes, after the method byte
        ok &= np.less_equal(p + 12, m)
        q = np.flatnonzero(ok)
        if not len(q):
            continue
        e = p[q]
        stored = (a[e + 8].astype(np.uint32) | a[e + 9].astype(np.uint32) << 8 | a[e + 10].astype(np.uint32) << 16
                  | a[e + 11].astype(np.uint32) << 24)
        out.extend(b0 + x for x, y, c in zip(q.tolist(), e.tolist(), stored.tolist()) if crc(a[x:y + 8]) == c)
    return out


def _varint_ends(ends, p, ok, m):
    """Where the varints starting at `p` end (one past their last byte), and `ok` cleared
    where one does not end within 8 bytes inside the window of length m."""
    k = np.searchsorted(ends, p)
    e = ends[np.minimum(k, len(ends) - 1)]
    ok = ok & np.less(k, len(ends)) & np.less(e - p, 8)
    return np.where(ok, e + 1, m), ok


def majority_id(heads: dict) -> bytes | None:
    """The archive identity most found records carry (None on a tie or when none is found)."""
    counts = Counter(fr.archive_id for fr in heads.values()).most_common(2)
    if not counts or (len(counts) > 1 and counts[0][1] == counts[1][1]):
        return None
    return counts[0][0]


def place(mv, first: int, lay, aid: bytes | None):
    """Frame number -> record for a version-3 archive. Returns (placed {index: Frame},
    foreign [Frame] (another archive's records), unplaced [Frame], trailing bytes after
    the last frame when every frame was walked from the header, the identity used)."""
    n = len(mv)
    placed, pos, i = {}, first, 0
    if aid is not None:  # walk from the header while records follow one another
        while i < lay.n:
            fr = record_at(mv, pos)
            if fr is None or fr.archive_id != aid or fr.number != i or fr.raw_len != lay.raw_len(i):
                break
            fr.index, fr.placed_by = i, "header"
            placed[i] = fr
            pos, i = record_end(fr), i + 1
        if i == lay.n:
            return placed, [], [], n - pos, aid
    heads = scan(mv, 6 if aid is None else pos, n, aid)  # a damaged header: its end is unproven too
    if aid is None:
        aid = majority_id(heads)
        if aid is None:
            return {}, [], list(heads.values()), 0, None
    spans = sorted((f.offset, record_end(f)) for f in placed.values() if intact(f))
    foreign, unplaced, cands = [], [], {}
    for q in sorted(heads):
        j = bisect.bisect_right(spans, (q, n + 1)) - 1
        if j >= 0 and spans[j][0] <= q < spans[j][1]:
            continue  # inside an intact record: its payload's bytes
        fr = heads[q]
        if fr.archive_id != aid:
            foreign.append(fr)
        elif fr.number < lay.n and fr.number not in placed and fr.raw_len == lay.raw_len(fr.number):
            cands.setdefault(fr.number, []).append(fr)
        elif fr.number not in placed or placed[fr.number].offset != q:
            unplaced.append(fr)
    for k, frs in cands.items():
        if len(frs) > 1:
            good = [f for f in frs if intact(f)]
            if len(good) != 1:
                unplaced.extend(frs)
                continue
            unplaced.extend(f for f in frs if f is not good[0])
            frs = good
        frs[0].index, frs[0].placed_by = k, "frame number"
        placed[k] = frs[0]
    # a record of another archive is found where one of ours ends and none of ours begins
    starts = {f.offset for f in placed.values()} | {f.offset for f in unplaced}
    for e in sorted({record_end(f) for f in placed.values()} | {first}):
        if e not in starts and e not in {f.offset for f in foreign}:
            fr = record_at(mv, e)
            if fr is not None and fr.archive_id != aid:
                foreign.append(fr)
    return placed, foreign, unplaced, 0, aid


def pieces_in_order(mv, n: int, heads: dict | None = None):
    """No usable header: the version-3 records of the identity most records carry, by frame
    number (duplicates after the first intact one dropped), and the others. heads: the
    every-offset scan of mv[:n] (scan(mv, 0, n, None)) when the caller has made it already."""
    if heads is None:
        heads = scan(mv, 0, n, None)
    aid = majority_id(heads)
    mine = sorted((fr for fr in heads.values() if fr.archive_id == aid), key=lambda f: (f.number, not intact(f)))
    out, seen = [], set()
    for fr in mine:
        if fr.number not in seen:
            seen.add(fr.number)
            out.append(fr)
    others = [fr for fr in heads.values() if fr.archive_id != aid]
    return out, others, aid
