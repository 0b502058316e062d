"""braid's layers: the corpus rows and the file's rows as layers of the chain, the
learned escape weights between them, and secondary estimation of the favourite byte.
Integer-only kernels; lcodec/models/braid.py explains the chain and runs them."""
from __future__ import annotations

import numpy as np

from . import strata as S
from .kernel_cache import forget_if_changed, inlined, kernel

forget_if_changed(__file__, [S.__file__])  # kernels here inline strata's kernels

P_BITS = S.P_BITS
F = S.F
_M1, _M2 = S._M1, S._M2


# -- the layers ----------------------------------------------------------------------------
# The chain P <- (n(s) - d(n(s)) + E * P) / T, applied layer after layer from the uniform
# distribution up, is linear in P, so it is evaluated from the top layer down instead:
#
#     P(s) = sum over layers l of A_l * (n_l(s) - d(n_l(s))) / T_l  +  A_bottom / 256
#
# with A_top = 1 and A below layer l = A_l * E_l / T_l. A layer then costs only its seen
# bytes (a stored corpus row holds a few), plus one pass over 256 bytes at the end. A is
# kept in fixed point with 31 fraction bits; every step floors.
ONE_A = 1 << 31
INV_BITS = 43  # inv = 2**43 // (T * F): at least 2**22 because T * F < 2**21


@inlined
def _row_totals(ent, a, b, a1, a2, a3):
    """A stored corpus row's total count t and escape mass (sum of its discounts)."""
    t = np.int64(0)
    esc = np.int64(0)
    for e in range(a, b):
        c = np.int64(ent[e] >> 8)
        t += c
        esc += a1 + a2 * (c >= 2) + a3 * (c >= 3)
    return t, esc


@inlined
def _sparse_layer(ent, a, b, disc, p, A):
    """Add one stored corpus row's share (entries a..b: byte | count << 8) to p; return
    the A left below it."""
    a1 = np.int64(disc[0])
    a2 = np.int64(disc[1]) - a1
    a3 = np.int64(disc[2]) - np.int64(disc[1])
    t, esc = _row_totals(ent, a, b, a1, a2, a3)
    if t == 0:
        return A
    # bound: a row has at most 256 entries of counts <= 255, so t * F < 2**21 and
    # inv <= 2**43 / F = 2**39; n = c * F - d < 2**12, so n * inv < 2**51 and w < 2**31
    # (n < t * F); A <= 2**31, so A * w < 2**62. esc < t * F likewise keeps A below 2**31.
    inv = (np.int64(1) << INV_BITS) // (t * F)
    for e in range(a, b):
        c = np.int64(ent[e] >> 8)
        n = c * F - (a1 + a2 * (c >= 2) + a3 * (c >= 3))
        w = (n * inv) >> (INV_BITS - 31)
        p[ent[e] & 0xFF] += (A * w) >> (62 - P_BITS)
    return (A * ((esc * inv) >> (INV_BITS - 31))) >> 31


# -- learned escape weights (optional: model files with `mix_shift`) ------------------------
# Each layer's escape share e = E / T is moved in the odds domain by a weight of its class
# (layer, distinct bytes seen, total count):  e' / (1 - e') = 2**(W / 64) * e / (1 - e),
# and the layer's own bytes share the rest, 1 - e'. The weights start from the model
# file's table (zero: the plain chain) and follow the gradient of the coded byte's log
# probability within the frame (online logistic mixing of each layer against everything
# below it), in integers: W in 1/2**WFRAC of a table step, clamped to +-WMAX steps.
WFRAC = 12
WMAX = 512  # table steps of 1/64 doubling: odds scaled by 2**-8 .. 2**8
N_LAYER_IDS = 18  # file orders 0..8, corpus orders 0..8
COUNT_CLASSES = N_LAYER_IDS * 16  # layer x distinct bytes (4 classes) x total count (4)
BYTE_CLASSES = 8  # kinds of the byte before: see _byte_class_table
BYTE_BASE = COUNT_CLASSES + N_LAYER_IDS * BYTE_CLASSES
AGE_CLASSES = 8  # steps since the file's row last saw its context: < 16, 64, ..., 2**16, more
AGE_BASE = BYTE_BASE + N_LAYER_IDS * 256
MIX_CLASSES = AGE_BASE + N_LAYER_IDS * AGE_CLASSES  # four weights per layer use, summed
LREC = 13  # per recorded layer: kind, slot, entry end, inv, A_own, e', class, order, class 2,
# byte before, class 3, age class, class 4


