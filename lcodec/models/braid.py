"""`braid`: corpus statistics braided with the file's own. Integer-only.

A braid model file holds context statistics counted on a training corpus (orders
0..C): for each context seen often enough, the bytes that followed it and their counts,
scaled so that a row's largest count is at most 255. Low orders hold continuation
counts (the number of distinct one-byte-longer contexts a byte followed in), the
highest order raw counts: the usual modified absolute-discounting recipe for n-gram
models (Chen and Goodman, 1998, "An empirical study of smoothing techniques for
language modeling"), here with one discount each for counts of 1, 2 and >= 3.

Coding a file, the prediction is built from the uniform distribution upwards, order by
order, two layers per order:

    corpus order k:  P <- ( n_c(s) - d_c(n_c(s)) + E_c * P ) / T_c
    file order k:    P <- ( n_f(s) - d_f(n_f(s)) + E_f * P ) / T_f

where n_c are the stored corpus counts of the current order-k context and n_f the
counts this file has produced so far in the same context (strata's adaptive tables,
lcodec/models/strata.py), each layer skipped where its context has no counts. So the
file's own evidence always has the last word at each order and gives its escape mass
to the corpus's opinion of the same context, which in turn escapes to the next lower
order. Over that, strata's repeat model follows long matches within the frame. Every
number is an integer; the corpus tables are read-only, so lanes, frames and threads
share them freely, and the two passes (teacher and step) run the same kernels.

The corpus tables live in an open-addressing hash table per order: 32-bit tags, linear
probing, a slot's entries at `start[j]:start[j+1]` of the entry arrays.

This module holds the chain's driver (hashing, the file's update, the passes) and the
model; the layers, escape weights and secondary estimation are in braid_layers.py, the
tree refinement in braid_fork.py.
"""
from __future__ import annotations

import threading

import numpy as np

from ..coding import coder as C
from . import recall as R
from . import strata as S
from . import braid_fork as BF
from . import braid_layers as BL
from .kernel_cache import forget_if_changed, inlined, kernel
from .braid_fork import (  # noqa: F401 - the names stay importable from here
    FORK_STEP, FORK_RANGE, FORK_POINTS, FORK_LIM, FORK_ONE, FORK_MASS, FORK_HASH_BITS, FORK_CTX, FORK_TABLES,
    FORK_INPUTS, FORK_SETS_A, FORK_SETS_B, FORK_REPEAT_X, FORK_WMAX, FORK_W0, _fork_tables, FORK_STRETCH,
    FORK_GRID, FORK_SQUASH, _fork_hash, _fork_read, _fork_move, _fork_sums, _fork_keep, _fork_sets,
    _fork_predict, _fork_update)
from .braid_layers import (  # noqa: F401 - the names stay importable from here
    ONE_A, INV_BITS, _row_totals, _sparse_layer, WFRAC, WMAX, N_LAYER_IDS, COUNT_CLASSES, BYTE_CLASSES,
    BYTE_BASE, AGE_CLASSES, AGE_BASE, MIX_CLASSES, LREC, _byte_class_table, BYTE_CLASS, _root64, _odds_table,
    ODDS, _mix_class, _mix_escape, _sparse_layer_mix, TAG_LO, TAG_HI, TOT, N1, N2, N3, LAST, BIG, META, SMALL,
    SYM0, CNT0, _tag_is, _file_count, _file_add, _file_layer, _file_layer_mix, _mix_update, SSE_LEVELS,
    SSE_LIMIT, _sse_predict, _sse_update)

forget_if_changed(__file__, [R.__file__, S.__file__, BL.__file__, BF.__file__, C.__file__])  # kernels here inline those modules' kernels

P_BITS = S.P_BITS
F = S.F
_M1, _M2 = S._M1, S._M2
SALT = np.uint64(0x5BD1E995)  # keeps corpus hashes apart from strata's row hashes


# -- hashing (the builder computes the same numbers with numpy) ---------------------------
@inlined
def _ctx_hash(hist, k):
    ctx = hist if k >= 8 else hist & np.uint64((1 << (8 * k)) - 1)
    x = (ctx + np.uint64(k) + SALT) * _M1
    x = x ^ (x >> np.uint64(31))
    return x * _M2


def ctx_hash_np(ctx: np.ndarray, k: int) -> np.ndarray:
    """Vectorised _ctx_hash over uint64 contexts already masked to k bytes."""
    with np.errstate(over="ignore"):
        x = (ctx + np.uint64(k) + SALT) * _M1
        x = x ^ (x >> np.uint64(31))
        return x * _M2


def tag_of(x):
    return ((x >> np.uint64(8)) & np.uint64(0xFFFFFFFF)) | np.uint64(1)


@inlined
def _home(base, size, x):
    """Home slot of hash x in one order's table."""
    return base + np.int64(((x >> np.uint64(32)) * np.uint64(size)) >> np.uint64(32))


@inlined
def _probe(slot2, base, size, x, j):
    """Slot of the context with hash x, probing from slot j, or -1 when it is not there."""
    tag = np.uint32(((x >> np.uint64(8)) & np.uint64(0xFFFFFFFF)) | np.uint64(1))
    end = base + size
    while True:
        t = slot2[j, 0]
        if t == tag:
            return j
        if t == 0:
            return -1
        j += 1
        if j == end:
            j = base


