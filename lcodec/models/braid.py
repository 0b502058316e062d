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
"""
from __future__ import annotations

import numpy as np
from numba import njit

from . import strata as S

P_BITS = S.P_BITS
F = S.F
_M1, _M2 = S._M1, S._M2
SALT = np.uint64(0x5BD1E995)  # keeps corpus hashes apart from strata's row hashes


# -- hashing (the builder computes the same numbers with numpy) ---------------------------
@njit(cache=True, nogil=True)
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


@njit(cache=True, nogil=True)
def _lookup(tags, base, size, x):
    """Slot of the context with hash x in one order's table, or -1 when it is not there."""
    tag = np.uint32(((x >> np.uint64(8)) & np.uint64(0xFFFFFFFF)) | np.uint64(1))
    j = base + np.int64(((x >> np.uint64(32)) * np.uint64(size)) >> np.uint64(32))
    end = base + size
    while True:
        t = tags[j]
        if t == tag:
            return j
        if t == 0:
            return -1
        j += 1
        if j == end:
            j = base


@njit(cache=True, nogil=True)
def _insert(tags, base, size, x):
    tag = np.uint32(((x >> np.uint64(8)) & np.uint64(0xFFFFFFFF)) | np.uint64(1))
    j = base + np.int64(((x >> np.uint64(32)) * np.uint64(size)) >> np.uint64(32))
    end = base + size
    while tags[j] != 0:
        if tags[j] == tag:
            return -1  # two contexts with the same tag in the same order: keep the first
        j += 1
        if j == end:
            j = base
    tags[j] = tag
    return j


# -- the layers ----------------------------------------------------------------------------
@njit(cache=True, nogil=True)
def _corpus_layer(esym, ecnt, a, b, disc, p, tmp):
    """P <- (n(s) - d(n(s)) + E * P) / T over one stored row (entries a..b)."""
    one = np.int64(1) << P_BITS
    a1 = np.int64(disc[0])
    a2 = np.int64(disc[1]) - a1
    a3 = np.int64(disc[2]) - np.int64(disc[1])
    t = np.int64(0)
    esc = np.int64(0)
    for e in range(a, b):
        c = np.int64(ecnt[e])
        t += c
        esc += a1 + a2 * (c >= 2) + a3 * (c >= 3)
    if t == 0:
        return
    # bound: entries <= 256 and counts <= 255, so esc <= 47 * t and t * F < 2**21; with
    # inv <= 2**32 / (F * t) and p[s] <= 2**21: esc * p[s] * inv <= 47/16 * 2**53 and
    # n * one * inv <= 2**52 (n <= F * t), so num * inv < 2**56 fits int64.
    inv = (np.int64(1) << 32) // (t * F)
    for e in range(a, b):
        s = esym[e]
        c = np.int64(ecnt[e])
        n = c * F - (a1 + a2 * (c >= 2) + a3 * (c >= 3))
        tmp[e - a] = ((n * one + esc * p[s]) * inv) >> 32
    for s in range(256):
        p[s] = (esc * p[s] * inv) >> 32
    for e in range(a, b):
        p[esym[e]] = tmp[e - a]


@njit(cache=True, nogil=True)
def _file_layer(counts, tot, tags, r, chk, disc, p):
    """The same over the file's own dense row r (strata's tables), when its tag matches."""
    if tags[r] != chk:
        return
    t = np.int64(tot[r])
    if t == 0:
        return
    one = np.int64(1) << P_BITS
    a1 = np.int64(disc[0])
    a2 = np.int64(disc[1]) - a1
    a3 = np.int64(disc[2]) - np.int64(disc[1])
    row = counts[r]
    esc = np.int64(0)
    for s in range(256):
        c = np.int64(row[s])
        esc += a1 * (c >= 1) + a2 * (c >= 2) + a3 * (c >= 3)
    # bound: as strata._predict (num < 2**35, inv <= 2**28)
    inv = (np.int64(1) << 32) // (t * F)
    for s in range(256):
        c = np.int64(row[s])
        n = c * F - (a1 * (c >= 1) + a2 * (c >= 2) + a3 * (c >= 3))
        p[s] = ((n * one + esc * p[s]) * inv) >> 32


