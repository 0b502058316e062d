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
    crc = C.crc32c
    for q in range(lo, hi):
        if not _head_checks(mv, q, crc):
            continue  # the cheap test: no record head whose CRC-32C checks starts here
        fr = record_at(mv, q)
        if fr is not None:
            found[q] = fr
            if len(found) >= MAX_SCAN_RECORDS:
                break
    return found


def _head_checks(data, pos: int, crc) -> bool:
    """Whether a version-3 record head (identity, then number, raw and coded lengths,
    method, lanes as varints of at most 8 bytes, then three CRC-32Cs) would fit at `pos`
    with its record CRC-32C matching: the test read_record makes first, without building
    messages or raising, so that trying every offset of a damaged file stays cheap. A
    True is confirmed by read_record (every other check)."""
    n = len(data)
    p = pos + C.ARCHIVE_ID_BYTES
    for field in range(4):  # frame number, raw length, coded length, then (after the method) lanes
        if field == 3:
            p += 1  # the method byte
        for i in range(8):
            if p >= n:
                return False
            p += 1
            if not data[p - 1] & 0x80:
                break
        else:
            return False
    if p + 12 > n:
        return False
    return crc(data[pos:p + 8]) == int.from_bytes(data[p + 8:p + 12], "little")


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


def pieces_in_order(mv, n: int):
    """No usable header: the version-3 records of the identity most records carry, by frame
    number (duplicates after the first intact one dropped), and the others."""
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