# -- lanes with tables of their own (optional: model files with `lane_tables`) ------------
# Lanes normally share the file's tables. With lane_tables each lane's contexts are its
# own rows: order 0 and 1 rows per lane, and the lane's number mixed into the hash of the
# higher orders (the same hashed table, so memory does not grow with lanes).
@inlined
def _slots(mix, b, hist, max_order, hash_log2, bases, gen, slots, checks):
    if mix[5][3] == 0:
        S._row_slots(hist, max_order, hash_log2, bases, gen, slots, checks)
        return
    g = gen << np.uint64(32)
    slots[0] = bases[0] + b
    checks[0] = g
    for k in range(1, max_order + 1):
        if k == 1:
            slots[k] = bases[k] + 256 * b + np.int64(hist & np.uint64(0xFF))
            checks[k] = g
        else:
            ctx = hist if k >= 8 else hist & np.uint64((1 << (8 * k)) - 1)
            x = (ctx + np.uint64(k)) * _M1
            x = x ^ (x >> np.uint64(31)) ^ (np.uint64(b) * SALT)
            x = x * _M2
            slots[k] = bases[k] + np.int64(x >> np.uint64(64 - hash_log2))
            checks[k] = g | ((x >> np.uint64(8)) & np.uint64(0xFFFFFFFF))


@kernel
def _file_update(fs, slots, checks, b, max_order, sym, now=-1):
    """Count `sym` in lane b's file rows (slots[b], checks[b]) from the highest order down, stopping below the first
    order that knew it (strata's update exclusion, with its halving at 255). A row left by
    an earlier frame, or by another context of the same slot (another tag), starts empty;
    a big row it held is not used again in this frame."""
    big, meta, m8, nxt = fs[0], fs[1], fs[7], fs[6]
    for k in range(max_order, -1, -1):
        r = slots[b, k]
        chk = checks[b, k]
        if not _tag_is(meta, r, chk):
            S._claim_row(meta, r, chk, BIG)  # tag, total, distinct bytes (N1), big row
            meta[r, N2] = 0
            meta[r, N3] = 0
        n1 = np.int64(meta[r, N1])
        g = np.int64(meta[r, BIG])
        i = -1  # the byte's place in the line's list (small rows)
        if g:
            c = np.int64(big[g - 1, sym])
        else:
            i, c = S._line_find(m8, r, n1, sym)
        if c >= S.COUNT_LIMIT:
            t = 0
            m2 = 0
            m3 = 0
            for j in range(n1):
                if g:
                    v = np.int64(big[g - 1, big[g - 1, 256 + j]])
                else:
                    v = np.int64(m8[r, CNT0 + j])
                if v > 1:
                    v = (v + 1) >> 1
                if g:
                    big[g - 1, big[g - 1, 256 + j]] = v
                else:
                    m8[r, CNT0 + j] = v
                t += v
                m2 += v >= 2
                m3 += v >= 3
            meta[r, TOT] = t
            meta[r, N2] = m2
            meta[r, N3] = m3
            c = np.int64(big[g - 1, sym]) if g else np.int64(m8[r, CNT0 + i])
        if c == 0 and not g and n1 == SMALL:  # the line is full: move the row to a big row
            g = S._take_big(meta, m8, big, r, nxt, BIG)
            for j in range(SMALL):  # and its bytes in the order they came
                big[g - 1, 256 + j] = m8[r, SYM0 + j]
        if g:
            big[g - 1, sym] = c + 1
            if c == 0:
                big[g - 1, 256 + n1] = sym
        elif c == 0:
            m8[r, SYM0 + n1] = sym
            m8[r, CNT0 + n1] = 1
        else:
            m8[r, CNT0 + i] = c + 1
        meta[r, TOT] += 1
        if now >= 0:
            meta[r, LAST] = np.uint32(now)
        if c == 0:
            meta[r, N1] += 1
        elif c == 1:
            meta[r, N2] += 1
        elif c == 2:
            meta[r, N3] += 1
        if c != 0:
            if now >= 0:  # the rows below saw their context too
                for k2 in range(k - 1, -1, -1):
                    if _tag_is(meta, slots[b, k2], checks[b, k2]):
                        meta[slots[b, k2], LAST] = np.uint32(now)
            break


@kernel
def _probe_lanes(corpus, hist, m, sink):
    """found[b, k] <- the corpus slot of lane b's order-k context, or -1, for lanes 0..m-1:
    every lane's and every order's probe in one pass, independent loads the processor
    overlaps (the chain that reads them, one lane at a time, depends on each in turn)."""
    slot2, ent, cbase, csize, found = corpus[0], corpus[1], corpus[2], corpus[3], corpus[6]
    acc = np.uint16(0)
    for b in range(m):
        h = hist[b]
        for k in range(cbase.shape[0]):
            x = _ctx_hash(h, k)
            j = _probe(slot2, cbase[k], csize[k], x, _home(cbase[k], csize[k], x))
            found[b, k] = j
            if j >= 0:  # and the row's first entries
                acc ^= ent[slot2[j, 1]]
    sink[0] = acc


