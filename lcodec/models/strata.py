"""`strata`: the built-in adaptive model. Needs no training; integer-only.

It blends byte statistics of context orders 0..K (K = `max_order`) by interpolated
absolute discounting: starting from the uniform distribution, each order's counts
n(s) in the current context are discounted by d and the freed mass is given to the
blend of the lower orders:

    P_k(s) = ( n(s) - d(n(s)) + E * P_{k-1}(s) ) / T,    E = sum over seen s of d(n(s))

with T = sum n(s), d(0) = 0 and one discount each for counts of 1, 2 and >= 3 (a
context never seen leaves P_{k-1} unchanged). Counts are updated with update exclusion: the
symbol is counted at the highest order and at lower orders only while it was new
there, which approximates continuation counts. Every number is an integer; P is kept
in fixed point with total 2**P_BITS, and the table handed to the coder is P_K(s) + 1.

State is shared by all lanes of a frame: at each step every active lane is predicted
from the same state, then the lanes' symbols are counted in lane order. Encoder and
decoder run the same two kernels (`_predict`, `_update`), so their tables agree by
construction; a fresh state is allocated per frame, so frames are independent.

Order-1 contexts index their rows directly; orders >= 2 are hashed into at most
2**hash_log2 rows each (fewer for short frames, so that a small file touches little
memory), with a 32-bit check tag per row (a row whose tag differs is treated as empty
and taken over on update).
"""
from __future__ import annotations

import threading

import numpy as np

from ..coding import coder as C
from .kernel_cache import forget_if_changed, inlined, kernel

forget_if_changed(__file__, [C.__file__])  # the decode loop's kernels read coder.PACKED

P_BITS = 20  # fixed-point total of the blended distribution
F = 16  # discount is expressed in sixteenths of a count
COUNT_LIMIT = 255  # uint8 counts: a row is halved when a count would pass this
MATCH_LENGTHS = 16  # match lengths 0..15+ ...
MATCH_LEVELS = 16  # ... times 16 levels of the blend's own probability: the hit-rate cells
MATCH_LIMIT = 4095  # hit-rate counters are halved past this, to keep adapting

_M1 = np.uint64(0x9E3779B97F4A7C15)  # odd multipliers for context hashing
_M2 = np.uint64(0xD6E8FEB86659FD93)


@inlined
def _row_slots(hist, max_order, hash_log2, bases, gen, slots, checks):
    """Row index and check tag of each order's context (orders 0..max_order). A tag holds
    the frame's generation in its high 32 bits, so rows left by earlier frames read as empty."""
    g = gen << np.uint64(32)
    slots[0] = bases[0]
    checks[0] = g
    for k in range(1, max_order + 1):
        if k == 1:
            slots[k] = bases[k] + np.int64(hist & np.uint64(0xFF))
            checks[k] = g
        else:
            if k >= 8:
                ctx = hist
            else:
                ctx = hist & np.uint64((1 << (8 * k)) - 1)
            x = (ctx + np.uint64(k)) * _M1
            x = x ^ (x >> np.uint64(31))
            x = x * _M2
            slots[k] = bases[k] + np.int64(x >> np.uint64(64 - hash_log2))
            checks[k] = g | ((x >> np.uint64(8)) & np.uint64(0xFFFFFFFF))


@inlined
def _map_rows(rmap, nxt, gen, max_order, slots):
    """Turn each order's row index (the hashed table's, which decides what collides) into
    a place in the row arrays, handed out in the order rows are first met in this frame:
    the rows a frame uses lie side by side, so a short frame touches a few pages of the
    tables, not all of them. rmap holds gen << 32 | place; another generation means unmet."""
    g = gen << np.uint64(32)
    for k in range(max_order + 1):
        e = rmap[slots[k]]
        if (e >> np.uint64(32)) != gen:
            e = g | np.uint64(nxt[0])
            rmap[slots[k]] = e
            nxt[0] += 1
        slots[k] = np.int64(e & np.uint64(0xFFFFFFFF))


