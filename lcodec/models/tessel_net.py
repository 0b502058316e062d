"""tessel's first layer without the gather and the first product (the numpy backend).

weft's `NumpyKernels.tables` gathers each sub-symbol's 15 embedding rows into a float32
input row and multiplies it by w1. In tessel every input slot reads only its own rows of the
embedding table (slot s: rows s*Q .. s*Q+Q-1; the last slot the rows from HI_SLOT*Q on), so
emb[row] @ (the block of w1 of its slot) can be computed once per row at load
(`slot_products`, in int64: exact), and a sub-symbol's accumulator is b1 plus the sum of its
15 rows of that table. The float32 product is exact (every partial sum below 2**24, the
bound checked at load), so this integer sum is the same integer; then the ReLU
requantisation exactly as weft's `_requant`, the second product and the table as in weft
(float32 product, `_softmax_lut`): the same tables, bit for bit.
"""
from __future__ import annotations

import numpy as np
from numba import njit

from .weft import _in_halves, _softmax_lut


def slot_products(emb: np.ndarray, w1: np.ndarray, q: int, hi_slot: int) -> np.ndarray:
    """(rows of emb, hidden) int32: row r of emb times the block of w1 of its slot
    (slot min(r // q, hi_slot)), in int64 (exact), |value| <= 127 * 127 * embed."""
    E = emb.shape[1]
    slot = np.minimum(np.arange(emb.shape[0]) // q, hi_slot)
    w = w1.astype(np.int64).reshape(-1, E, w1.shape[1])  # (slots, embed, hidden)
    P = np.einsum("re,reh->rh", emb.astype(np.int64), w[slot])
    return P.astype(np.int32)


@njit(cache=True, nogil=True)
def _hidden(idx, P, b1, m1, s1, acc, h):
    """h[n] = the hidden layer of the sub-symbol with embedding rows idx[n]: weft's `_requant`
    of b1 plus the sum of the rows' products (float32, 0..127). b1 int32; acc int32 scratch
    (hidden); every idx value must be a row of P (the callers make them so)."""
    H = P.shape[1]
    half = np.int64(1) << (s1 - 1)
    for n in range(idx.shape[0]):
        for j in range(H):
            acc[j] = b1[j]
        for s in range(idx.shape[1]):
            r = idx[n, s]
            for j in range(H):
                acc[j] += P[r, j]  # |b1| < 2**24 plus a sum below 2**24: < 2**25
        for j in range(H):
            # bound: |acc| < 2**25, m1 < 2**31: the product < 2**56
            v = (np.int64(acc[j]) * m1 + half) >> s1
            h[n, j] = np.float32(min(max(v, 0), 127))


class FusedNet:
    """One role's network: `tables(idx)` is weft's NumpyKernels.tables(idx) for tessel's
    embedding rows, the first layer through `slot_products` and `_hidden`, the second layer and
    the table as there (float32 product, `_softmax_lut`). Scratch per call: the object may serve
    threads side by side."""

    def __init__(self, kernels, q: int, hi_slot: int):
        p = kernels.p
        self.P = slot_products(kernels.emb, kernels.w1, q, hi_slot)
        self.b1 = kernels.b1.astype(np.int32)  # |b1| < 2**24 (checked at load)
        self.m1, self.s1, self.mo, self.so = p["m1"], p["s1"], p["mo"], p["so"]
        self.w2, self.b2, self.lut = kernels.w2, kernels.b2, kernels.lut

    def tables(self, idx: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        n, H = len(idx), self.P.shape[1]
        idx = np.ascontiguousarray(idx)
        h = np.empty((n, H), np.float32)
        # the encoder's chunks in two threads (`_in_halves`), rows on their own: the same integers
        _in_halves(n, lambda a, b: _hidden(idx[a:b], self.P, self.b1, self.m1, self.s1, np.empty(H, np.int32), h[a:b]))
        # bound: 0 <= h <= 127, |w2| <= 127, hidden terms: every partial sum < 2**24, exact
        lg = h @ self.w2
        if out is None:
            out = np.empty((n, 256), np.float64)
        _in_halves(n, lambda a, b: _softmax_lut(lg[a:b], self.b2, self.mo, self.so, self.lut, out[a:b]))
        return out