@kernel
def _lanes_rows(mix, state, hist, m, max_order, hash_log2, slots2, checks2, sink):
    """slots2[b], checks2[b] <- lane b's file rows (placed as they are first met, lane by
    lane, order by order) for lanes 0..m-1, and a first read of each row's line. The rows
    of a long frame are far apart in memory; read here, every lane's and every order's
    loads are independent and the processor overlaps them, where the chain, which reads a
    row and then decides what to do with it, would wait for each in turn."""
    bases, gen, rmap, nxt, meta = state[2], state[4], state[5], state[6], state[1]
    acc = np.uint32(0)
    for b in range(m):
        sl = slots2[b]
        _slots(mix, b, hist[b], max_order, hash_log2, bases, gen, sl, checks2[b])
        S._map_rows(rmap, nxt, gen, max_order, sl)
        for k in range(max_order + 1):
            acc ^= meta[sl[k], TAG_LO]
    sink[0] = acc


@kernel
def _touch_updates(match, rc, hist, syms, m, use_match, sink):
    """A first read of the repeat model's and the corpus memory's index entries that the
    updates of lanes 0..m-1 (lane b coded syms[b]) will look up: every lane's in one pass,
    so the loads overlap; nothing is written but sink."""
    if not use_match:
        return
    acc = np.uint32(0)
    for b in range(m):
        h = (hist[b] << np.uint64(8)) | np.uint64(syms[b])
        acc ^= S._match_touch(match, h) ^ R.touch(rc, b, np.int64(syms[b]), hist[b])
    sink[0] = acc


@kernel
def _braid_predict(corpus, fstate, hist, slots, checks, max_order, dfile, p, mix, b):
    """p <- the braided distribution (integers, total about 2**P_BITS), top layer first:
    at each order the file's own row sits above the corpus row of the same context.
    Lane b's file rows are slots[b], checks[b]; with the escape weights on (mix[5][1] != 0),
    each layer used is recorded for lane b."""
    slot2, ent, cbase, csize, dcorp, mode, found = corpus
    fmeta = fstate[1]
    use_file = mode[0] == 0
    # chain_cut c > 0: the chain stops once less than 2**-c of the mass is left below (it goes
    # to the uniform distribution); 0: only when nothing is left (model files without it)
    cut_a = (np.int64(ONE_A) >> mode[1]) if mode[1] > 0 else np.int64(1)
    use_mix = mix[5][1] != 0
    lrec = mix[2]
    last = np.int64(hist & np.uint64(0xFF))
    bcls = mix[7][last]
    now = mix[5][4]
    nlay = 0
    corder = cbase.shape[0] - 1
    for s in range(256):
        p[s] = 0
    A = np.int64(ONE_A)
    for k in range(max(max_order, corder), -1, -1):
        if use_file and k <= max_order:
            r = slots[b, k]
            if _tag_is(fmeta, r, checks[b, k]) and fmeta[r, TOT] > 0:
                if use_mix:
                    rec = lrec[b, nlay]
                    rec[0] = 1
                    rec[1] = r
                    rec[7] = k
                    rec[8] = bcls
                    rec[9] = last
                    age = now - np.int64(fmeta[r, LAST])
                    q = 0
                    while q < AGE_CLASSES - 1 and age >= (np.int64(16) << (2 * q)):
                        q += 1
                    rec[11] = q
                    nlay += 1
                    A = _file_layer_mix(fstate, r, dfile[k], p, A, mix, rec, k)
                else:
                    A = _file_layer(fstate, r, dfile[k], p, A)
        if k <= corder:
            j = found[b, k]
            if j >= 0:
                a0, b0 = np.int64(slot2[j, 1]), np.int64(slot2[j + 1, 1])
                if use_mix:
                    rec = lrec[b, nlay]
                    rec[0] = 2
                    rec[1] = a0
                    rec[2] = b0
                    rec[7] = k
                    rec[8] = bcls
                    rec[9] = last
                    rec[11] = 0
                    A, used = _sparse_layer_mix(ent, a0, b0, dcorp[k], p, A, mix, rec, 9 + k)
                    nlay += 1 if used else 0
                else:
                    A = _sparse_layer(ent, a0, b0, dcorp[k], p, A)
        if A < cut_a:  # what is left below is too little to be worth the lower layers
            break
    u = (A << (P_BITS - 8)) >> 31  # the uniform distribution's share: A / 256 of 2**P_BITS
    for s in range(256):
        p[s] += u
    if use_mix:
        mix[3][b] = nlay
        mix[4][b] = u


@kernel
def _after_chain(match, rc, mix, fork, b, hist, p, buf, cur, use_match, use_sse, use_fork):
    """The stages after the chain, for lane b (buf[cur] is the byte to come): the in-frame
    repeat model, the corpus memory, secondary estimation, the tree refinement."""
    if use_match:
        S._match_predict(match, b, p)
    rb = match[7][b] if use_match and match[2][b] >= 0 else -1  # the in-frame repeat's byte
    if use_match and rc.on != 0:
        R.predict(rc, b, p, rb)
    e = rb if rb >= 0 else R.expected(rc, b)  # -1 when neither repeat names a byte
    if use_sse:
        _sse_predict(mix, match, b, hist, p, e if e >= 0 else match[7][b], 1 if e >= 0 else 0)
    if use_fork:
        _fork_sets(fork, b, hist, mix, match)
        _fork_predict(fork, b, hist, p, buf, cur, e)