# The file's rows. Row r is one 64-byte line, meta[r] (uint32 fields: tag, total, distinct
# bytes, big row), whose last 32 bytes (m8[r, 32:64], the same memory as bytes) hold up to
# SMALL bytes seen and their counts; the SMALL+1-th distinct byte moves the counts to a big
# row, big[meta[r, BIG] - 1] (256 counts), handed out in the order needed. Most rows of the
# higher orders see a few bytes, so a row costs one cache line and a short frame touches
# few pages; the tables are the same as with 256 counts per row.
TAG_LO, TAG_HI, TOT, DIST, BIG = 0, 1, 2, 3, 4
META = 16  # uint32 fields per row: 64 bytes
SMALL = 16  # distinct bytes a row holds in its own line
SYM0, CNT0 = 32, 48  # byte offsets in the line of the bytes seen and their counts


@inlined
def _tag_is(meta, r, chk):
    return meta[r, TAG_LO] == np.uint32(chk & np.uint64(0xFFFFFFFF)) and meta[r, TAG_HI] == np.uint32(chk >> np.uint64(32))


@inlined
def _claim_row(meta, r, chk, big_field):
    """Row r for the context with tag chk, empty: its total, distinct bytes and big row
    (field big_field: braid's lines place it elsewhere) zeroed. A model with more fields
    zeroes those itself."""
    meta[r, TOT] = 0
    meta[r, DIST] = 0
    meta[r, big_field] = 0
    meta[r, TAG_LO] = np.uint32(chk & np.uint64(0xFFFFFFFF))
    meta[r, TAG_HI] = np.uint32(chk >> np.uint64(32))


def big_rows_for(n_bytes: int, max_order: int) -> int:
    """Big rows one frame can need: a row takes one with the SMALL+1-th distinct byte it
    counts since it was last emptied, and each byte is counted in at most max_order + 1
    rows, so fewer than (max_order + 1) * n / (SMALL + 1) + 1 are taken."""
    return (max_order + 1) * max(n_bytes, 1) // (SMALL + 1) + 1


def row_arrays(n_rows: int, n_big: int, big_width: int = 256):
    """Zeroed row lines (uint32 fields and the same memory as bytes, each row on a cache
    line of its own) and big rows (256 counts first, then whatever the model keeps).
    Fresh arrays are zeroed by the system page by page, so a frame pays only for the
    pages its rows touch."""
    raw = np.zeros(n_rows * 4 * META + 64, np.uint8)
    off = -raw.ctypes.data % 64
    line = raw[off:off + n_rows * 4 * META]
    return (line.view(np.uint32).reshape(n_rows, META), line.reshape(n_rows, 4 * META),
            np.zeros((n_big, big_width), np.uint8))


@inlined
def _line_find(m8, r, nd, sym):
    """(place in the line, count) of byte sym in short row r holding nd bytes; (-1, 0)
    when the row has not seen it."""
    for j in range(nd):
        if m8[r, SYM0 + j] == sym:
            return j, np.int64(m8[r, CNT0 + j])
    return -1, np.int64(0)


@kernel
def _take_big(meta, m8, big, r, nxt, field):
    """Move full short row r (SMALL bytes) to the next big row (nxt[1]: big rows handed
    out): its 256 counts zeroed, then the line's counts; meta[r, field] = 1 + the big row,
    which is returned. The line keeps its bytes, in the order they came."""
    g = nxt[1] + 1
    if g > big.shape[0]:  # cannot happen (big_rows_for's bound); refuse rather than overrun
        raise ValueError("file rows: more big rows than a frame can need")
    nxt[1] = g
    for s in range(256):
        big[g - 1, s] = 0
    for j in range(SMALL):
        big[g - 1, m8[r, SYM0 + j]] = m8[r, CNT0 + j]
    meta[r, field] = np.uint32(g)
    return g


