"""`weft`: the learned byte model. Integer-exact inference, numpy or torch backend.

An autoregressive MLP over a window of the W previous bytes of a lane (the published
masked-autoencoder family: the distribution of byte i depends on bytes before i only,
here by construction of the window):

    x      = concat(emb[c_{i-W}], ..., emb[c_{i-1}],     int8, W*E values (256 = before the lane)
                    hemb[row_1], ..., hemb[row_K])       int8, K*D values (hashed contexts, optional)
    acc    = x @ w1 + b1                                 int32
    h      = clamp((acc * m1 + 2**(s1-1)) >> s1, 0, 127) the ReLU and requantisation, integers
    logit  = h @ w2 + b2                                 int32
    freq   = lut[min((max(logit) - logit) * mo + 2**(so-1) >> so, len(lut) - 1)]

Hashed contexts (presets with `hash_orders`): for each order k, row_k picks one of
2**hash_bits rows of a table of its own by a hash of the last k bytes of the window
(`context_rows`), so the network sees which longer context it is in, not only the bytes
(the hashing trick for embeddings; a row no training context reached stays zero).

`lut` (stored in the model file, so no exp() runs at inference) holds
round(2**20 * exp(-k / 32)), at least 1: the table is a softmax evaluated on a grid of
1/32 nat. Both products run as float32 matrix products of integer-valued operands; the
bounds below keep every partial sum under 2**24, which makes them exact in any
summation order, thread count or batch shape.

The encoder computes the tables of a whole chunk of steps in one teacher-forced pass;
the decoder computes one step for every lane at once.
"""
from __future__ import annotations

import numpy as np
from numba import njit

PAD = 256  # context symbol for positions before the start of a lane
LUT_STEPS_PER_NAT = 32
CHUNK_SYMBOLS = 4096
# hash of a context: h = h * FNV_PRIME + (byte + 1) over the last k bytes, newest first
# (the 64-bit FNV prime, Fowler-Noll-Vo), then the row is the top bits of h * 2**64/phi
# (multiplicative hashing, Knuth, TAOCP vol. 3, 6.4). All uint64, wrapping: exact.
FNV_PRIME = np.uint64(0x100000001B3)
GOLDEN_MIX = np.uint64(0x9E3779B97F4A7C15)
HASH_KEYS = ("hash_orders", "hash_bits", "hash_embed")


def context_rows(ctx: np.ndarray, orders, bits: int) -> np.ndarray:
    """Row of every hashed-context table for each context window: (N, K) int64, the rows
    of table k offset by k * 2**bits (the tables are stored one after the other)."""
    out = np.empty((len(ctx), len(orders)), np.int64)
    _context_rows(np.ascontiguousarray(ctx), np.asarray(orders, np.int64), bits, out)
    return out


@njit(cache=True, nogil=True)
def _context_rows(ctx, orders, bits, out):
    W = ctx.shape[1]
    shift = np.uint64(64 - bits)
    for n in range(ctx.shape[0]):
        h = np.uint64(0)
        k = 0
        for j in range(1, orders[-1] + 1):
            # uint64 throughout (a uint64 meeting a signed integer would become a float)
            h = h * FNV_PRIME + (np.uint64(ctx[n, W - j]) + np.uint64(1))
            if j == orders[k]:
                out[n, k] = np.int64((h * GOLDEN_MIX) >> shift) + (k << bits)
                k += 1


def input_width(params: dict) -> int:
    return params["window"] * params["embed"] + len(params.get("hash_orders", ())) * params.get("hash_embed", 0)