def new_work(n_lanes: int, max_order: int) -> tuple:
    """Scratch of _teacher and _step, made once per frame: each lane's row slots and tags
    per order, the distribution, a sink."""
    nl = max(n_lanes, 1)
    return (np.empty((nl, max_order + 1), np.int64), np.empty((nl, max_order + 1), np.uint64),
            np.empty(256, np.int64), np.zeros(1, np.uint32))


@kernel
def _teacher(corpus, state, match, data, starts, lengths, t0, t1, max_order, hash_log2, dfile, out_syms, out_tab, mix, fork, rc,
             work):
    """Tables of steps t0..t1 for all active lanes, in coding order, updating state. work:
    new_work's scratch (the kernel allocates nothing)."""
    hist, gen = state[3], state[4]
    nl = lengths.shape[0]
    slots2, checks2, p, sink = work
    use_match = match[5][3] > 0 and corpus[5][0] == 0
    use_mix = mix[5][1] != 0
    use_sse = use_match and mix[5][2] != 0
    use_fork = fork[4][0] != 0
    i = 0
    for t in range(t0, t1):
        m = 0
        while m < nl and lengths[m] > t:
            m += 1
        mix[5][4] = t
        _lanes_rows(mix, state, hist, m, max_order, hash_log2, slots2, checks2, sink)
        _probe_lanes(corpus, hist, m, sink)
        for b in range(m):
            _braid_predict(corpus, state, hist[b], slots2, checks2, max_order, dfile, p, mix, b)
            if use_fork:
                _fork_keep(fork, p)
            _after_chain(match, rc, mix, fork, b, hist[b], p, data, starts[b] + t, use_match, use_sse, use_fork)
            S._emit(p, out_tab[i + b])
            out_syms[i + b] = data[starts[b] + t]
        _touch_updates(match, rc, hist, out_syms[i:i + m], m, use_match, sink)
        if use_mix:  # every lane's weights update before any count changes
            for b in range(m):
                _mix_update(mix, corpus, state, dfile, b, np.int64(data[starts[b] + t]))
        if use_sse:
            for b in range(m):
                _sse_update(mix, match, b, np.int64(data[starts[b] + t]))
        if use_fork:
            for b in range(m):
                _fork_update(fork, b, np.int64(data[starts[b] + t]), starts[b] + t)
        for b in range(m):
            sym = data[starts[b] + t]
            _file_update(state, slots2, checks2, b, max_order, sym, t if use_mix else -1)
            if use_match:
                R.update(rc, b, data, starts[b], t, np.int64(sym), hist[b])
            hist[b] = (hist[b] << np.uint64(8)) | np.uint64(sym)
            if use_match:
                S._match_update(match, b, starts[b], t, sym, hist[b], gen)
        i += m
    return i


@kernel
def _step(corpus, state, match, starts, syms, t_prev, m_prev, m, max_order, hash_log2, dfile, out_tab, work, mix, fork, rc):
    """Decoder step: count the symbols of step t_prev (m_prev lanes), then predict m lanes.
    `work` holds the scratch arrays, made once per frame (a step is too short to allocate)."""
    hist, gen = state[3], state[4]
    slots2, checks2, p, sink = work
    buf = match[0]
    use_match = match[5][3] > 0 and corpus[5][0] == 0
    for b in range(m_prev):
        buf[starts[b] + t_prev] = syms[b]
    _touch_updates(match, rc, hist, syms, m_prev, use_match, sink)
    if mix[5][1] != 0:
        for b in range(m_prev):
            _mix_update(mix, corpus, state, dfile, b, np.int64(syms[b]))
    use_sse = use_match and mix[5][2] != 0
    if use_sse:
        for b in range(m_prev):
            _sse_update(mix, match, b, np.int64(syms[b]))
    use_fork = fork[4][0] != 0
    if use_fork:  # before any count changes, like the escape weights (it reads none of them)
        for b in range(m_prev):
            _fork_update(fork, b, np.int64(syms[b]), starts[b] + t_prev)
    for b in range(m_prev):
        sym = syms[b]  # its rows are the ones the step before predicted it from (slots2[b])
        _file_update(state, slots2, checks2, b, max_order, sym, t_prev if mix[5][1] != 0 else -1)
        if use_match:
            R.update(rc, b, buf, starts[b], t_prev, np.int64(sym), hist[b])
        hist[b] = (hist[b] << np.uint64(8)) | np.uint64(sym)
        if use_match:
            S._match_update(match, b, starts[b], t_prev, sym, hist[b], gen)
    mix[5][4] = t_prev + 1
    _lanes_rows(mix, state, hist, m, max_order, hash_log2, slots2, checks2, sink)
    _probe_lanes(corpus, hist, m, sink)
    for b in range(m):
        _braid_predict(corpus, state, hist[b], slots2, checks2, max_order, dfile, p, mix, b)
        if use_fork:
            _fork_keep(fork, p)
        _after_chain(match, rc, mix, fork, b, hist[b], p, buf, starts[b] + t_prev + 1, use_match, use_sse, use_fork)
        S._emit(p, out_tab[b])


