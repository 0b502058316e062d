"""braid's refinement on the byte's binary tree (model parameters fork_*): integer-only
kernels, run by lcodec/models/braid.py after the chain and the repeat models."""
from __future__ import annotations

import numpy as np

from . import strata as S
from .kernel_cache import forget_if_changed, inlined, kernel
from . import braid_layers as BL
from .braid_layers import (BYTE_CLASS, _root64, _odds_table, ODDS)

forget_if_changed(__file__, [S.__file__, BL.__file__])  # kernels here inline those modules' kernels

P_BITS = S.P_BITS
F = S.F
_M1, _M2 = S._M1, S._M2


# -- refinement on the byte's binary tree (optional: model files with `fork_shift`) --------
# The byte is read as eight binary choices, top bit first; node n (1..255) of the tree
# splits its subtree's mass between its two halves. For each node the distribution so
# far gives q = R / (L + R), the upper half's share from the subtree sums. q's log odds,
# on a grid of FORK_STEP steps per doubling, pick the place in three adaptive tables,
# each keyed by a context and the node, that hold a share per grid point (interpolated
# between the two nearest): context 1 the byte before, 2 a hash of the three bytes before,
# 3 a hash of the byte before and the byte above (the same column of the previous line).
# A mixer per node weighs the log odds of q and of the three tables' shares (logistic
# mixing, learned online); the bytes' masses are the products of the mixed shares along
# their paths. Nodes whose subtree holds less than FORK_MASS >> fork_cut keep their
# bytes' proportions (nothing is read or learned there). After each byte, the nodes on its
# path that were refined move their tables' two grid points toward the coded bit (rate
# 2**-fork_shift) and their mixer weights along the gradient (2**-fork_mix_shift).
# Three optional parts on top (each its own model parameter, absent = off):
# fork_sets: the mixer's weights for a node are the sum of two sets picked by context, one
#   by the kind of the byte before x the repeat model's state (none, or a repeat followed
#   for < 12, < 24, >= 24 bytes), one by the layer at the top of the chain (which order,
#   the file's or the corpus's, had the longest context);
# fork_inputs: two more mixer inputs, the node's split before the repeat model and the
#   secondary estimation changed it, and the repeat's expected bit (+-4 doublings, on the
#   nodes of the repeated byte's path only);
# fork_final: a final stage keyed by a hash of the two bytes before x node, read at the
#   mixer's output on the same grid, learning at rate 2**-fork_final; the node's share is
#   the average of the mixer's and the final stage's.
FORK_STEP = 64  # grid resolution of log2 odds: 1/64 of a doubling (as ODDS)
FORK_RANGE = 12  # table grid points every doubling from odds 2**-12 to 2**12
FORK_POINTS = 2 * FORK_RANGE + 1
FORK_LIM = FORK_RANGE * FORK_STEP  # log odds clamped to +-FORK_LIM steps
FORK_ONE = 1 << 16  # shares in 16 fraction bits
FORK_MASS = 1 << 22  # the refined distribution's total (before each byte's + 1 in _emit)
FORK_HASH_BITS = 12  # buckets of each hashed context (three bytes, byte above, final stage)
FORK_CTX = 256 + 3 * (1 << FORK_HASH_BITS)  # contexts: byte before, three bytes hashed, byte above, final stage's
FORK_TABLES = 3
FORK_INPUTS = FORK_TABLES + 3  # q, the tables' shares, q before the repeat model, the repeat's bit
FORK_SETS_A = 32  # byte class (8) x repeat state (4)
FORK_SETS_B = 19  # nothing found, the file's order 0..8, the corpus's order 0..8
FORK_REPEAT_X = 256  # the repeat's expected bit as a mixer input: 4 doublings of odds
FORK_WMAX = 1 << 20  # mixer weights in 16 fraction bits, clamped to +-16
FORK_W0 = 1 << 14  # every weight starts at 1/4 (the inputs' average log odds)