@njit(cache=True, nogil=True)
def _braid_predict(corpus, fstate, hist, slots, checks, max_order, dfile, p, tmp):
    ctags, cstart, esym, ecnt, cbase, csize, dcorp, mode = corpus
    counts, tot, dist, ftags = fstate[0], fstate[1], fstate[2], fstate[3]
    use_file = mode[0] == 0
    one = np.int64(1) << P_BITS
    for s in range(256):
        p[s] = one >> 8
    corder = cbase.shape[0] - 1
    for k in range(max_order + 1):
        if k <= corder:
            j = _lookup(ctags, cbase[k], csize[k], _ctx_hash(hist, k))
            if j >= 0:
                _corpus_layer(esym, ecnt, np.int64(cstart[j]), np.int64(cstart[j + 1]), dcorp[k], p, tmp)
        if use_file:
            _file_layer(counts, tot, ftags, slots[k], checks[k], dfile[k], p)


@njit(cache=True, nogil=True)
def _teacher(corpus, state, match, data, starts, lengths, t0, t1, max_order, hash_log2, dfile, out_syms, out_tab):
    """Tables of steps t0..t1 for all active lanes, in coding order, updating state."""
    counts, tot, dist, tags, bases, hist, gen = state
    slots = np.empty(max_order + 1, np.int64)
    checks = np.empty(max_order + 1, np.uint64)
    p = np.empty(256, np.int64)
    tmp = np.empty(256, np.int64)
    nl = lengths.shape[0]
    use_match = match[5][3] > 0 and corpus[7][0] == 0
    i = 0
    for t in range(t0, t1):
        m = 0
        while m < nl and lengths[m] > t:
            m += 1
        for b in range(m):
            S._row_slots(hist[b], max_order, hash_log2, bases, gen, slots, checks)
            _braid_predict(corpus, state, hist[b], slots, checks, max_order, dfile, p, tmp)
            if use_match:
                S._match_predict(match, b, p)
            S._emit(p, out_tab[i + b])
            out_syms[i + b] = data[starts[b] + t]
        for b in range(m):
            sym = data[starts[b] + t]
            S._row_slots(hist[b], max_order, hash_log2, bases, gen, slots, checks)
            S._update(counts, tot, dist, tags, slots, checks, max_order, sym)
            hist[b] = (hist[b] << np.uint64(8)) | np.uint64(sym)
            if use_match:
                S._match_update(match, b, starts[b], t, sym, hist[b], gen)
        i += m
    return i


@njit(cache=True, nogil=True)
def _step(corpus, state, match, starts, syms, t_prev, m_prev, m, max_order, hash_log2, dfile, out_tab, work):
    """Decoder step: count the symbols of step t_prev (m_prev lanes), then predict m lanes.
    `work` holds the scratch arrays, made once per frame (a step is too short to allocate)."""
    counts, tot, dist, tags, bases, hist, gen = state
    slots, checks, p, tmp = work
    buf = match[0]
    use_match = match[5][3] > 0 and corpus[7][0] == 0
    for b in range(m_prev):
        buf[starts[b] + t_prev] = syms[b]
    for b in range(m_prev):
        sym = syms[b]
        S._row_slots(hist[b], max_order, hash_log2, bases, gen, slots, checks)
        S._update(counts, tot, dist, tags, slots, checks, max_order, sym)
        hist[b] = (hist[b] << np.uint64(8)) | np.uint64(sym)
        if use_match:
            S._match_update(match, b, starts[b], t_prev, sym, hist[b], gen)
    for b in range(m):
        S._row_slots(hist[b], max_order, hash_log2, bases, gen, slots, checks)
        _braid_predict(corpus, state, hist[b], slots, checks, max_order, dfile, p, tmp)
        if use_match:
            S._match_predict(match, b, p)
        S._emit(p, out_tab[b])