@kernel
def _decode_steps(corpus, state, match, starts, max_order, hash_log2, dfile, tab, work, mix, fork, rc, ask, key,
                  widths, by_step, prev):
    """Every decoder step of a frame in one compiled loop (as strata's _decode_steps)."""
    for t in range(by_step.shape[0]):
        m = S._width(widths, t)
        _step(corpus, state, match, starts, prev, t - 1, S._width(widths, t - 1) if t else 0, m, max_order, hash_log2,
              dfile, tab, work, mix, fork, rc)
        if not S._symbols_of_step(ask, key, tab, m, prev, by_step, t):
            return t
    return by_step.shape[0]


# -- the file's tables: one idle set per thread, reused across frames -----------------------
_local = threading.local()


def _pool_take(n_rows: int, n_big: int):
    """Row arrays with at least n_rows rows and n_big big rows, and a generation not used
    before with them. Fresh arrays are zeroed by the system page by page, so a frame pays
    only for the pages its rows touch."""
    pool = getattr(_local, "pool", None)
    if (pool is not None and not pool["busy"] and pool["rows"] >= n_rows and pool["big"] >= n_big
            and pool["gen"] < 0xFFFFFFFF):
        pool["busy"] = True
        pool["gen"] += 1
        return pool["arrays"], pool["gen"]
    meta, m8, big = S.row_arrays(n_rows, n_big, 512)  # a big row: 256 counts, then the bytes seen in order
    arrays = (big, meta, np.zeros(n_rows, np.uint64), np.zeros(n_rows, np.uint64), m8)
    if pool is None or not pool["busy"]:
        _local.pool = {"rows": n_rows, "big": n_big, "arrays": arrays, "gen": 1, "busy": True}
    return arrays, 1  # zeroed tags hold generation 0, which never matches


def _pool_give(state):
    pool = getattr(_local, "pool", None)
    if pool is not None and pool["arrays"][1] is state[1]:
        pool["busy"] = False


# -- the model -----------------------------------------------------------------------------
def check_memory(params: dict, arrays: dict):
    """The corpus memory's text and the two indexes built over it, or None when the model
    has none. The parameters must describe exactly the stored text."""
    keys = ("recall_min", "recall_long", "memory_bytes")
    given = [params.get(k) for k in keys]
    text = arrays.get("memory")
    if given == [None] * 3 and text is None:
        if arrays.get("recall_prior") is not None:
            raise ValueError("recall_prior without a memory")
        return None
    if any(type(v) is not int for v in given):
        raise ValueError("recall_min, recall_long and memory_bytes go together with the array memory")
    mn, lg, nb = given
    if not (R.MIN_LEN[0] <= mn <= R.MIN_LEN[1] and R.LONG_LEN[0] <= lg <= R.LONG_LEN[1]):
        raise ValueError(f"recall_min must be {R.MIN_LEN[0]}..{R.MIN_LEN[1]} and recall_long {R.LONG_LEN[0]}..{R.LONG_LEN[1]}")
    if text is None or text.dtype != np.uint8 or text.ndim != 1:
        raise ValueError("memory must be a uint8 array")
    if not (1 <= nb <= R.MAX_TEXT) or len(text) != nb:
        raise ValueError(f"memory holds {len(text):,} bytes but the parameters say memory_bytes {nb:,}")
    pr = arrays.get("recall_prior")
    if pr is not None and (pr.dtype != np.int32 or pr.shape != (R.CELLS, 2) or int(pr[:, 1].max()) > R.LIMIT
                           or int(pr[:, 0].min()) < 0 or (pr[:, 0] > pr[:, 1]).any()):
        raise ValueError(f"recall_prior must be int32 ({R.CELLS}, 2) of 0 <= hits <= trials <= {R.LIMIT}")
    return text, R.build_index(text, mn), R.build_index(text, lg)