def _byte_class_table() -> np.ndarray:
    """0 newline, 1 space or tab, 2 lower-case letter, 3 upper-case, 4 digit, 5 quote or
    bracket, 6 other printable ASCII, 7 everything else."""
    t = np.full(256, 7, np.int64)
    for c in range(33, 127):
        t[c] = 6
    t[ord("\n")], t[ord("\r")] = 0, 0
    t[ord(" ")], t[ord("\t")] = 1, 1
    for c in range(ord("a"), ord("z") + 1):
        t[c] = 2
    for c in range(ord("A"), ord("Z") + 1):
        t[c] = 3
    for c in range(ord("0"), ord("9") + 1):
        t[c] = 4
    for c in "\"'()[]{}":
        t[ord(c)] = 5
    return t


BYTE_CLASS = _byte_class_table()


def _root64() -> list:
    """floor(2**60 * 2**(j / 64)) for j = 0..63, from Python integers only: six nested integer
    square roots of 2**(64 * 60 + j) (floor sqrt of floor sqrt is the floor of the fourth
    root, and so on), so every entry is exact."""
    from math import isqrt

    root = []
    for j in range(64):
        y = 1 << (64 * 60 + j)
        for _ in range(6):
            y = isqrt(y)
        root.append(y)
    return root


def _odds_table() -> np.ndarray:
    """M[i + WMAX] = floor(2**16 * 2**(i / 64)) for i in -WMAX..WMAX, from Python integers
    only: 2**(j / 64) is six nested integer square roots of 2**(64 * 60 + j), and floor
    sqrt of floor sqrt is floor of the fourth root, so every entry is exact."""
    root = _root64()
    out = np.empty(2 * WMAX + 1, np.int64)
    for i in range(-WMAX, WMAX + 1):
        q, j = divmod(i, 64)
        out[i + WMAX] = root[j] >> (44 - q)  # 2**(16 + q) * 2**(j / 64), floored: q >= -8, shift <= 52
    return out


ODDS = _odds_table()


@inlined
def _mix_class(lid, n1, t):
    qn = 0 if n1 <= 1 else (1 if n1 == 2 else (2 if n1 <= 5 else 3))
    qt = 0 if t <= 2 else (1 if t <= 7 else (2 if t <= 31 else 3))
    return lid * 16 + qn * 4 + qt


@inlined
def _mix_escape(mix, rec, esc, tf, inv, A, cls):
    """The layer's A_own (its bytes' share) and the A left below it, with the class's
    weight applied to the escape odds; both recorded in rec for the update."""
    W, odds = mix[0], mix[1]
    cls2 = COUNT_CLASSES + (cls >> 4) * BYTE_CLASSES + rec[8]
    cls3 = BYTE_BASE + (cls >> 4) * 256 + rec[9]
    cls4 = AGE_BASE + (cls >> 4) * AGE_CLASSES + rec[11]
    i = (W[cls] + W[cls2] + W[cls3] + W[cls4]) >> WFRAC
    i = min(max(i, -WMAX), WMAX)
    m = odds[i + WMAX]  # 2**8 .. 2**24
    own = tf - esc  # >= 1: every seen count gives at least 1/F
    num = esc * m  # esc < 2**21, m <= 2**24: < 2**45
    den = num + (own << 16)  # < 2**46
    if num < (np.int64(1) << 31):
        e31 = (num << 31) // den  # num << 31 < 2**62
    else:
        e31 = (num << 17) // (den >> 14)  # num << 17 < 2**62; den >> 14 >= 2**17
    e31 = min(e31, np.int64(ONE_A))
    own31 = (own * inv) >> (INV_BITS - 31)  # own * inv < 2**21 * 2**39 / ... < 2**61; >= 2**10
    A_own = (A * (ONE_A - e31)) // own31  # A * (..) <= 2**62; A_own * w_s <= 2**62 (w_s <= own31)
    rec[3] = inv
    rec[4] = A_own
    rec[5] = e31
    rec[6] = cls
    rec[8] = cls2
    rec[10] = cls3
    rec[12] = cls4
    return A_own, (A * e31) >> 31