def check_arrays(params: dict, arrays: dict) -> None:
    """Refuse a model whose arrays do not fit its parameters or break the exactness bounds."""
    W, E, H = params["window"], params["embed"], params["hidden"]
    # Exact positive integers: with embed 0 the arrays below are empty and the exactness
    # bound holds for any window, so a hostile file could ask for a window of 10**12.
    if not all(type(v) is int and v >= 1 for v in (W, E, H)):
        raise ValueError("window, embed and hidden must be positive integers")
    if "hash_orders" in params:
        orders, bits, D = params["hash_orders"], params["hash_bits"], params["hash_embed"]
        if not (isinstance(orders, list) and 1 <= len(orders) <= 16 and all(type(o) is int for o in orders)
                and orders == sorted(set(orders)) and 1 <= orders[0] and orders[-1] <= W):
            raise ValueError("hash_orders must be 1-16 increasing orders within the window")
        if not (type(bits) is int and 8 <= bits <= 24 and type(D) is int and 1 <= D <= 64):
            raise ValueError("hash_bits must be 8..24 and hash_embed 1..64")
    want = {"emb": ((257, E), np.int8), "w1": ((input_width(params), H), np.int8), "b1": ((H,), np.int32),
            "w2": ((H, 256), np.int8), "b2": ((256,), np.int32)}
    if "hash_orders" in params:
        want["hemb"] = ((len(params["hash_orders"]) << params["hash_bits"], params["hash_embed"]), np.int8)
    for name, (shape, dt) in want.items():
        a = arrays.get(name)
        if a is None or tuple(a.shape) != shape or a.dtype != dt:
            raise ValueError(f"array {name} must be {np.dtype(dt).name} {shape}")
    lut = arrays.get("lut")
    if lut is None or lut.ndim != 1 or not 2 <= len(lut) <= 1 << 16 or lut.dtype != np.int32:
        raise ValueError("array lut must be int32 of length 2..65536")
    if int(lut.min()) < 1 or int(lut.max()) > 1 << 24:
        raise ValueError("lut values must be 1..2**24")
    # exactness: |x|,|w1| <= 127 with input_width terms; 0 <= h <= 127, |w2| <= 127 with H terms
    if 127 * 127 * input_width(params) >= 1 << 24 or 127 * 127 * H >= 1 << 24:
        raise ValueError("the input width and hidden must keep 127*127*terms below 2**24")
    for k in ("m1", "mo"):
        if not 0 < params[k] < 1 << 31:
            raise ValueError(f"{k} out of range")
    for k in ("s1", "so"):
        if not 1 <= params[k] <= 40:
            raise ValueError(f"{k} out of range")
    if int(np.abs(arrays["b1"]).max(initial=0)) >= 1 << 24 or int(np.abs(arrays["b2"]).max(initial=0)) >= 1 << 24:
        raise ValueError("biases out of range")


@njit(cache=True, nogil=True)
def _requant(acc, b1, m1, s1, out):
    """h = clamp((acc + b1) * m1 + 2**(s1-1) >> s1, 0, 127), from the exact float32 product."""
    half = np.int64(1) << (s1 - 1)
    for i in range(acc.shape[0]):
        for j in range(acc.shape[1]):
            v = ((np.int64(acc[i, j]) + b1[j]) * m1 + half) >> s1
            out[i, j] = np.float32(min(max(v, 0), 127))


@njit(cache=True, nogil=True)
def _softmax_lut(lg, b2, mo, so, lut, out):
    """freq = lut[min(round((max - logit) * mo / 2**so), len - 1)], row by row."""
    half = np.int64(1) << (so - 1)
    last = lut.shape[0] - 1
    row = np.empty(lg.shape[1], np.int64)
    for i in range(lg.shape[0]):
        mx = np.int64(-(1 << 62))
        for j in range(lg.shape[1]):
            row[j] = np.int64(lg[i, j]) + b2[j]
            mx = max(mx, row[j])
        for j in range(lg.shape[1]):
            # bound: max - logit < 2**26 and mo < 2**31, so the product < 2**57
            k = ((mx - row[j]) * mo + half) >> so
            out[i, j] = np.float64(lut[min(k, last)])


PAR_MIN_ROWS = 1024  # below this, a second thread costs more than it saves


def _in_halves(n: int, kernel) -> None:
    """kernel(a, b) over rows a:b, the two halves in two threads when there are enough
    rows (the encoder's chunks; never a decoder step). The kernels release the GIL and
    compute each row on its own, so the integers are the same either way."""
    global _POOL
    if n < PAR_MIN_ROWS:
        kernel(0, n)
        return
    if _POOL is None:
        from concurrent.futures import ThreadPoolExecutor

        _POOL = ThreadPoolExecutor(max_workers=1, thread_name_prefix="weft")
    mid = n // 2
    other = _POOL.submit(kernel, 0, mid)
    kernel(mid, n)
    other.result()


