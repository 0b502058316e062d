"""tessel's fixed predictors and its colour helpers (numba, integers only): the sample of a
chroma plane (`_pv`), gradient-adjusted prediction (`_gap`) and the 15-level quantiser of the
colour mode rct-grad (`_q16`). Used by lcodec/models/tessel.py's `_context`."""
from numba import njit


@njit(cache=True, nogil=True)
def _pv(v, r, c, ch, sub):
    """A sample of the plane being coded: channel ch, or with `sub` its difference from channel 0
    of the same pixel (the colour mode's chroma planes)."""
    return v[r, c, ch] - v[r, c, 0] if sub else v[r, c, ch]


@njit(cache=True, nogil=True)
def _gap(W, WW, N, NW, NE, NN, NNE, s):
    """Gradient-adjusted prediction (from CALIC, Wu and Memon, 1997; thresholds 80, 32, 8 as
    recalled from memory), the thresholds times s (16 for 16-bit samples, chosen on the same-kind
    bench's training tiles): horizontal and vertical gradient sums pick W, N, or the
    interpolation (W + N) / 2 + (NE - NW) / 4 pulled toward W or N. Floors throughout."""
    dh = abs(W - WW) + abs(N - NW) + abs(N - NE)
    dv = abs(W - NW) + abs(N - NN) + abs(NE - NNE)
    d = dv - dh
    if d > 80 * s:
        return W
    if -d > 80 * s:
        return N
    p = ((W + N) >> 1) + ((NE - NW) >> 2)
    if d > 32 * s:
        return (p + W) >> 1
    if d > 8 * s:
        return (3 * p + W) >> 2
    if -d > 32 * s:
        return (p + N) >> 1
    if -d > 8 * s:
        return (3 * p + N) >> 2
    return p


@njit(cache=True, nogil=True)
def _q16(d):
    """A signed difference in 15 levels 1..15: 8 for 0, then 8 +- the bit length of |d| (at most 7)."""
    a = d if d >= 0 else -d
    b = 0
    while a and b < 7:
        b += 1
        a >>= 1
    return 8 + b if d >= 0 else 8 - b
