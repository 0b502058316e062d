"""The integer kernels of `heddle` (models/heddle.py): requantisation, residual sums and the
softmax head through the exponential table. numba, integers only, no fastmath.

Every kernel works row by row on its own, so the result does not depend on how rows are
batched or split between threads. The bounds are stated next to each product; heddle's
loader checks them for every op of a model file.
"""
from __future__ import annotations

import numpy as np
from numba import njit

ACT_MAX = 127  # activations: ReLU outputs 0..127; embeddings -127..127
SUM_LIMIT = 1 << 24  # float32 holds every integer below this exactly


@njit(cache=True, nogil=True)
def requant_relu(acc, b, m, s, out):
    """out[i, j] = clamp(((acc[i, j] + b[j]) * m[j] + 2**(s-1)) >> s, 0, 127).
    acc comes from an exact float32 product: |acc| < 2**24; |b| < 2**24 and 0 < m < 2**31,
    so the product stays below 2**56."""
    half = np.int64(1) << (s - 1)
    for i in range(acc.shape[0]):
        for j in range(acc.shape[1]):
            v = ((np.int64(acc[i, j]) + b[j]) * m[j] + half) >> s
            out[i, j] = np.float32(min(max(v, 0), ACT_MAX))


@njit(cache=True, nogil=True)
def add_logits(acc, b, out):
    """out[i, j] = acc[i, j] + b[j] (the logits: no scale, no clamp; |out| < 2**25)."""
    for i in range(acc.shape[0]):
        for j in range(acc.shape[1]):
            out[i, j] = np.int64(acc[i, j]) + b[j]


@njit(cache=True, nogil=True)
def residual(a, b, ma, mb, s, out):
    """out = clamp((a * ma + b * mb + 2**(s-1)) >> s, 0, 127); a, b in 0..127 and
    ma, mb < 2**31: the sum stays below 2**39."""
    half = np.int64(1) << (s - 1)
    for i in range(a.shape[0]):
        for j in range(a.shape[1]):
            v = (np.int64(a[i, j]) * ma + np.int64(b[i, j]) * mb + half) >> s
            out[i, j] = np.float32(min(max(v, 0), ACT_MAX))


@njit(cache=True, nogil=True)
def softmax_lut(lg, mo, so, lut, width, out):
    """out[i, :A] = lut[min(((max_i - lg[i, a]) * mo + 2**(so-1)) >> so, len(lut) - 1)],
    out[i, A:width] = 1 (symbols outside the alphabet: codable, at a high cost).
    |lg| < 2**25, so max - lg < 2**26 and the product with mo < 2**31 stays below 2**57."""
    half = np.int64(1) << (so - 1)
    last = lut.shape[0] - 1
    A = lg.shape[1]
    for i in range(lg.shape[0]):
        mx = lg[i, 0]
        for a in range(1, A):
            mx = max(mx, lg[i, a])
        for a in range(A):
            k = ((mx - lg[i, a]) * mo + half) >> so
            out[i, a] = np.float64(lut[min(k, last)])
        for a in range(A, width):
            out[i, a] = 1.0


def column_bound(w2d: np.ndarray) -> int:
    """The largest sum of |w| over one output column: 127 times it bounds every partial sum
    of that column's product (|x| <= 127)."""
    if w2d.size == 0:
        return 0
    return int(np.abs(w2d.astype(np.int64)).sum(axis=0).max())