@kernel
def _predict(rows, slots, checks, b, max_order, disc, p, keep, seen, vals):
    """Blend orders 0..max_order of lane b's rows (slots[b], checks[b]) into p (integers,
    total about 2**P_BITS).

    disc[k] holds order k's discounts (in 1/F of a count) for counts 1, 2 and >= 3.
    Each order maps every byte's value x to ((n * one + esc * x) * inv) >> 32, n from the
    byte's count there (0 if none). A byte the frame has not had yet has no count at any
    order, so all such bytes keep one shared value; only the frame's bytes so far (seen[0,
    :D], in the order they first came, D = seen[2, 0]) are followed one by one, in vals.
    keep: scratch for a short row's bytes (their place in vals, n, and value before).
    """
    meta, m8, big = rows
    one = np.int64(1) << P_BITS
    base = one >> 8
    order = seen[0]
    place = seen[1]
    nd_all = seen[2, 0]
    for i in range(nd_all):
        vals[i] = base
    for k in range(max_order + 1):
        r = slots[b, k]
        if not _tag_is(meta, r, checks[b, k]):
            continue
        t = np.int64(meta[r, TOT])
        if t == 0:
            continue
        # discount of a count c: d(c) = a1*[c>=1] + a2*[c>=2] + a3*[c>=3]
        a1 = np.int64(disc[k, 0])
        a2 = np.int64(disc[k, 1]) - a1
        a3 = np.int64(disc[k, 2]) - np.int64(disc[k, 1])
        # bound: n*F <= 4080, esc <= 47*256 < 2**14, p[s] <= 2**20, so num < 2**35;
        # inv <= 2**32 / 16, so num * inv < 2**63 fits int64.
        inv = (np.int64(1) << 32) // (t * F)
        g = np.int64(meta[r, BIG])
        esc = np.int64(0)
        if g:  # a row's bytes are the frame's: its counts are 0 outside seen[0, :D]
            row = big[g - 1]
            for i in range(nd_all):
                c = np.int64(row[order[i]])
                esc += a1 * (c >= 1) + a2 * (c >= 2) + a3 * (c >= 3)
            for i in range(nd_all):
                c = np.int64(row[order[i]])
                n = c * F - (a1 * (c >= 1) + a2 * (c >= 2) + a3 * (c >= 3))
                vals[i] = ((n * one + esc * vals[i]) * inv) >> 32
        else:  # n = 0 for all but the row's few bytes: scale all, then those from before
            nd = np.int64(meta[r, DIST])
            for j in range(nd):
                c = np.int64(m8[r, CNT0 + j])
                d = a1 + a2 * (c >= 2) + a3 * (c >= 3)
                esc += d
                i = place[m8[r, SYM0 + j]]
                keep[j, 0] = i
                keep[j, 1] = c * F - d
                keep[j, 2] = vals[i]
            for i in range(nd_all):
                vals[i] = (esc * vals[i] * inv) >> 32
            for j in range(nd):
                vals[keep[j, 0]] = ((keep[j, 1] * one + esc * keep[j, 2]) * inv) >> 32
        base = (esc * base * inv) >> 32
    for s in range(256):
        p[s] = base
    for i in range(nd_all):
        p[order[i]] = vals[i]


@kernel
def _update(rows, slots, checks, b, max_order, sym, nxt, seen):
    """Count `sym` in lane b's rows (slots[b], checks[b]) from the highest order down, stopping below the first order that knew it.
    A row left by an earlier frame or another context (another tag) starts empty; a big
    row it held is not used again in this frame (nxt[1]: big rows handed out). A byte new
    to the frame is new to every order, down to order 0: it joins seen (see _predict)."""
    meta, m8, big = rows
    for k in range(max_order, -1, -1):
        r = slots[b, k]
        chk = checks[b, k]
        if not _tag_is(meta, r, chk):
            _claim_row(meta, r, chk, BIG)
        nd = np.int64(meta[r, DIST])
        g = np.int64(meta[r, BIG])
        i = -1
        if g:
            c = np.int64(big[g - 1, sym])
        else:
            i, c = _line_find(m8, r, nd, sym)
        if c >= COUNT_LIMIT:  # halve: every count > 1 to (c + 1) >> 1; none reaches 0
            t = 0
            if g:
                row = big[g - 1]
                for s in range(256):
                    v = (row[s] + 1) >> 1 if row[s] > 1 else row[s]
                    row[s] = v
                    t += v
                c = np.int64(row[sym])
            else:
                for j in range(nd):
                    v = m8[r, CNT0 + j]
                    v = (v + 1) >> 1 if v > 1 else v
                    m8[r, CNT0 + j] = v
                    t += v
                c = np.int64(m8[r, CNT0 + i])
            meta[r, TOT] = t
        if c == 0 and not g and nd == SMALL:  # the line is full: move the counts to a big row
            g = _take_big(meta, m8, big, r, nxt, BIG)
        if g:
            big[g - 1, sym] = c + 1
        elif c == 0:
            m8[r, SYM0 + nd] = sym
            m8[r, CNT0 + nd] = 1
        else:
            m8[r, CNT0 + i] = c + 1
        meta[r, TOT] += 1
        if c == 0:
            meta[r, DIST] += 1
            if k == 0:
                d = seen[2, 0]
                seen[0, d] = sym
                seen[1, sym] = d
                seen[2, 0] = d + 1
        else:
            break


