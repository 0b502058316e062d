"""Counting a corpus into braid's tables (numpy and numba; no torch).

For every position of every file, the order-k context is the k bytes before it, with
zero bytes standing in before the file's start (the same convention the coder's lane
histories use). The highest corpus order keeps raw counts; every lower order keeps
continuation counts: the number of distinct (order k+1 context, byte) pairs whose
order-k part is this (context, byte). Contexts seen fewer than `min_seen` times are
left out of orders >= 2 (the file's own tables and the lower orders cover them), and a
row whose largest count passes 255 is scaled down to fit one byte, every seen byte
keeping at least 1.
"""
from __future__ import annotations

import numpy as np
from numba import njit

from ..models import braid as B

LOAD = 0.6  # hash-table load factor: at most this share of slots is used


def contexts(data: np.ndarray, pos_in_file: np.ndarray, k: int) -> np.ndarray:
    """uint64 order-k context of every position (most recent byte in the low 8 bits)."""
    ctx = np.zeros(len(data), np.uint64)
    for j in range(1, min(k, 8) + 1):
        prev = np.zeros(len(data), np.uint64)
        prev[j:] = data[:-j]
        prev[pos_in_file < j] = 0
        ctx |= prev << np.uint64(8 * (j - 1))
    return ctx


@njit(cache=True)
def _insert(tags, base, size, x):
    """Put hash x's tag in its home slot or the next free one (linear probing); -1 when
    the same tag is already in the table (two contexts alike in 32 bits: keep the first)."""
    tag = np.uint32(((x >> np.uint64(8)) & np.uint64(0xFFFFFFFF)) | np.uint64(1))
    j = base + np.int64(((x >> np.uint64(32)) * np.uint64(size)) >> np.uint64(32))
    end = base + size
    while tags[j] != 0:
        if tags[j] == tag:
            return -1
        j += 1
        if j == end:
            j = base
    tags[j] = tag
    return j


@njit(cache=True)
def _fill(tags, start_len, base, size, ctx_hash, row_first, row_len):
    """Insert each row's context; start_len[slot] = (first entry, entry count)."""
    kept = np.zeros(ctx_hash.shape[0], np.bool_)
    for r in range(ctx_hash.shape[0]):
        j = _insert(tags, base, size, ctx_hash[r])
        if j >= 0:
            start_len[j, 0] = row_first[r]
            start_len[j, 1] = row_len[r]
            kept[r] = True
    return kept