def check_arrays(params: dict, arrays: dict) -> None:
    """Refuse tables that do not fit together (a hostile file must not index out of range)."""
    C = params["corpus_order"]
    want = {"tags": np.uint32, "start": np.uint32, "sym": np.uint8, "cnt": np.uint8, "sizes": np.int64,
            "corpus_discount": np.int64}
    for name, dt in want.items():
        a = arrays.get(name)
        if a is None or a.dtype != dt or a.ndim != (2 if name == "corpus_discount" else 1):
            raise ValueError(f"array {name} must be a {np.dtype(dt).name} array")
    sizes, tags, start = arrays["sizes"], arrays["tags"], arrays["start"]
    if sizes.shape != (C + 1,) or int(sizes.min()) < 2 or int(sizes.sum()) != len(tags):
        raise ValueError("sizes must give one table of at least 2 slots per corpus order, summing to the tags")
    if len(start) != len(tags) + 1 or int(start[0]) != 0 or int(start[-1]) != len(arrays["sym"]):
        raise ValueError("start must bound every slot's entries")
    if len(arrays["cnt"]) != len(arrays["sym"]):
        raise ValueError("sym and cnt must be the same length")
    d = np.diff(start.astype(np.int64))
    if int(d.min(initial=0)) < 0 or int(d.max(initial=0)) > 256:
        raise ValueError("a slot holds 0..256 entries")
    # every table needs an empty slot (tag 0), or a lookup of an absent context never ends
    bases = np.concatenate([[0], np.cumsum(sizes)])
    for k in range(C + 1):
        if not (tags[bases[k]:bases[k + 1]] == 0).any():
            raise ValueError(f"corpus table of order {k} has no empty slot")
    if int(arrays["cnt"].min(initial=1)) < 1:
        raise ValueError("stored counts are 1..255")
    mp = arrays.get("match_prior")
    if mp is not None:
        cells = S.MATCH_LENGTHS * S.MATCH_LEVELS
        if mp.dtype != np.int32 or mp.shape != (cells, 2) or int(mp[:, 1].min()) < 1 \
                or int(mp[:, 1].max()) > S.MATCH_LIMIT or int(mp[:, 0].min()) < 0 or (mp[:, 0] > mp[:, 1]).any():
            raise ValueError(f"match_prior must be int32 ({cells}, 2) of hits <= trials <= {S.MATCH_LIMIT}, trials >= 1")
    mi = arrays.get("mix_init")
    if mi is not None:
        lim = WMAX << WFRAC
        if mi.dtype != np.int32 or mi.shape != (MIX_CLASSES,) or int(np.abs(mi).max()) > lim:
            raise ValueError(f"mix_init must be int32 ({MIX_CLASSES},), each within +-{lim}")
    disc = arrays["corpus_discount"]
    if disc.shape != (C + 1, 3) or not all(1 <= r[0] < F and 1 <= r[1] < 2 * F and 1 <= r[2] < 3 * F for r in disc.tolist()):
        raise ValueError("corpus_discount must hold 3 discounts per order, each below its count")