def _fork_tables():
    """FORK_STRETCH[q] (q = 0..FORK_ONE-1): the largest i in -FORK_LIM..FORK_LIM with
    o30[i] <= floor(2**30 * q / (FORK_ONE - q)) (-FORK_LIM for q = 0), where o30[i] =
    floor(2**30 * 2**(i / 64)) from nested integer square roots (as _odds_table): q's log2
    odds in 1/64 steps, floored. FORK_GRID[j]: the share at table grid point j (odds
    2**(j - FORK_RANGE)), FORK_SQUASH[i + FORK_LIM]: the share at log odds step i, both
    floor(FORK_ONE * o30 / (o30 + 2**30)) clamped to 1..FORK_ONE-1. Python integers and
    integer numpy only: identical everywhere."""
    root = _root64()
    o30 = np.empty(2 * FORK_LIM + 1, np.int64)
    for i in range(-FORK_LIM, FORK_LIM + 1):
        q, j = divmod(i, 64)
        o30[i + FORK_LIM] = root[j] >> (30 - q)  # q = -12..12: shift 18..42
    q = np.arange(FORK_ONE, dtype=np.int64)
    target = np.zeros(FORK_ONE, np.int64)
    target[1:] = (q[1:] << 30) // (FORK_ONE - q[1:])  # < 2**46
    st = np.clip(np.searchsorted(o30, target, side="right") - 1 - FORK_LIM, -FORK_LIM, FORK_LIM)
    sq = np.clip((o30 << 16) // (o30 + (1 << 30)), 1, FORK_ONE - 1)  # o30 < 2**43: < 2**59
    return st.astype(np.int16), sq[::FORK_STEP].astype(np.int32).copy(), sq


FORK_STRETCH, FORK_GRID, FORK_SQUASH = _fork_tables()


@kernel
def _fork_hash(x, salt):
    x = (x + salt) * _M1
    x = x ^ (x >> np.uint64(29))
    x = x * _M2
    return np.int64(x >> np.uint64(64 - FORK_HASH_BITS))


@inlined
def _fork_read(tab, ri, i, grid):
    """Table row ri's share at log-odds place i (0 .. 2 * FORK_LIM), interpolated between
    its two nearest grid points and clamped to 1 .. FORK_ONE - 1. Rows store share + 1: a
    point still 0 was never read and takes the grid's own share now. (Takes the 2-D table
    and a row number, never a row view: a view per read cost a quarter of braid's speed.)"""
    j = i >> 6
    w = i & 63
    if j >= FORK_POINTS - 1:
        j = FORK_POINTS - 2
        w = 64
    v0 = np.int64(tab[ri, j])
    if v0 == 0:
        v0 = np.int64(grid[j]) + 1
        tab[ri, j] = v0
    v1 = np.int64(tab[ri, j + 1])
    if v1 == 0:
        v1 = np.int64(grid[j + 1]) + 1
        tab[ri, j + 1] = v1
    r = ((v0 - 1) * (64 - w) + (v1 - 1) * w) >> 6  # shares <= 2**16
    return min(max(r, np.int64(1)), np.int64(FORK_ONE - 1))


@inlined
def _fork_move(tab, ri, i, tgt, shift):
    """Move the two grid points _fork_read used at place i toward tgt (0 or FORK_ONE), in
    proportion to their interpolation weights, at rate 2**-(shift - 6)."""
    j = i >> 6
    w = i & 63
    if j >= FORK_POINTS - 1:
        j = FORK_POINTS - 2
        w = 64
    # rows store share + 1; |tgt - share| <= 2**16, weights <= 64: products <= 2**22;
    # shares stay in 0..2**16
    tab[ri, j] += ((tgt - tab[ri, j] + 1) * (64 - w)) >> shift
    tab[ri, j + 1] += ((tgt - tab[ri, j + 1] + 1) * w) >> shift


@inlined
def _fork_sums(sub, p):
    """sub[256 + s] = p[s] + 1 (every byte keeps some mass), sub[n] = the sum over node n's
    subtree (n = 1..255), for the shares q = R / (L + R)."""
    for s in range(256):
        sub[256 + s] = p[s] + 1
    for n in range(255, 0, -1):
        sub[n] = sub[2 * n] + sub[2 * n + 1]  # p's total < 2**22: < 2**23


@kernel
def _fork_keep(fork, p):
    """With fork_inputs: keep the distribution as it is before the repeat model."""
    if fork[4][4] != 0:
        pre = fork[14]
        for s in range(256):
            pre[s] = p[s]


@kernel
def _fork_sets(fork, b, hist, mix, match):
    """With fork_sets: lane b's two weight sets (first rows in fork[10]), recorded."""
    sel = fork[15][b]
    if fork[4][3] == 0:
        sel[0] = 0
        sel[1] = -1
        return
    ml = 0
    if match[2][b] >= 0:  # a repeat is followed
        n = match[3][b]
        ml = 1 if n < 12 else (2 if n < 24 else 3)
    top = 0
    if mix[5][1] != 0 and mix[3][b] > 0:  # the first layer the chain used (escape weights on)
        r = mix[2][b, 0]
        top = (1 if r[0] == 1 else 10) + min(r[7], 8)
    sel[0] = (BYTE_CLASS[np.int64(hist & np.uint64(0xFF))] * 4 + ml) * 256
    sel[1] = (FORK_SETS_A + top) * 256


@kernel
def _fork_predict(fork, b, hist, p, buf, cur, expect):
    """p (the distribution so far, total < 2**22) <- the refined distribution (total about
    FORK_MASS); what lane b's update needs is recorded. buf[cur] is the byte to come: only
    bytes before it are read. expect: the byte the repeat model follows, or -1."""
    tab, grid, st, sq, cfg = fork[0], fork[1], fork[2], fork[3], fork[4]
    line, cx, pos, xin, pout = fork[5][b], fork[6][b], fork[7][b], fork[8][b], fork[9][b]
    wts, sub, mass, act = fork[10], fork[11], fork[12], fork[13]
    pre, sel, fpos, sub0 = fork[14], fork[15][b], fork[16][b], fork[17]
    n_in = FORK_INPUTS if cfg[4] != 0 else FORK_TABLES + 1
    two = sel[1] >= 0
    s1 = sel[0]
    s2 = sel[1] if two else s1
    if line[0] < 0:  # the lane's first byte: no line before it
        line[0] = cur
        line[1] = cur
    above = np.uint64(0)
    col = cur - line[0]
    if line[1] + col < line[0]:
        above = np.uint64(buf[line[1] + col])
    c1 = hist & np.uint64(0xFF)
    cx[0] = np.int64(c1)
    cx[1] = 256 + _fork_hash(hist & np.uint64(0xFFFFFF), np.uint64(11))
    cx[2] = 256 + (1 << FORK_HASH_BITS) + _fork_hash((above << np.uint64(8)) | c1, np.uint64(23))
    cx[3] = 256 + 2 * (1 << FORK_HASH_BITS) + _fork_hash(hist & np.uint64(0xFFFF), np.uint64(53))
    _fork_sums(sub, p)
    if cfg[4] != 0:
        _fork_sums(sub0, pre)
    cut = np.int64(FORK_MASS) >> cfg[2]
    for n in range(2, 256):
        act[n] = 0
    act[1] = 1
    mass[1] = FORK_MASS
    dep = -1
    for n in range(1, 256):
        if n & (n - 1) == 0:
            dep += 1  # n's depth in the tree: 0 at the root, 7 above the bytes
        pos[n] = -1
        fpos[n] = -1
        if act[n] == 0:
            continue
        m = mass[n]
        if m < cut:  # too little mass to matter: the subtree's bytes keep their proportions
            span = np.int64(1)
            k = n
            while k < 256:
                k *= 2
                span *= 2
            s0 = n * span - 256
            fac = (m << 24) // sub[n]  # m < 2**22: m << 24 < 2**46
            for s in range(s0, s0 + span):
                p[s] = ((p[s] + 1) * fac) >> 24  # p[s] + 1 <= sub[n]: product <= m << 24
            continue
        L = sub[2 * n]
        R = sub[2 * n + 1]
        q = (R << 16) // (L + R)  # R < 2**23: R << 16 < 2**39
        q = min(max(q, np.int64(1)), np.int64(FORK_ONE - 1))
        i = np.int64(st[q]) + FORK_LIM  # 0 .. 2 * FORK_LIM
        pos[n] = i
        a1 = s1 + n
        a2 = s2 + n
        xin[n, 0] = i - FORK_LIM
        if n_in > FORK_TABLES + 1:
            q0 = (sub0[2 * n + 1] << 16) // (sub0[2 * n] + sub0[2 * n + 1])  # < 2**39
            q0 = min(max(q0, np.int64(1)), np.int64(FORK_ONE - 1))
            xin[n, FORK_TABLES + 1] = np.int64(st[q0])
            xin[n, FORK_TABLES + 2] = 0
            if expect >= 0 and ((expect + 256) >> (8 - dep)) == n:  # n is on the repeated byte's path
                xin[n, FORK_TABLES + 2] = FORK_REPEAT_X if (expect >> (7 - dep)) & 1 else -FORK_REPEAT_X
        dot = (wts[a1, 0] + (wts[a2, 0] if two else 0)) * xin[n, 0]
        for u in range(FORK_TABLES + 1, n_in):
            dot += (wts[a1, u] + (wts[a2, u] if two else 0)) * xin[n, u]
        for u in range(FORK_TABLES):
            x = np.int64(st[_fork_read(tab, cx[u] * 256 + n, i, grid)])
            xin[n, u + 1] = x
            # |w| <= 2**20 (two sets: 2**21), |x| <= FORK_LIM < 2**10: < 2**31 each, 6 inputs < 2**34
            dot += (wts[a1, u + 1] + (wts[a2, u + 1] if two else 0)) * x
        d = min(max(dot >> 16, np.int64(-FORK_LIM)), np.int64(FORK_LIM))
        f = np.int64(sq[d + FORK_LIM])  # 1 .. FORK_ONE - 1
        pout[n] = f
        if cfg[5] != 0:  # the final stage, read at the mixer's output
            fpos[n] = d + FORK_LIM
            f = (f + _fork_read(tab, cx[3] * 256 + n, d + FORK_LIM, grid)) >> 1
        hi = (m * f) >> 16  # m <= 2**22: < 2**38
        if n < 128:
            mass[2 * n] = m - hi
            mass[2 * n + 1] = hi
            act[2 * n] = 1
            act[2 * n + 1] = 1
        else:
            p[2 * n - 256] = m - hi
            p[2 * n - 255] = hi


@kernel
def _fork_update(fork, b, sym, cur):
    """After lane b coded sym (at buf[cur]): the refined nodes on its path learn."""
    tab, cfg = fork[0], fork[4]
    line, cx, pos, xin, pout, wts = fork[5][b], fork[6][b], fork[7][b], fork[8][b], fork[9][b], fork[10]
    sel, fpos = fork[15][b], fork[16][b]
    n_in = FORK_INPUTS if cfg[4] != 0 else FORK_TABLES + 1
    fshift = cfg[5] + 6
    if sym == 10:
        line[1] = line[0]
        line[0] = cur + 1
    shift = cfg[0] + 6
    lr = cfg[1]
    n = 1
    for k in range(7, -1, -1):
        i = pos[n]
        if i < 0:  # not refined: neither are the nodes below it
            break
        y = (sym >> k) & 1
        tgt = np.int64(y) << 16
        for u in range(FORK_TABLES):
            _fork_move(tab, cx[u] * 256 + n, i, tgt, shift)
        if fpos[n] >= 0:  # the final stage's two grid points, like the tables'
            _fork_move(tab, cx[3] * 256 + n, fpos[n], tgt, fshift)
        err = tgt - pout[n]  # |err| < 2**16: the mixer learns from its own output
        for k2 in range(2 if sel[1] >= 0 else 1):
            a = sel[k2] + n
            for u in range(n_in):
                # bound: |x| <= FORK_LIM < 2**10, so |x * err| < 2**26
                wts[a, u] = min(max(wts[a, u] + ((xin[n, u] * err) >> lr), np.int64(-FORK_WMAX)), np.int64(FORK_WMAX))
        n = 2 * n + y