# -- the model -----------------------------------------------------------------------------
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
        if not isinstance(params, dict) or set(params) != allowed:
            raise ValueError(f"braid needs exactly {', '.join(sorted(allowed))}")
        if type(params["corpus_order"]) is not int or not 0 <= params["corpus_order"] <= 8:
            raise ValueError("corpus_order must be 0..8")
        self.file = S.Strata.from_params({k: params[k] for k in ("max_order", "hash_log2", "discount", "match_min")})
        self.params = dict(params)
        check_arrays(params, arrays)
        self.arrays = arrays
        sizes = arrays["sizes"]
        bases = np.zeros(len(sizes), np.int64)
        bases[1:] = np.cumsum(sizes)[:-1]
        self.corpus = (arrays["tags"], arrays["start"], arrays["sym"], arrays["cnt"], bases, sizes.astype(np.int64),
                       arrays["corpus_discount"].astype(np.int64), np.array([1 if prior_only else 0], np.int64))

    @classmethod
    def from_params(cls, params: dict, arrays: dict | None = None) -> "Braid":
        if arrays is None:
            raise ValueError("braid needs its arrays (a model file)")
        return cls(params, arrays)

    @property
    def identity(self) -> dict:  # only ever used through a model file (models.Loaded)
        return {"model": self.name, "params": self.params}

    def set_corpus_discount(self, disc) -> None:
        """Replace the corpus discounts (the training search tries settings this way)."""
        self.corpus = self.corpus[:6] + (np.array(disc, np.int64),) + self.corpus[7:]

    def set_file_discount(self, disc) -> None:
        """Replace the per-file tables' discounts (tried by the training search too)."""
        self.file = S.Strata.from_params({**self.file.params, "discount": [list(map(int, r)) for r in disc]})
        self.params["discount"] = [list(map(int, r)) for r in disc]

    def teacher_chunks(self, data, starts, lengths, chunk_steps: int = 256):
        f = self.file
        n = int(lengths.sum())
        (state, mtab), hb = f.new_state(n, len(lengths)), f.hash_bits(n)
        match = f.new_match(data, mtab, lengths)
        n_steps = int(lengths[0]) if len(lengths) else 0
        nl = len(lengths)
        syms = np.empty(chunk_steps * nl, np.int32)
        tab = np.empty((chunk_steps * nl, 256), np.float64)
        try:
            for t0 in range(0, n_steps, chunk_steps):
                t1 = min(n_steps, t0 + chunk_steps)
                k = _teacher(self.corpus, state, match, data, starts, lengths, t0, t1, f.max_order, hb, f._disc, syms, tab)
                yield syms[:k], tab[:k]
        finally:
            S._pool_give(state)

    def stepper(self, lengths):
        f = self.file
        n = int(lengths.sum())
        (state, mtab), hl = f.new_state(n, len(lengths)), f.hash_bits(n)
        match = f.new_match(np.zeros(max(n, 1), np.uint8), mtab, lengths)
        starts = np.zeros(len(lengths), np.int64)
        starts[1:] = np.cumsum(lengths)[:-1]
        tab = np.empty((max(len(lengths), 1), 256), np.float64)
        mo, disc, corpus = f.max_order, f._disc, self.corpus
        work = (np.empty(mo + 1, np.int64), np.empty(mo + 1, np.uint64), np.empty(256, np.int64), np.empty(256, np.int64))
        t = [-1]

        def step(prev_syms, m_prev, m):
            _step(corpus, state, match, starts, prev_syms, t[0], m_prev, m, mo, hl, disc, tab, work)
            t[0] += 1
            return tab[:m]

        step.close = lambda: S._pool_give(state)
        return step