def _ranges(first: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Concatenation of arange(first[i], first[i] + n[i]) over i."""
    n = np.asarray(n, np.int64)
    total = int(n.sum())
    if total == 0:
        return np.zeros(0, np.int64)
    offs = np.concatenate([[0], np.cumsum(n)[:-1]])
    return np.repeat(np.asarray(first, np.int64) - offs, n) + np.arange(total, dtype=np.int64)


def build(files: list[bytes], corpus_order: int = 6, min_seen: int = 2, discount=None, echo=None) -> dict:
    """Count `files` into the arrays of a braid model file."""
    lens = [len(f) for f in files]
    data = np.frombuffer(b"".join(files), np.uint8)
    pos_in_file = np.arange(len(data), dtype=np.int64) - np.repeat(np.cumsum([0] + lens[:-1]), lens)
    sym = data.astype(np.uint64)
    per_order = []
    positions = None  # positions whose (context, byte) pairs order k counts (None: all)
    for k in range(corpus_order, -1, -1):
        x = B.ctx_hash_np(contexts(data, pos_in_file, k), k)
        # pair key: the context's hash with its low 8 bits (unused by tags and slots) set
        # to the byte, so sorting groups rows together and bytes within a row
        pair = (x & ~np.uint64(0xFF)) | sym
        sel = pair if positions is None else pair[positions]
        keys, first, cnt = np.unique(sel, return_index=True, return_counts=True)
        if positions is not None:
            first = positions[first]
        row_key = keys >> np.uint64(8)
        bounds = np.flatnonzero(np.diff(row_key)) + 1
        row_first = np.concatenate([[0], bounds])
        row_len = np.diff(np.concatenate([row_first, [len(keys)]]))
        if k >= 2 and min_seen > 1:
            ctx_keys, seen = np.unique(x >> np.uint64(8), return_counts=True)
            seen_of_row = seen[np.searchsorted(ctx_keys, row_key[row_first])]
            keep_row = seen_of_row >= min_seen
        else:
            keep_row = np.ones(len(row_first), bool)
        per_order.append((k, keys, cnt, row_first, row_len, keep_row))
        positions = np.sort(first)  # the first occurrence of each (order-k context, byte)
        if echo:
            echo(f"  order {k}: {int(keep_row.sum()):,} contexts kept of {len(row_first):,}, "
                 f"{int(row_len[keep_row].sum()):,} (context, byte) pairs")
    per_order.reverse()
    sizes, tag_parts, len_parts, syms, cnts = [], [], [], [], []
    for k, keys, cnt, row_first, row_len, keep_row in per_order:
        rf, rl = row_first[keep_row], row_len[keep_row]
        size = max(2, int(np.ceil(len(rf) / LOAD)) + 1)
        idx = _ranges(rf, rl)  # entries of the kept rows, row after row
        c = cnt[idx].astype(np.int64)
        local_first = np.concatenate([[0], np.cumsum(rl)[:-1]]).astype(np.int64)
        mx = np.maximum.reduceat(c, local_first) if len(rf) else np.zeros(0, np.int64)
        m = np.repeat(mx, rl)
        scaled = np.where(m > 255, np.maximum(1, (c * 255 + m // 2) // np.maximum(m, 1)), c)
        tags = np.zeros(size, np.uint32)
        start_len = np.zeros((size, 2), np.int64)
        # the row's hash: the pair key with its low 8 bits cleared (tags and slots ignore them)
        _fill(tags, start_len, 0, size, keys[rf] & ~np.uint64(0xFF), local_first, rl.astype(np.int64))
        used = np.flatnonzero(tags != 0)
        order = _ranges(start_len[used, 0], start_len[used, 1])  # entries in slot order
        syms.append((keys[idx[order]] & np.uint64(0xFF)).astype(np.uint8))
        cnts.append(scaled[order].astype(np.uint8))
        slot_len = np.zeros(size, np.int64)
        slot_len[used] = start_len[used, 1]
        sizes.append(size)
        tag_parts.append(tags)
        len_parts.append(slot_len)
    tags = np.concatenate(tag_parts)
    start = np.zeros(len(tags) + 1, np.uint32)
    start[1:] = np.cumsum(np.concatenate(len_parts))
    if discount is None:
        discount = [[13, 18, 24]] * (corpus_order + 1)
    return {"tags": tags, "start": start, "sym": np.concatenate(syms), "cnt": np.concatenate(cnts),
            "sizes": np.array(sizes, np.int64), "corpus_discount": np.array(discount, np.int64)}


# -- the corpus memory (model files with `memory`: lcodec/models/recall.py) -----------------
# The text is deduplicated before it is stored: every file is cut into pieces where a
# rolling hash of its bytes has its low CHUNK_BITS bits zero (content-defined cut points,
# so a piece shared by two files is cut the same way in both, wherever it sits), at least
# CHUNK_MIN and at most CHUNK_MAX bytes long, and a piece whose bytes were already kept is
# left out. A file that repeats another (a licence, a template) then costs the memory
# nothing; what is left of it still sits beside the rest of its file.
CHUNK_BITS = 10  # cut points about every 1 KiB
CHUNK_MIN = 128
CHUNK_MAX = 8192
_GEAR = np.random.Generator(np.random.PCG64(20261204)).integers(0, 2**63, 256, dtype=np.int64).astype(np.uint64)


@njit(cache=True)
def _cuts(data, gear, bits, lo, hi):
    """End offsets of data's pieces: where the rolling hash (h << 1) + gear[byte] has its low
    `bits` bits zero, at least lo and at most hi bytes after the last cut."""
    out = np.empty(data.shape[0] // lo + 2, np.int64)
    n = 0
    h = np.uint64(0)
    mask = np.uint64((1 << bits) - 1)
    last = 0
    for i in range(data.shape[0]):
        h = (h << np.uint64(1)) + gear[data[i]]
        ln = i + 1 - last
        if (ln >= lo and (h & mask) == 0) or ln >= hi:
            out[n] = i + 1
            n += 1
            last = i + 1
            h = np.uint64(0)
    if last < data.shape[0]:
        out[n] = data.shape[0]
        n += 1
    return out[:n]


def memory_text(files: list[bytes], budget: int) -> tuple[np.ndarray, dict]:
    """The corpus memory: `files`' text with repeated pieces left out, at most `budget` bytes
    (when the unique text is larger: the most files, evenly spaced across the list, that
    fit; at least the first file, cut at the budget). Returns (uint8 text, summary figures)."""
    import hashlib

    seen, kept, total = set(), [], 0
    for f in files:
        if not f:
            continue
        x = np.frombuffer(f, np.uint8)
        parts, a = [], 0
        for b in _cuts(x, _GEAR, CHUNK_BITS, CHUNK_MIN, CHUNK_MAX).tolist():
            key = hashlib.blake2b(f[a:b], digest_size=16).digest()
            if key not in seen:
                seen.add(key)
                parts.append(f[a:b])
            a = b
        if parts:
            kept.append(b"".join(parts))
            total += len(kept[-1])
    unique = total
    if budget <= 0:
        kept = []
    elif total > budget:  # about the most files, evenly spaced, that fit (a binary search on
        n = len(kept)     # their number); at least the first one, cut
        def pick(m):
            return sorted({j * n // m for j in range(m)})
        lo, hi = 1, n
        while lo < hi:
            mid = (lo + hi + 1) // 2
            if sum(len(kept[i]) for i in pick(mid)) <= budget:
                lo = mid
            else:
                hi = mid - 1
        kept = [kept[i] for i in pick(lo)]
    text = b"".join(kept)[:max(budget, 0)]
    summary = {"files": sum(1 for f in files if f), "bytes": sum(len(f) for f in files), "unique_bytes": unique,
               "stored_bytes": len(text)}
    return np.frombuffer(text, np.uint8), summary