class Braid:
    """Corpus tables (from a model file) braided with strata's per-file tables."""

    name = "braid"
    kind = "learned"
    coder = "queue"

    def __init__(self, params: dict, arrays: dict, prior_only: bool = False):
        """prior_only: the corpus layers alone (no file layers, no repeat model), for the
        ablation figures; such an object is only ever costed, never used to pack."""
        allowed = {"corpus_order", "max_order", "hash_log2", "discount", "match_min"}
        optional = {"mix_shift", "sse_bits", "lane_tables", "fork_shift", "fork_mix_shift", "fork_cut",
                    "fork_sets", "fork_inputs", "fork_final", "recall_min", "recall_long", "memory_bytes",
                    "chain_cut"}  # absent: the plain chain (model files made before it)
        if not isinstance(params, dict) or not allowed <= set(params) <= allowed | optional:
            raise ValueError(f"braid needs exactly {', '.join(sorted(allowed))} (and optionally {', '.join(sorted(optional))})")
        ms = params.get("mix_shift", 0)
        if type(ms) is not int or not (ms == 0 or 8 <= ms <= 30):
            raise ValueError("mix_shift must be 0 (off) or 8..30")
        self.mix_shift = ms
        sb = params.get("sse_bits", 0)
        if type(sb) is not int or not (sb == 0 or 4 <= sb <= 16):
            raise ValueError("sse_bits must be 0 (off) or 4..16")
        self.sse_bits = sb
        lt = params.get("lane_tables", 0)
        if lt not in (0, 1) or type(lt) is not int:
            raise ValueError("lane_tables must be 0 or 1")
        self.lane_tables = lt
        cc = params.get("chain_cut", 0)
        if type(cc) is not int or not 0 <= cc <= 30:
            raise ValueError("chain_cut must be 0 (off) or 1..30")
        self.chain_cut = cc
        fork = [params.get(k) for k in ("fork_shift", "fork_mix_shift", "fork_cut")]
        if fork != [None] * 3:
            if any(type(v) is not int for v in fork) or not (1 <= fork[0] <= 10 and 10 <= fork[1] <= 24 and 1 <= fork[2] <= 22):
                raise ValueError("fork_shift (1..10), fork_mix_shift (10..24) and fork_cut (1..22) go together")
        more = [params.get(k, 0) for k in ("fork_sets", "fork_inputs", "fork_final")]
        if any(type(v) is not int for v in more) or more[0] not in (0, 1) or more[1] not in (0, 1) \
                or not (more[2] == 0 or 1 <= more[2] <= 10):
            raise ValueError("fork_sets and fork_inputs must be 0 or 1, fork_final 0 (off) or 1..10")
        if any(more) and fork[0] is None:
            raise ValueError("fork_sets, fork_inputs and fork_final need fork_shift, fork_mix_shift and fork_cut")
        self.fork = fork + more if fork[0] is not None and not prior_only else None  # the prior alone: no adaptation
        if type(params["corpus_order"]) is not int or not 0 <= params["corpus_order"] <= 8:
            raise ValueError("corpus_order must be 0..8")
        self.file = S.Strata.from_params({k: params[k] for k in ("max_order", "hash_log2", "discount", "match_min")})
        self.params = dict(params)
        check_arrays(params, arrays)
        self.arrays = arrays
        self.memory = check_memory(params, arrays)  # (text, short index, long index) or None
        self.recall_prior = arrays.get("recall_prior") if self.memory is not None else None
        self.match_prior = arrays.get("match_prior")
        self.mix_init = arrays.get("mix_init")
        sizes = arrays["sizes"]
        bases = np.zeros(len(sizes), np.int64)
        bases[1:] = np.cumsum(sizes)[:-1]
        # in memory, each slot's tag and first entry side by side, and each entry's byte and
        # count in one 16-bit word: one cache line per slot and per row where four were
        slot2 = np.empty((len(arrays["tags"]) + 1, 2), np.uint32)
        slot2[:-1, 0] = arrays["tags"]
        slot2[-1, 0] = 0
        slot2[:, 1] = arrays["start"]
        ent = arrays["sym"].astype(np.uint16) | (arrays["cnt"].astype(np.uint16) << np.uint16(8))
        self.corpus = (slot2, ent, bases, sizes.astype(np.int64), arrays["corpus_discount"].astype(np.int64),
                       np.array([1 if prior_only else 0, cc], np.int64), np.zeros(len(sizes), np.int64))

    @classmethod
    def from_params(cls, params: dict, arrays: dict | None = None) -> "Braid":
        if arrays is None:
            raise ValueError("braid needs its arrays (a model file)")
        return cls(params, arrays)

    @property
    def identity(self) -> dict:
        """Never written: archives name a braid model by its file's SHA-256 (models.Loaded);
        a bare object (and above all a prior-only one) cannot be named, so it cannot pack."""
        raise ValueError("a braid model packs only when loaded from its model file (lcodec.models.load_model)")

    def new_state(self, n: int, n_lanes: int):
        """The file's tables for one frame (rows as strata sizes them) and its match index."""
        f = self.file
        hashed = 1 << f.hash_bits(n)
        own = max(n_lanes, 1) if self.lane_tables else 1
        rows = [own, 256 * own] + [hashed] * (f.max_order - 1)
        bases = np.zeros(len(rows), np.int64)
        bases[1:] = np.cumsum(rows)[:-1]
        arrays, gen = _pool_take(int(sum(rows)), S.big_rows_for(n, f.max_order))
        # rows are placed in the order a frame first meets them (strata's _map_rows);
        # nxt: the next row to place, the big rows handed out
        return (arrays[0], arrays[1], bases, np.zeros(n_lanes, np.uint64), np.uint64(gen), arrays[3],
                np.zeros(2, np.int64), arrays[4]), arrays[2]

    def lanes_for(self, n: int) -> int:
        """One lane per 64 KiB of frame, at most 16: lanes share the file's tables but each
        loses its neighbours' recent bytes, which costs more here than for strata (on the
        standard library, 16 KiB lanes cost 1.0% against one lane per file)."""
        return max(1, min(16, n // 65536))

    def set_corpus_discount(self, disc) -> None:
        """Replace the corpus discounts (the training search tries settings this way)."""
        self.corpus = self.corpus[:4] + (np.array(disc, np.int64),) + self.corpus[5:]

    def set_file_discount(self, disc) -> None:
        """Replace the per-file tables' discounts (tried by the training search too)."""
        self.file = S.Strata.from_params({**self.file.params, "discount": [list(map(int, r)) for r in disc]})
        self.params["discount"] = [list(map(int, r)) for r in disc]

    def new_match(self, buf, mtab, lengths):
        """strata's repeat model, its hit-rate cells started from the corpus's (when the
        model file has them) instead of from no change."""
        match = self.file.new_match(buf, mtab, lengths)
        if self.match_prior is not None:
            match[4][:] = self.match_prior
        return match

    def frame_corpus(self, n_lanes: int):
        """The corpus tables with a scratch array of the frame's own (the probe results): the
        tables are shared by every thread, the scratch must not be (frames decoded in
        threads side by side wrote each other's probe results before this)."""
        return self.corpus[:6] + (np.zeros((max(n_lanes, 1), len(self.corpus[6])), np.int64),)

    def new_mix(self, n_lanes: int, weights=None):
        """The escape weights' state for one frame: weights (from the model file's table, or
        zero; or `weights` itself, updated in place, when training carries them from file
        to file), the odds table, per-lane records of the layers used, and the settings."""
        on = self.mix_shift != 0
        if on and weights is not None:
            W = weights
        else:
            W = np.zeros(MIX_CLASSES if on else 1, np.int64)
            if on and self.mix_init is not None:
                W[:] = self.mix_init
        nl = max(n_lanes, 1) if on else 1
        cells = (2 << self.sse_bits) * SSE_LEVELS if self.sse_bits else 1
        sse = np.empty((cells, 2), np.int32)
        sse[:, 0] = 2 * (np.arange(cells) % SSE_LEVELS) + 1  # each level's midpoint
        sse[:, 1] = 2 * SSE_LEVELS
        return (W, ODDS, np.zeros((nl, 2 * N_LAYER_IDS, LREC), np.int64), np.zeros(nl, np.int64),
                np.zeros(nl, np.int64),
                np.array([self.mix_shift, 1 if on else 0, self.sse_bits, self.lane_tables, 0], np.int64),
                np.zeros(2 * N_LAYER_IDS, np.int64), BYTE_CLASS, sse, np.full(max(n_lanes, 1), -1, np.int64),
                np.full(max(n_lanes, 1), -1, np.int64))

    def new_recall(self, n_lanes: int) -> R.Recall:
        """The corpus memory's per-frame state (lanes' followed places, hit-rate cells)."""
        if self.memory is None:
            return R.new_state(None, None, None, 4, 9, n_lanes)
        text, short, long = self.memory
        return R.new_state(text, short, long, self.params["recall_min"], self.params["recall_long"], n_lanes,
                           self.recall_prior)

    def new_fork(self, n_lanes: int):
        """The tree refinement's state for one frame: the context tables (FORK_CTX contexts
        x 256 nodes x FORK_POINTS shares + 1, int32, zeroed: a point is set when first read,
        and a zeroed mapping costs nothing where no context reaches), the constant tables,
        the settings, per-lane records for the update, the mixer weights (one set per node;
        with fork_sets FORK_SETS_A + FORK_SETS_B sets, the second kind starting at zero),
        scratch for the subtree sums, the distribution before the repeat model, and each
        lane's weight sets and final-stage points."""
        nl = max(n_lanes, 1) if self.fork is not None else 1
        cfg = self.fork if self.fork is not None else [0] * 6
        sets = FORK_SETS_A + FORK_SETS_B if cfg[3] else 1
        wts = np.zeros((256 * sets, FORK_INPUTS), np.int64)
        wts[:256 * (FORK_SETS_A if cfg[3] else 1), :FORK_TABLES + 1] = FORK_W0
        rows = FORK_CTX * 256 if self.fork is not None else 1
        return (np.zeros((rows, FORK_POINTS), np.int32), FORK_GRID, FORK_STRETCH, FORK_SQUASH, np.array(cfg, np.int64),
                np.full((nl, 2), -1, np.int64), np.zeros((nl, FORK_TABLES + 1), np.int64), np.zeros((nl, 256), np.int64),
                np.zeros((nl, 256, FORK_INPUTS), np.int64), np.zeros((nl, 256), np.int64),
                wts, np.zeros(512, np.int64), np.zeros(256, np.int64), np.zeros(256, np.int64),
                np.zeros(256, np.int64), np.tile(np.array([0, -1], np.int64), (nl, 1)),
                np.zeros((nl, 256), np.int64), np.zeros(512, np.int64))

    def teacher_chunks(self, data, starts, lengths, chunk_steps: int = 256, match_stats=None, mix_weights=None,
                       recall_stats=None):
        """match_stats: an array of the hit-rate cells' shape, to which this frame's
        observations (hits, trials) are added at the end (training uses it); recall_stats
        the same for the corpus memory's cells; mix_weights:
        an int64 array of MIX_CLASSES escape weights the frame starts from and leaves its
        own in (training carries them from file to file)."""
        f = self.file
        n = int(lengths.sum())
        (state, mtab), hb = self.new_state(n, len(lengths)), f.hash_bits(n)
        match = self.new_match(data, mtab, lengths)
        mix = self.new_mix(len(lengths), mix_weights)
        fork = self.new_fork(len(lengths))
        rc = self.new_recall(len(lengths))
        start_cells = match[4].copy()
        start_recall = rc.cells.copy()
        corpus = self.frame_corpus(len(lengths))
        work = new_work(len(lengths), f.max_order)
        try:
            yield from S.run_chunks(lengths, chunk_steps, lambda t0, t1, syms, tab: _teacher(
                corpus, state, match, data, starts, lengths, t0, t1, f.max_order, hb, f._disc, syms, tab, mix, fork, rc,
                work))
            if match_stats is not None:
                match_stats += np.maximum(match[4].astype(np.int64) - start_cells, 0)
            if recall_stats is not None:
                recall_stats += np.maximum(rc.cells.astype(np.int64) - start_recall, 0)
        finally:
            _pool_give(state)

    def stepper(self, lengths):
        f = self.file
        n = int(lengths.sum())
        (state, mtab), hl = self.new_state(n, len(lengths)), f.hash_bits(n)
        match = self.new_match(np.zeros(max(n, 1), np.uint8), mtab, lengths)
        starts = np.zeros(len(lengths), np.int64)
        starts[1:] = np.cumsum(lengths)[:-1]
        tab = np.empty((max(len(lengths), 1), 256), np.float64)
        mo, disc, corpus = f.max_order, f._disc, self.frame_corpus(len(lengths))
        work = new_work(len(lengths), mo)
        mix = self.new_mix(len(lengths))
        fork = self.new_fork(len(lengths))
        rc = self.new_recall(len(lengths))
        t = [-1]

        def step(prev_syms, m_prev, m):
            _step(corpus, state, match, starts, prev_syms, t[0], m_prev, m, mo, hl, disc, tab, work, mix, fork, rc)
            t[0] += 1
            return tab[:m]

        def run(key, widths, by_step):
            C.bind_tables(key, tab)
            return _decode_steps(corpus, state, match, starts, mo, hl, disc, tab, work, mix, fork, rc, C.ASK, key,
                                 widths, by_step, np.zeros(by_step.shape[1], np.int32))

        step.run = run

        step.close = lambda: _pool_give(state)
        return step