@inlined
def _step_of(pos, lay):
    """Step at which frame position `pos` is coded (lay: n, base lane length, lanes one longer)."""
    base, extra = lay[1], lay[2]
    big = extra * (base + 1)
    if pos < big:
        return pos % (base + 1)
    return (pos - big) % base


@inlined
def _match_hash(hist, lay):
    ctx = hist & np.uint64((1 << (8 * lay[3])) - 1) if lay[3] < 8 else hist
    x = (ctx + np.uint64(99)) * _M1
    x = x ^ (x >> np.uint64(29))
    x = x * _M2
    return np.int64(x >> np.uint64(64 - lay[4]))


@kernel
def _match_predict(match, b, p):
    """Long-repeat predictor: where the lane's last bytes occurred before, the byte that
    followed gets the probability measured, so far in this frame, for matches of this
    length whose byte the blend gave about the same probability (raised or lowered)."""
    buf, mtab, mptr, mlen, mstat, lay, mcell, mpred = match
    mcell[b] = -1
    total = np.int64(0)
    for s in range(256):
        total += p[s]
    if mptr[b] >= 0:
        e = np.int64(buf[mptr[b]])
    else:  # no repeat to follow: calibrate the blend's own favourite (length class 0)
        e = np.int64(0)
        for s in range(1, 256):
            if p[s] > p[e]:
                e = s
    mpred[b] = e
    pe = p[e]
    if total - pe < 1024:  # the blend is already (nearly) certain of e
        return
    cell = (min(mlen[b], MATCH_LENGTHS - 1) if mptr[b] >= 0 else 0) * MATCH_LEVELS + (pe * MATCH_LEVELS) // total
    mcell[b] = cell
    st = mstat[cell]
    _give_mass(p, e, pe, total, (np.int64(st[0]) * total) // np.int64(st[1]))


@inlined
def _give_mass(p, e, pe, total, target):
    """Set byte e's share of the table p (summing to total, e holding pe of it, with
    total - pe >= 1024) to target, clamped to 1 .. total - 1024, the other bytes scaled
    to share the rest."""
    target = min(max(target, np.int64(1)), total - 1024)
    # bound: p[s] < 2**22 for both callers (strata's entries <= 2**21, braid's < 2**22)
    # and f <= (2**22 << 20) / 1024 = 2**32, so p[s] * f < 2**54
    f = ((total - target) << 20) // (total - pe)
    for s in range(256):
        p[s] = (p[s] * f) >> 20
    p[e] = target


@inlined
def _score_cell(st, hit, limit):
    """A hit-rate cell (hits, trials) after one more trial; both halved past limit."""
    st[0] += 1 if hit else 0
    st[1] += 1
    if st[1] > limit:
        st[0] = (st[0] + 1) >> 1
        st[1] = (st[1] + 1) >> 1


@kernel
def _match_update(match, b, start, t, sym, hist, gen):
    """After lane b coded `sym` at step t: score and extend its match, or look for a new
    one, then index the context just completed. Only bytes of steps <= t are read."""
    buf, mtab, mptr, mlen, mstat, lay, mcell, mpred = match
    n, mmin = lay[0], lay[3]
    cur = start + t
    if mcell[b] >= 0:
        _score_cell(mstat[mcell[b]], mpred[b] == sym, MATCH_LIMIT)
    if mptr[b] >= 0:
        hit = buf[mptr[b]] == sym
        nxt = mptr[b] + 1
        if hit and nxt < n and _step_of(nxt, lay) <= t:
            mptr[b] = nxt
            mlen[b] += 1
        else:
            mptr[b] = -1
            mlen[b] = 0
    if t + 1 < mmin:
        return
    h = _match_hash(hist, lay)
    g = gen << np.uint64(32)
    if mptr[b] < 0:
        entry = mtab[h]
        if (entry & np.uint64(0xFFFFFFFF00000000)) == g:
            q = np.int64(entry & np.uint64(0xFFFFFFFF))
            if q < n and _step_of(q, lay) <= t:
                ln = 0
                while ln < 32:
                    a = q - 1 - ln
                    c = cur - ln
                    if a < 0 or c < start or _step_of(a, lay) > t or buf[a] != buf[c]:
                        break
                    ln += 1
                if ln >= mmin:
                    mptr[b] = q
                    mlen[b] = ln
    mtab[h] = g | np.uint64(cur + 1)


@inlined
def _match_touch(match, hist):
    """A first read of the entry _match_update will index for the context `hist` (the
    history with the new byte), nothing written: read for every lane in one pass."""
    return np.uint32(match[1][_match_hash(hist, match[5])] & np.uint64(0xFFFFFFFF))


@kernel
def _lanes_rows(state, m, max_order, hash_log2, slots2, checks2, sink):
    """slots2[b], checks2[b] <- lane b's rows (placed as they are first met, lane by lane,
    order by order) for lanes 0..m-1, and a first read of each row's line: the rows of a
    long frame are far apart in memory, and read here, in one pass, their loads are
    independent and overlap; the prediction, which reads a row and then decides what to
    do with it, would wait for each in turn. The update reuses the same rows."""
    rows, bases, hist, gen, rmap, nxt = state[0], state[1], state[2], state[3], state[4], state[5]
    meta = rows[0]
    acc = np.uint32(0)
    for b in range(m):
        sl = slots2[b]
        _row_slots(hist[b], max_order, hash_log2, bases, gen, sl, checks2[b])
        _map_rows(rmap, nxt, gen, max_order, sl)
        for k in range(max_order + 1):
            acc ^= meta[sl[k], TAG_LO]
    sink[0] = acc


@kernel
def _teacher(state, match, data, starts, lengths, t0, t1, max_order, hash_log2, disc, out_syms, out_tab, work):
    """Tables of steps t0..t1 for all active lanes, in coding order, updating state. work:
    new_work's scratch (the kernel allocates nothing)."""
    rows, hist, gen, nxt, seen = state[0], state[2], state[3], state[5], state[6]
    nl = lengths.shape[0]
    slots2, checks2, p, keep, vals, sink = work
    use_match = match[5][3] > 0
    i = 0
    for t in range(t0, t1):
        m = 0
        while m < nl and lengths[m] > t:
            m += 1
        _lanes_rows(state, m, max_order, hash_log2, slots2, checks2, sink)
        for b in range(m):
            _predict(rows, slots2, checks2, b, max_order, disc, p, keep, seen, vals)
            if use_match:
                _match_predict(match, b, p)
            _emit(p, out_tab[i + b])
            out_syms[i + b] = data[starts[b] + t]
        for b in range(m):
            sym = data[starts[b] + t]
            _update(rows, slots2, checks2, b, max_order, sym, nxt, seen)
            hist[b] = (hist[b] << np.uint64(8)) | np.uint64(sym)
            if use_match:
                _match_update(match, b, starts[b], t, sym, hist[b], gen)
        i += m
    return i


@kernel
def _step(state, match, starts, syms, t_prev, m_prev, m, max_order, hash_log2, disc, out_tab, work):
    """Decoder step: count the symbols of step t_prev (m_prev lanes), then predict m lanes.
    `work` holds the scratch arrays, made once per frame (new_work: a step is too short to
    allocate, and no kernel allocates)."""
    rows, hist, gen, nxt, seen = state[0], state[2], state[3], state[5], state[6]
    slots2, checks2, p, keep, vals, sink = work
    buf = match[0]
    use_match = match[5][3] > 0
    for b in range(m_prev):
        buf[starts[b] + t_prev] = syms[b]
    for b in range(m_prev):
        sym = syms[b]  # its rows are the ones the step before predicted it from
        _update(rows, slots2, checks2, b, max_order, sym, nxt, seen)
        hist[b] = (hist[b] << np.uint64(8)) | np.uint64(sym)
        if use_match:
            _match_update(match, b, starts[b], t_prev, sym, hist[b], gen)
    _lanes_rows(state, m, max_order, hash_log2, slots2, checks2, sink)
    for b in range(m):
        _predict(rows, slots2, checks2, b, max_order, disc, p, keep, seen, vals)
        if use_match:
            _match_predict(match, b, p)
        _emit(p, out_tab[b])


@inlined
def _emit(p, out):
    """out <- p + 1 as float64 (the coder's table), exactly. Every p[s] lies in 0..2**21 (a
    table's total is about 2**P_BITS), so p[s] + 1 converts through int32, which this
    processor's vector unit converts to float64 eight at a time (36 ns a table, against 50
    for building the float's bits by hand and 135 for a plain int64 conversion, which it
    cannot vectorise); nothing is rounded either way."""
    for s in range(256):
        out[s] = np.float64(np.int32(p[s] + 1))


_local = threading.local()


def _pool_take(n_rows: int, n_big: int):
    """Row arrays with at least n_rows rows and n_big big rows, and a generation number not
    used before with them. One idle set is kept per thread; a frame opened while it is busy
    gets new arrays."""
    pool = getattr(_local, "pool", None)
    if (pool is not None and not pool["busy"] and pool["rows"] >= n_rows and pool["big"] >= n_big
            and pool["gen"] < 0xFFFFFFFF):
        pool["busy"] = True
        pool["gen"] += 1
        return (*pool["arrays"], pool["gen"])
    arrays = (row_arrays(n_rows, n_big), np.zeros(n_rows, np.uint64), np.zeros(n_rows, np.uint64))
    if pool is None or not pool["busy"]:  # keep the newest, largest set
        _local.pool = {"rows": n_rows, "big": n_big, "arrays": arrays, "gen": 1, "busy": True}
    return (*arrays, 1)  # zeroed tags hold generation 0, which never matches


def _pool_give(state):
    pool = getattr(_local, "pool", None)
    if pool is not None and pool["arrays"][0] is state[0]:
        pool["busy"] = False


def new_work(n_lanes: int, max_order: int) -> tuple:
    """Scratch of _teacher and _step, made once per frame: each lane's row slots and tags
    per order, the distribution, the short rows' kept bytes, the followed values, a sink."""
    nl = max(n_lanes, 1)
    return (np.empty((nl, max_order + 1), np.int64), np.empty((nl, max_order + 1), np.uint64),
            np.empty(256, np.int64), np.empty((SMALL, 3), np.int64), np.empty(256, np.int64),
            np.zeros(1, np.uint32))


def run_chunks(lengths: np.ndarray, chunk_steps: int, run):
    """The encoder pass chunk by chunk of steps: run(t0, t1, syms, tab) fills the buffers
    for steps t0..t1 of every active lane and returns how many rows it wrote."""
    n_steps = int(lengths[0]) if len(lengths) else 0
    nl = len(lengths)
    syms = np.empty(chunk_steps * nl, np.int32)
    tab = np.empty((chunk_steps * nl, 256), np.float64)
    for t0 in range(0, n_steps, chunk_steps):
        k = run(t0, min(n_steps, t0 + chunk_steps), syms, tab)
        yield syms[:k], tab[:k]


@kernel
def _decode_steps(state, match, starts, max_order, hash_log2, disc, tab, work, ask, key, widths, by_step, prev):
    """Every decoder step of a frame in one compiled loop (coder.decode_frame's fast path):
    the same _step calls as the Python loop, the symbols from coder.step_symbols through
    ask (coder.ASK). widths: coder.step_widths (the lanes of each step); by_step: one row
    per step. prev: int32 zeros, one per lane (the loop allocates nothing, so it needs
    neither numba's reference counts nor, when loaded from the cache, numba's array
    module). Returns the steps done (fewer when the coded data could not be decoded)."""
    for t in range(by_step.shape[0]):
        m = _width(widths, t)
        _step(state, match, starts, prev, t - 1, _width(widths, t - 1) if t else 0, m, max_order, hash_log2, disc,
              tab, work)
        if not _symbols_of_step(ask, key, tab, m, prev, by_step, t):
            return t
    return by_step.shape[0]


@inlined
def _width(widths, t):
    """Lanes active at step t (coder.step_widths: [lo, all lanes, lanes longer than lo])."""
    return widths[1] if t < widths[0] else widths[2]


@inlined
def _symbols_of_step(ask, key, tab, m, prev, by_step, t):
    """Ask the coder (ask: coder.ASK, a C function pointer to coder.step_symbols) for step
    t's m symbols under the tables tab[:m] (bound to the key beforehand); they come packed
    in its answer (m <= coder.PACKED) or in by_step[t], and go to prev and by_step[t].
    False when they cannot be decoded (ask answers 0)."""
    got = ask(key, m, t) - 1
    if got < 0:
        return False
    if m <= C.PACKED:
        for b in range(m):
            s = (got >> (8 * b)) & 255
            prev[b] = s
            by_step[t, b] = s
    else:
        for b in range(m):
            prev[b] = by_step[t, b]
    return True


# Named parameter sets. A preset, once released, is frozen: archives name it instead of
# spelling out its parameters (a smaller header), so its meaning may never change.
PRESETS = {
    "o6m": {"max_order": 6, "hash_log2": 18, "discount": [[13, 18, 24]] * 7, "match_min": 6},
}


class Strata:
    """The adaptive model. Parameters are part of the container's model identity."""

    name = "strata"
    kind = "adaptive"
    coder = "queue"  # tables come one step at a time: the range coder needs none stored

    def __init__(self, max_order: int = 6, hash_log2: int = 18, discount=None, match_min: int = 6):
        """The defaults are preset "o6m". match_min: shortest repeat the match model follows
        (0 turns it off)."""
        if not (match_min == 0 or 4 <= match_min <= 8):
            raise ValueError("match_min must be 0 (off) or 4..8")
        if not 1 <= max_order <= 8:
            raise ValueError("max_order must be 1..8")
        if not 10 <= hash_log2 <= 20:
            raise ValueError("hash_log2 must be 10..20")
        if discount is None:
            discount = [[13, 18, 24]] * (max_order + 1)
        discount = [[int(x) for x in row] for row in discount]
        if len(discount) != max_order + 1 or not all(
                len(row) == 3 and 1 <= row[0] < F and 1 <= row[1] < 2 * F and 1 <= row[2] < 3 * F for row in discount):
            raise ValueError(f"discount needs {max_order + 1} rows of 3 values (for counts 1, 2, >=3) in "
                             f"sixteenths of a count, each below its count")
        self.max_order = max_order
        self.hash_log2 = hash_log2
        self.discount = discount
        self._disc = np.array(discount, np.int64)
        self.match_min = match_min

    @property
    def params(self) -> dict:
        return {"max_order": self.max_order, "hash_log2": self.hash_log2, "discount": list(self.discount),
                "match_min": self.match_min}

    @property
    def identity(self) -> dict:
        """What a container records: a preset's name when the parameters are a preset's."""
        for name, params in PRESETS.items():
            if params == self.params:
                return {"model": self.name, "preset": name}
        return {"model": self.name, "params": self.params}

    @classmethod
    def from_identity(cls, identity: dict) -> "Strata":
        if "preset" in identity:
            if identity["preset"] not in PRESETS:
                raise ValueError(f"unknown strata preset {identity['preset']!r}")
            return cls.from_params(PRESETS[identity["preset"]])
        return cls.from_params(identity.get("params"))

    @property
    def label(self) -> str:
        return f"strata (built-in, orders 0-{self.max_order}{', repeats' if self.match_min else ''})"

    @classmethod
    def from_params(cls, params: dict) -> "Strata":
        """Build from recorded parameters; anything but exact ints is refused (ValueError)."""
        def as_int(v):
            if type(v) is not int:
                raise ValueError(f"expected an integer, got {v!r}")
            return v

        if not isinstance(params, dict) or set(params) != {"max_order", "hash_log2", "discount", "match_min"}:
            raise ValueError("strata needs exactly max_order, hash_log2, discount and match_min")
        disc = params["discount"]
        if not isinstance(disc, list) or not all(isinstance(row, list) for row in disc):
            raise ValueError("discount must be a list of lists")
        return cls(as_int(params["max_order"]), as_int(params["hash_log2"]), [[as_int(x) for x in row] for row in disc],
                   as_int(params["match_min"]))

    # -- state ---------------------------------------------------------------------------
    def hash_bits(self, n_bytes: int) -> int:
        """log2 of the rows per hashed order: sized to the frame (fewer for short frames)."""
        return max(10, min(self.hash_log2, int(max(n_bytes, 1) - 1).bit_length() + 1))

    def new_state(self, n_bytes: int, n_lanes: int):
        """State for one frame: row arrays from this thread's pool (reused, never cleared:
        a fresh generation makes every old row read as empty) and fresh lane histories."""
        hashed = 1 << self.hash_bits(n_bytes)
        rows = [1, 256] + [hashed] * (self.max_order - 1)
        bases = np.zeros(len(rows), np.int64)
        bases[1:] = np.cumsum(rows)[:-1]
        lines, mtab, rmap, gen = _pool_take(int(sum(rows)), big_rows_for(n_bytes, self.max_order))
        # rows are placed in the order the frame first meets them (_map_rows); nxt: the next
        # row to place, the big rows handed out; seen: the frame's bytes so far (_predict)
        return (lines, bases, np.zeros(n_lanes, np.uint64), np.uint64(gen), rmap, np.zeros(2, np.int64),
                np.zeros((3, 256), np.int64)), mtab

    def new_match(self, buf, mtab, lengths):
        """Match-model state: the frame's bytes (known ones), index, per-lane match, hit rates."""
        n, nl = int(lengths.sum()), len(lengths)
        base = int(lengths[-1]) if nl else 0
        extra = int((lengths > base).sum()) if nl else 0
        mbits = self.hash_bits(n)
        mstat = np.empty((MATCH_LENGTHS * MATCH_LEVELS, 2), np.int32)
        mstat[:, 0] = 2 * (np.arange(MATCH_LENGTHS * MATCH_LEVELS) % MATCH_LEVELS) + 1
        mstat[:, 1] = 2 * MATCH_LEVELS  # each cell starts at its level's midpoint: no change
        lay = np.array([n, max(base, 1), extra, self.match_min, mbits], np.int64)
        return (buf, mtab, np.full(nl, -1, np.int64), np.zeros(nl, np.int64), mstat, lay, np.full(nl, -1, np.int64), np.zeros(nl, np.int64))

    # -- the two passes ------------------------------------------------------------------
    def teacher_chunks(self, data: np.ndarray, starts: np.ndarray, lengths: np.ndarray, chunk_steps: int = 256):
        """Yield (symbols, tables) for consecutive step ranges, in coding order."""
        n = int(lengths.sum())
        (state, mtab), hb = self.new_state(n, len(lengths)), self.hash_bits(n)
        match = self.new_match(data, mtab, lengths)
        try:
            work = new_work(len(lengths), self.max_order)
            yield from run_chunks(lengths, chunk_steps, lambda t0, t1, syms, tab: _teacher(
                state, match, data, starts, lengths, t0, t1, self.max_order, hb, self._disc, syms, tab, work))
        finally:
            _pool_give(state)

    def stepper(self, lengths: np.ndarray):
        """Decoder side: returns step(prev_syms, m_prev, m) -> tables (m, 256); call it once
        per step, in order, with the previous step's symbols."""
        n = int(lengths.sum())
        (state, mtab), hl = self.new_state(n, len(lengths)), self.hash_bits(n)
        match = self.new_match(np.zeros(max(n, 1), np.uint8), mtab, lengths)
        starts = np.zeros(len(lengths), np.int64)
        starts[1:] = np.cumsum(lengths)[:-1]
        tab = np.empty((max(len(lengths), 1), 256), np.float64)
        mo, disc = self.max_order, self._disc
        work = new_work(len(lengths), mo)
        t = [-1]

        def step(prev_syms, m_prev, m):
            _step(state, match, starts, prev_syms, t[0], m_prev, m, mo, hl, disc, tab, work)
            t[0] += 1
            return tab[:m]

        def run(key, widths, by_step):
            C.bind_tables(key, tab)
            return _decode_steps(state, match, starts, mo, hl, disc, tab, work, C.ASK, key, widths, by_step,
                                 np.zeros(by_step.shape[1], np.int32))

        step.run = run
        step.close = lambda: _pool_give(state)
        return step