@inlined
def _sparse_layer_mix(ent, a, b, disc, p, A, mix, rec, lid):
    a1 = np.int64(disc[0])
    a2 = np.int64(disc[1]) - a1
    a3 = np.int64(disc[2]) - np.int64(disc[1])
    t, esc = _row_totals(ent, a, b, a1, a2, a3)
    if t == 0:
        return A, False
    inv = (np.int64(1) << INV_BITS) // (t * F)  # bounds as _sparse_layer
    A_own, A_below = _mix_escape(mix, rec, esc, t * F, inv, A, _mix_class(lid, b - a, t))
    for e in range(a, b):
        c = np.int64(ent[e] >> 8)
        n = c * F - (a1 + a2 * (c >= 2) + a3 * (c >= 3))
        w = (n * inv) >> (INV_BITS - 31)
        p[ent[e] & 0xFF] += (A_own * w) >> (62 - P_BITS)
    return A_below, True


# The file's tables. Row r is one 64-byte line, meta[r] (uint32 fields: tag, total, how
# many counts are >= 1, 2, 3, the step it was last seen, its big row) whose last 32 bytes
# (m8[r, 32:64], the same memory as bytes) hold up to SMALL bytes seen, in the order they
# came, and their counts: most rows of the higher orders see a few bytes, so a row costs
# one cache line and a short frame touches few pages. The SMALL+1-th byte moves the row
# to a big row, big[meta[r, BIG] - 1] (counts[256], then the bytes seen in order), handed
# out in the order needed. Either way a row reads as the same counts and the same list,
# so the tables do not depend on the layout.
# The line is strata's (lcodec/models/strata.py): the same tag, total, distinct-byte
# fields, SMALL bytes and their counts, and the same helpers; braid adds its own fields.
TAG_LO, TAG_HI, TOT, N1 = S.TAG_LO, S.TAG_HI, S.TOT, S.DIST
N2, N3 = 4, 5  # how many counts are >= 2, >= 3
LAST = 6  # the lane step at which the row's context was last seen
BIG = 7  # 1 + the big row holding this row's counts, or 0 while they fit the line
META, SMALL, SYM0, CNT0 = S.META, S.SMALL, S.SYM0, S.CNT0
_tag_is = S._tag_is


@inlined
def _file_count(fs, r, s):
    """Row r's count of byte s."""
    big, meta, m8 = fs[0], fs[1], fs[7]
    g = np.int64(meta[r, BIG])
    if g:
        return np.int64(big[g - 1, s])
    return S._line_find(m8, r, np.int64(meta[r, N1]), s)[1]


@inlined
def _file_add(fs, r, p, A, inv, a1, a2, a3):
    """p[s] += A * w(s) for each byte s row r has seen (w: its discounted share)."""
    big, meta, m8 = fs[0], fs[1], fs[7]
    n1 = np.int64(meta[r, N1])
    g = np.int64(meta[r, BIG])
    for i in range(n1):
        if g:
            s = big[g - 1, 256 + i]
            c = np.int64(big[g - 1, s])
        else:
            s = m8[r, SYM0 + i]
            c = np.int64(m8[r, CNT0 + i])
        n = c * F - (a1 + a2 * (c >= 2) + a3 * (c >= 3))
        w = (n * inv) >> (INV_BITS - 31)
        p[s] += (A * w) >> (62 - P_BITS)


@inlined
def _file_terms(meta, r, disc):
    """File row r's discount steps a1..a3, bytes seen n1, total t, escape mass and inv."""
    a1 = np.int64(disc[0])
    a2 = np.int64(disc[1]) - a1
    a3 = np.int64(disc[2]) - np.int64(disc[1])
    n1 = np.int64(meta[r, N1])
    esc = a1 * n1 + a2 * np.int64(meta[r, N2]) + a3 * np.int64(meta[r, N3])
    t = np.int64(meta[r, TOT])
    # bound: as _sparse_layer (a row holds at most 256 counts <= 255)
    inv = (np.int64(1) << INV_BITS) // (t * F)
    return a1, a2, a3, n1, t, esc, inv


@inlined
def _file_layer(fs, r, disc, p, A):
    """The same for the file's own row r: only the bytes it has seen (as a corpus row)."""
    a1, a2, a3, n1, t, esc, inv = _file_terms(fs[1], r, disc)
    _file_add(fs, r, p, A, inv, a1, a2, a3)
    return (A * ((esc * inv) >> (INV_BITS - 31))) >> 31