_POOL = None


def close_pool() -> None:
    """End the helper thread of `_in_halves`, if one was started (the next big chunk starts
    it again): a process about to fork workers must run no other thread."""
    global _POOL
    pool, _POOL = _POOL, None
    if pool is not None:
        pool.shutdown(wait=True)


def forget_pool() -> None:
    """In a forked child: the parent's helper thread is not here (a task given to its pool
    would wait forever); the next big chunk starts one of the child's own."""
    global _POOL
    _POOL = None


@njit(cache=True, nogil=True)
def _embed_rows(ctx, emb, out):
    """out[n] = concat(emb[ctx[n, 0]], ..., emb[ctx[n, W-1]]), as float32 (the gather without
    numpy's temporaries). Every ctx value must be a row of emb (numba does not check): the
    callers make them so."""
    W, E = ctx.shape[1], emb.shape[1]
    for n in range(ctx.shape[0]):
        for w in range(W):
            e = ctx[n, w]
            for d in range(E):
                out[n, w * E + d] = emb[e, d]


@njit(cache=True, nogil=True)
def _gather_inputs(ctx, emb, hemb, rows, out):
    """out[n] = concat(emb[ctx[n, 0]], ..., emb[ctx[n, W-1]], hemb[rows[n, 0]], ...), as float32."""
    W, E, D = ctx.shape[1], emb.shape[1], hemb.shape[1]
    for n in range(ctx.shape[0]):
        c = 0
        for w in range(W):
            e = ctx[n, w]
            for d in range(E):
                out[n, c] = emb[e, d]
                c += 1
        for k in range(rows.shape[1]):
            r = rows[n, k]
            for d in range(D):
                out[n, c] = hemb[r, d]
                c += 1


class NumpyKernels:
    """The integer forward pass with numpy (float32 BLAS on integer values)."""

    name = "numpy"

    def __init__(self, params, arrays):
        self.p = params
        self.emb = arrays["emb"]
        self.hemb = arrays.get("hemb")
        self.w1 = arrays["w1"].astype(np.float32)
        self.b1 = arrays["b1"].astype(np.int64)
        self.w2 = arrays["w2"].astype(np.float32)
        self.b2 = arrays["b2"].astype(np.int64)
        self.lut = arrays["lut"].astype(np.int64)

    def tables(self, ctx: np.ndarray) -> np.ndarray:
        p, N = self.p, len(ctx)
        ctx = np.ascontiguousarray(ctx)
        x = np.empty((N, self.w1.shape[0]), np.float32)
        if self.hemb is not None:
            rows = context_rows(ctx, p["hash_orders"], p["hash_bits"])
            _in_halves(N, lambda a, b: _gather_inputs(ctx[a:b], self.emb, self.hemb, rows[a:b], x[a:b]))
        else:
            _in_halves(N, lambda a, b: _embed_rows(ctx[a:b], self.emb, x[a:b]))
        # bound: |x|, |w1| <= 127, input_width terms: every partial sum < 2**24, exact
        acc = x @ self.w1
        h = np.empty(acc.shape, np.float32)
        _in_halves(N, lambda a, b: _requant(acc[a:b], self.b1, p["m1"], p["s1"], h[a:b]))
        # bound: 0 <= h <= 127, |w2| <= 127, hidden terms: every partial sum < 2**24, exact
        lg = h @ self.w2
        out = np.empty(lg.shape, np.float64)
        _in_halves(N, lambda a, b: _softmax_lut(lg[a:b], self.b2, p["mo"], p["so"], self.lut, out[a:b]))
        return out


def _torch_kernels(params, arrays):
    """The torch backend (models/weft_torch.py), loaded by name only when it is asked for:
    decoding never imports torch, and the import graph stays free of it (tests/test_layers.py)."""
    import importlib

    return importlib.import_module(__package__ + ".weft_torch").TorchKernels(params, arrays)


