"""tessel's adaptive stages, kept apart from the model (tessel.py): the integer mixing of the
network's table with the activity counts (`_mix`, `_mix2`), the evidence that weighs them
(`_evidence`, `weight_table`), and the law stage of 16-bit samples (a two-sided geometric
law of the residual: `law_tables`, `_mix_law`). Integers throughout; every bound is written
beside its operation. The encoder (`tessel._mix_chunk`) and the decoder (`Tessel.step_decode`)
call the same kernels, group by group.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

MIX_ONE = 1 << 12  # the two estimates' weights sum to this
COUNT_LIMIT = 4096  # a context's counts are halved past this total, to keep adapting
N_LEVELS = 160  # scale levels of the law stage: mean |residual| 2**(L/8) / 16 (1/16 .. ~58,000)
LAW_MIN_LEVEL = 16  # the smallest scale used: mean 1/4
HI_OFFSET = 128  # 16-bit residuals are offset so that -128..127 all have high byte 0

# LOG2_TAB[i] = floor(256 * log2(1 + i/256)), from integers alone: (256 + i)**256 has bit
# length 2048 + floor(256 * log2(1 + i/256)) + 1
LOG2_TAB = np.array([((256 + i) ** 256).bit_length() - 1 - 2048 for i in range(256)], np.int64)


def weight_table(cap: int) -> np.ndarray:
    """Weight of the structure estimate, out of MIX_ONE, for each evidence level m/16 bits
    (m = -16 cap .. 16 cap): MIX_ONE * 2**d / (1 + 2**d) with d = m/16 (the posterior weight of
    a two-member Bayesian mixture whose members' code lengths differ by d bits), floored, kept
    in 1..MIX_ONE-1. Integers only: 2**(f/16) * 2**30 is the integer 16th root of 2**(f + 480)."""
    root = []
    for f in range(16):
        t = 1 << (f + 480)
        y = 1 << 30
        step = 1 << 30
        while step:  # largest y with y**16 <= t (bisection on integers)
            if (y + step) ** 16 <= t:
                y += step
            step >>= 1
        root.append(y)

    def w(m):
        if m < 0:
            return MIX_ONE - w(-m)
        y = root[m % 16] << (m // 16)
        return (MIX_ONE * y) // ((1 << 30) + y)
    return np.array([min(max(w(m), 1), MIX_ONE - 1) for m in range(-16 * cap, 16 * cap + 1)], np.int64)


@njit(cache=True, nogil=True)
def _mix(tab, ctx, K, counts, out):
    """out = the network's table (normalised to about 2**16) times K, plus 2**16 times the
    adaptive counts of each row's context, plus 1: p = (K q + n) / (K + N). Integers
    throughout: q = tab * inv >> 24 with inv = 2**40 // sum(tab), and tab <= sum, so the
    product stays below 2**40; every out entry stays below 2**45 (exact in float64)."""
    for i in range(tab.shape[0]):
        tot = np.int64(0)
        for j in range(256):
            tot += np.int64(tab[i, j])
        inv = (np.int64(1) << 40) // tot
        row = ctx[i]
        for j in range(256):
            nq = (np.int64(tab[i, j]) * inv) >> 24
            out[i, j] = np.float64(nq * K + (np.int64(counts[row, j]) << 16) + 1)


@njit(cache=True, nogil=True)
def _update(ctx, syms, counts, tots):
    for i in range(ctx.shape[0]):
        row = ctx[i]
        counts[row, syms[i]] += 1
        tots[row] += 1
        if tots[row] > COUNT_LIMIT:
            t = 0
            for j in range(256):
                counts[row, j] >>= 1
                t += counts[row, j]
            tots[row] = t


@njit(cache=True, nogil=True)
def _ilog(x):
    """floor-ish log2(x) in 1/256 bit for x >= 1: integer part from the bit length, fraction from
    the 8 bits below the top one (LOG2_TAB). Integers only."""
    b = 0
    y = x
    while y > 1:
        b += 1
        y >>= 1
    f = ((x >> (b - 8)) if b >= 8 else (x << (8 - b))) & 255
    return b * 256 + LOG2_TAB[f]


@njit(cache=True, nogil=True)
def _norm_row(tab, i, qa):
    """qa[i] = row i of tab normalised to about 2**20 (tab entries below 2**45); returns the
    row's sum plus 256 (the +1 of every mixed entry, for the code length under A)."""
    tot = np.int64(0)
    for j in range(256):
        tot += np.int64(tab[i, j])  # < 256 * 2**45 = 2**53
    inv = (np.int64(1) << 44) // tot
    sa = np.int64(0)
    for j in range(256):
        qa[i, j] = (np.int64(tab[i, j]) * inv) >> 24  # tab * inv <= 2**44 (tab <= tot): qa <= 2**20
        sa += qa[i, j]
    return sa + 256


@njit(cache=True, nogil=True)
def _weigh_row(qa, tb, i, sb, wb, out):
    """out[i] = (MIX_ONE - wb) * qa[i] + wb * (tb[i] normalised to 2**20) + 1, sb = sum of tb[i]
    (below 2**44 / max(tb) * 2**44: tb * invb <= 2**44)."""
    invb = (np.int64(1) << 44) // sb
    wa = MIX_ONE - wb
    for j in range(256):
        qb = (tb[i, j] * invb) >> 24  # tb * invb <= 2**44: qb <= 2**20
        out[i, j] = np.float64(wa * qa[i, j] + wb * qb + 1)  # <= 2**12 * 2**20 + 1 < 2**53


@njit(cache=True, nogil=True)
def _mix2(tab, ctx, K2, counts, D, wtab, cap, qa, tb, sums, out):
    """The second stage: A = tab (the network, or the network mixed with the activity counts;
    entries below 2**45), B = the structure counts with A as a prior of strength K2, and
    out = wA * A + wB * B (both normalised to 2**20) + 1, wA + wB = MIX_ONE, wB from the
    evidence D of the row's structure context (code length of A minus that of B so far).
    Keeps A (qa), B (tb) and their sums for `_update2`."""
    for i in range(tab.shape[0]):
        sums[i, 0] = _norm_row(tab, i, qa)
        row = ctx[i]
        sb = np.int64(0)
        for j in range(256):
            # K2 <= 2**16, qa >> 4 <= 2**16: <= 2**32; counts < 2**13, << 16: < 2**29
            tb[i, j] = K2 * (qa[i, j] >> 4) + (np.int64(counts[row, j]) << 16) + 1
            sb += tb[i, j]  # < 256 * 2**33 = 2**41
        sums[i, 1] = sb
        _weigh_row(qa, tb, i, sb, wtab[(D[row] >> 4) + 16 * cap], out)  # D in -256 cap .. 256 cap


@njit(cache=True, nogil=True)
def _evidence(ctx, syms, D, cap, decay, qa, tb, sums):
    """After a group: each symbol's code length under A and under B (1/256 bit, `_ilog`) moves
    its context's evidence D (kept in -256 cap .. 256 cap, optionally decayed by D >> decay)."""
    lim = np.int64(256) * cap
    for i in range(ctx.shape[0]):
        row = ctx[i]
        s = syms[i]
        ca = _ilog(sums[i, 0]) - _ilog(qa[i, s] + 1)
        cb = _ilog(sums[i, 1]) - _ilog(tb[i, s])
        d = D[row] + ca - cb
        if decay > 0:
            d -= d >> decay
        D[row] = min(max(d, -lim), lim)


@njit(cache=True, nogil=True)
def _update2(ctx, syms, counts, tots, D, cap, decay, qa, tb, sums):
    """After a group: the evidence (`_evidence`), then the symbols counted, in lane order."""
    _evidence(ctx, syms, D, cap, decay, qa, tb, sums)
    _update(ctx, syms, counts, tots)


# -- the law stage (16-bit samples): a two-sided geometric law of the residual ---------------
@njit(cache=True, nogil=True)
def _law_rows(cls, his, A, Nc, lrow):
    """Row of the law table for each sub-symbol: the scale level L from its activity class's
    mean |residual| so far (with the class itself as one prior observation: mean 2**(c-1)),
    L = floor(8 log2(16 mean)) in LAW_MIN_LEVEL..N_LEVELS-1; his[i] < 0: a high byte (rows
    0..N_LEVELS-1), else the low byte under high byte his[i]: the centre block (hi 0), a block
    of positive residuals (1..127: the law falls with the low byte) or of negative ones."""
    for i in range(cls.shape[0]):
        c = cls[i]
        est = ((A[c] + (np.int64(1) << max(c - 1, 0))) << 4) // (Nc[c] + 1)
        L = min(max(_ilog(max(est, np.int64(1))) >> 5, LAW_MIN_LEVEL), N_LEVELS - 1)
        h = his[i]
        if h < 0:
            lrow[i] = L
        else:
            lrow[i] = (1 + (0 if h == 0 else (1 if h < 128 else 2))) * N_LEVELS + L


@njit(cache=True, nogil=True)
def _mix_law(tab, ctx, lrow, lawq, lawsum, D, wtab, cap, qa, sums, out):
    """The law stage: A = tab (what the stages before gave), B = the law table's row lrow,
    weighed like `_mix2` by the evidence D of the row's context (role, activity class). B's
    normalised row and its sum are constants of the row (`law_normed`): out is what
    `_weigh_row` gives on the law row, without normalising it again for every sub-symbol."""
    for i in range(tab.shape[0]):
        sums[i, 0] = _norm_row(tab, i, qa)
        sums[i, 1] = lawsum[lrow[i]]
        wb = wtab[(D[ctx[i]] >> 4) + 16 * cap]
        wa = MIX_ONE - wb
        lq = lawq[lrow[i]]
        for j in range(256):
            out[i, j] = np.float64(wa * qa[i, j] + wb * lq[j] + 1)  # <= 2**12 * 2**20 + 1 < 2**53


@njit(cache=True, nogil=True)
def _law_evidence(ctx, syms, D, cap, lrow, law, qa, tb, sums):
    """After a group: the law stage's evidence (`_evidence`), B's entry of each symbol being
    its law row's (put where `_evidence` reads it)."""
    for i in range(ctx.shape[0]):
        tb[i, syms[i]] = law[lrow[i], syms[i]]
    _evidence(ctx, syms, D, cap, 0, qa, tb, sums)


@njit(cache=True, nogil=True)
def _law_count(cls, his, los, A, Nc, limit):
    """After a low-byte group: each sample's |residual| (the 16-bit symbol unwrapped to
    -32768..32767 around the offset) joins its class's sum; halved past `limit` samples."""
    for i in range(cls.shape[0]):
        r = ((his[i] << 8) | los[i]) - HI_OFFSET
        if r >= 32768:
            r -= 65536
        c = cls[i]
        A[c] += r if r >= 0 else -r
        Nc[c] += 1
        if Nc[c] > limit:
            A[c] >>= 1
            Nc[c] >>= 1


def _root8() -> list:
    """floor(2**(f/8) * 2**30), f = 0..7: the largest y with y**8 <= 2**(f + 240) (integers)."""
    out = []
    for f in range(8):
        t, y, step = 1 << (f + 240), 1 << 30, 1 << 30
        while step:
            if (y + step) ** 8 <= t:
                y += step
            step >>= 1
        out.append(y)
    return out


_LAW = []
_LAWQ = []


def law_normed() -> tuple:
    """(the law tables' rows normalised as `_weigh_row` normalises B: row * (2**44 // sum) >> 24,
    each below 2**20 + 1; their sums), int64, built once per process."""
    if not _LAWQ:
        law = law_tables()
        tot = law.sum(axis=1)  # about 2**20 + 256 each
        _LAWQ.append(((law * ((np.int64(1) << 44) // tot)[:, None]) >> 24, tot))  # law <= tot: < 2**45
    return _LAWQ[0]


def law_tables() -> np.ndarray:
    """The law stage's tables, (4 N_LEVELS, 256) int64, from integers alone (built once per
    process). Level L: mean |residual| m = 2**(L/8) / 16 and the two-sided geometric law
    P(r) ~ t**|r| with t = (sqrt(1 + m**2) - 1) / m, whose mean |r| is 2t / (1 - t**2) = m
    (fixed point 2**30, every product floored). Rows 0..N_LEVELS-1: the high byte (the mass
    of each block of 256 residuals); then the low byte in the centre block, in a block of
    positive residuals (t**lo) and of negative ones (t**(255 - lo)). Each row scaled to sum
    about 2**20, every entry at least 1."""
    if _LAW:
        return _LAW[0]
    one = 1 << 30
    root = _root8()
    out = np.empty((4 * N_LEVELS, 256), np.int64)
    for L in range(N_LEVELS):
        M = (root[L % 8] << (L // 8)) >> 4  # the mean in fixed point
        t = ((math.isqrt(one * one + M * M) - one) << 30) // M
        pw = [one]
        for _ in range(256):
            pw.append(pw[-1] * t >> 30)
        centre = [pw[abs(j - 128)] for j in range(256)]
        falling = pw[:256]
        S = sum(falling)
        hi = [sum(centre)] + [0] * 255
        T, U, G = pw[128], pw[129], pw[256]
        for h in range(1, 128):  # residuals 256h-128 .. 256h+127
            hi[h] = T * S >> 30
            T = T * G >> 30
        for j in range(1, 129):  # block 256-j: residuals -256j-128 .. -256j+127
            hi[256 - j] = U * S >> 30
            U = U * G >> 30
        for k, row in enumerate((hi, centre, falling, falling[::-1])):
            tot = sum(row)
            out[k * N_LEVELS + L] = [x * (1 << 20) // tot + 1 for x in row]
    _LAW.append(out)
    return out