@inlined
def _file_layer_mix(fs, r, disc, p, A, mix, rec, lid):
    a1, a2, a3, n1, t, esc, inv = _file_terms(fs[1], r, disc)
    A_own, A_below = _mix_escape(mix, rec, esc, t * F, inv, A, _mix_class(lid, n1, t))
    _file_add(fs, r, p, A_own, inv, a1, a2, a3)
    return A_below


@kernel
def _mix_update(mix, corpus, fs, dfile, b, x):
    """After lane b coded byte x: each recorded layer's weight moves along the gradient of
    log P(x) in its escape log-odds, ((1 - e') * below(x) - e' * own(x)) / P(x), where own
    is the layer's share of P(x) and below everything under it. The rows are read as they
    were at the prediction (no count changes in between), so encoder and decoder agree."""
    W, lrec, lcnt, lu, mp = mix[0], mix[2], mix[3], mix[4], mix[5]
    ent, dcorp = corpus[1], corpus[4]
    nlay = lcnt[b]
    if nlay == 0:
        return
    own = mix[6]
    total = lu[b]
    for l in range(nlay):
        rec = lrec[b, l]
        k = rec[7]
        if rec[0] == 1:
            c = _file_count(fs, rec[1], x)
            disc = dfile[k]
        else:
            c = np.int64(0)
            for e in range(rec[1], rec[2]):
                if (ent[e] & 0xFF) == x:
                    c = np.int64(ent[e] >> 8)
                    break
            disc = dcorp[k]
        v = np.int64(0)
        if c > 0:
            n = c * F - (np.int64(disc[0]) + (np.int64(disc[1]) - np.int64(disc[0])) * (c >= 2)
                         + (np.int64(disc[2]) - np.int64(disc[1])) * (c >= 3))
            v = (rec[4] * ((n * rec[3]) >> (INV_BITS - 31))) >> (62 - P_BITS)
        own[l] = v
        total += v
    if total <= 0:
        return
    shift = mp[0]
    lim = np.int64(WMAX) << WFRAC
    below = lu[b]
    for l in range(nlay - 1, -1, -1):
        rec = lrec[b, l]
        e31 = rec[5]
        # bound: below, own < 2**22 and e31 <= 2**31, so each product < 2**53
        g = ((ONE_A - e31) * below - e31 * own[l]) // total  # |g| <= 2**31
        for cls in (rec[6], rec[8], rec[10], rec[12]):
            W[cls] = min(max(W[cls] + (g >> shift), -lim), lim)
        below += own[l]


# -- secondary estimation of the favourite byte (optional: model files with `sse_bits`) ---
# After the repeat model has named its byte e (the repeat's next byte, or the blend's own
# favourite) and set its probability, a second table recalibrates it: cells keyed by a
# hash of the last two bytes (2**sse_bits buckets), whether a repeat is being followed,
# and 32 levels of e's probability hold hit counts; e's probability becomes the average of
# the repeat model's and the cell's hit rate, the other bytes scaled to fit.
SSE_LEVELS = 32
SSE_LIMIT = 1023  # hit counts halved past this, to keep adapting


@kernel
def _sse_predict(mix, match, b, hist, p, e, followed):
    """e: the byte to recalibrate (the repeat's, the corpus memory's, or the blend's
    favourite); followed: 1 when a repeat (in the frame or the memory) names it."""
    tab, cellv = mix[8], mix[9]
    cellv[b] = -1
    mix[10][b] = e
    total = np.int64(0)
    for s in range(256):
        total += p[s]
    pe = p[e]
    if total - pe < 1024:
        return
    x = ((hist & np.uint64(0xFFFF)) + np.uint64(7)) * _M1
    x = x ^ (x >> np.uint64(29))
    x = x * _M2
    h = np.int64(x >> np.uint64(64 - mix[5][2]))
    cell = ((h * 2 + followed) * SSE_LEVELS) + (pe * SSE_LEVELS) // total
    cellv[b] = cell
    st = tab[cell]
    t2 = (np.int64(st[0]) * total) // np.int64(st[1])  # st[0] <= SSE_LIMIT, total < 2**22
    S._give_mass(p, e, pe, total, (pe + t2) >> 1)


@inlined
def _sse_update(mix, match, b, sym):
    cell = mix[9][b]
    if cell < 0:
        return
    S._score_cell(mix[8][cell], mix[10][b] == sym, SSE_LIMIT)