BACKENDS = {"numpy": NumpyKernels, "torch": _torch_kernels}


class Weft:
    name = "weft"
    kind = "learned"
    coder = "queue"  # tables arrive in coding order, chunk by chunk: the range coder stores none

    def __init__(self, params: dict, arrays: dict, backend: str = "numpy"):
        self.params = {k: int(params[k]) for k in ("window", "embed", "hidden", "m1", "s1", "mo", "so")}
        if any(k in params for k in HASH_KEYS):  # absent from models without hashed contexts
            if not all(k in params for k in HASH_KEYS):
                raise ValueError(f"a hashed-context model needs all of {', '.join(HASH_KEYS)}")
            self.params.update({k: params[k] for k in HASH_KEYS})
        check_arrays(self.params, arrays)
        self.arrays = arrays
        self.window = self.params["window"]
        self.set_backend(backend)

    def set_backend(self, backend: str) -> None:
        if backend not in BACKENDS:
            raise ValueError(f"unknown backend {backend!r} (have: {', '.join(BACKENDS)})")
        self.kernels = BACKENDS[backend](self.params, self.arrays)

    @classmethod
    def from_params(cls, params: dict, arrays: dict | None = None) -> "Weft":
        if arrays is None:
            raise ValueError("weft needs its arrays (a model file)")
        return cls(params, arrays)

    @property
    def identity(self) -> dict:  # only ever used through a model file (models.Loaded)
        return {"model": self.name, "params": self.params}

    def tables(self, ctx: np.ndarray) -> np.ndarray:
        return self.kernels.tables(ctx)

    def lanes_for(self, n: int) -> int:
        """No adaptive state to share, so lanes cost only their first W bytes' context:
        one lane per 2 KiB, at most 64, for batched decoding."""
        return max(1, min(64, n // 2048))

    # -- the two passes ------------------------------------------------------------------
    def _lane_windows(self, data, starts, lengths):
        """Padded lane matrix: row b is W pads then lane b's bytes (then pads)."""
        W, nl = self.window, len(lengths)
        L = int(lengths[0]) if nl else 0
        mat = np.full((nl, W + L), PAD, np.int16)
        for b in range(nl):
            mat[b, W:W + lengths[b]] = data[starts[b]:starts[b] + lengths[b]]
        return mat

    def teacher_chunks(self, data, starts, lengths, chunk_steps=None):
        """All tables, chunk by chunk of steps, in coding order (step, then lane)."""
        nl = len(lengths)
        if nl == 0 or int(lengths[0]) == 0:
            return
        W = self.window
        mat = self._lane_windows(data, starts, lengths)
        n_steps = int(lengths[0])
        per = chunk_steps or max(1, CHUNK_SYMBOLS // nl)
        for t0 in range(0, n_steps, per):
            t1 = min(n_steps, t0 + per)
            ts = np.arange(t0, t1)
            active = lengths[None, :] > ts[:, None]  # (steps, lanes); rows are prefixes
            tt, bb = np.nonzero(active)  # row-major: step order, then lane order
            tt = tt + t0
            ctx = mat[bb[:, None], tt[:, None] + np.arange(W)[None, :]]
            syms = mat[bb, tt + W].astype(np.int32)
            yield syms, self.tables(ctx)

    def stepper(self, lengths):
        """Decoder: one step of every active lane per call. The products are small here,
        where BLAS threads cost more than they give (measured: 13 KB/s with two threads on
        a busy machine, 114 KB/s with one), so BLAS runs single-threaded until close()."""
        from threadpoolctl import threadpool_limits

        W, nl = self.window, len(lengths)
        ctx = np.full((max(nl, 1), W), PAD, np.int16)
        limit = threadpool_limits(limits=1, user_api="blas")

        def step(prev_syms, m_prev, m):
            if m_prev:
                ctx[:m_prev, :-1] = ctx[:m_prev, 1:]
                ctx[:m_prev, -1] = prev_syms[:m_prev]
            return self.tables(ctx[:m])

        step.close = limit.restore_original_limits
        return step
