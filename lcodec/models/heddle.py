"""`heddle`: a user's own autoregressive network, run by a generic integer runtime.

A heddle model file holds a small graph of ops (JSON) and their integer arrays; no code.
The graph is written by the torch layer kit (lcodec/training/kit/) and runs here with
numpy and numba alone. It models *records*: a grid of H x W positions coded in raster
order (a vector of D symbols is 1 x D; a text is cut into records of 1 x W bytes), or,
with `record` [0, 0], a whole image plane of any size (a pixel model).

Ops (each reads earlier ops' outputs by index: a cycle cannot be written):

    embed   t[p]  = concat_k table[x[p + shift_k]]          int8 rows; PAD row for outside
    conv    t[p]  = act(sum_taps W[tap] . u[p + tap] + b)   taps in rows above and this row
    linear  t[j]  = act(sum_i W[i, j] u[i] + b[j])           u flattened position-major
    add     t     = clamp((u * ma + v * mb + 2**(s-1)) >> s, 0, 127)     a residual sum
    head    freq  = lut[min(((max - logit) * mo + 2**(so-1)) >> so, len - 1)]   (last op)

    act relu:   clamp(((acc + b) * m + 2**(s-1)) >> s, 0, 127)  (m per output unit)
    act logits: acc + b, only a head reads it

Exactness: every product runs in float32 BLAS on integers; the loader checks, for every
output column, 127 * sum |w| < 2**24, so every partial sum is below 2**24 and the result
is exact in any summation order, thread count or batch shape. Everything else is integer
arithmetic (models/heddle_ops.py).

Causality is derived, not trusted: the loader computes for every element of every tensor
its *ready count*, the number of leading symbols of the record it depends on (through
every non-zero weight), and refuses a model whose table for position p needs the symbol
at p or later, naming the pair. The decoder's step pass uses the same counts: at record
position q it computes exactly the elements whose ready count is q, so a decode costs
one parallel pass in total, and both passes run the same kernels on the same integers.
"""
from __future__ import annotations

import numpy as np

from ..errors import ModelError
from .heddle_ops import ACT_MAX, SUM_LIMIT, add_logits, column_bound, requant_relu, residual, softmax_lut
from .strata import Strata

NAME = "heddle"
OPS = ("embed", "conv", "linear", "add", "head")
MAX_POSITIONS = 1 << 16  # positions of a fixed record
MAX_OPS = 64
MAX_SHIFTS = 64
MAX_WIDTH = 4096  # channels of a grid tensor
MAX_LANES = 4096  # records decoded in lockstep (the container's lane limit)
TEXT_LANE_BYTES = 16384  # lanes of a frame not made of whole records: one per 16 KiB, at most 16
CHUNK_ROWS = 1 << 15  # rows of one product in a parallel pass
MAX_WEIGHTS = 1 << 25  # weights of all products together (float32 copies: 128 MiB at most)
MAX_RECORD_ELEMENTS = 1 << 24  # activations of one record (all tensors but the logits); larger: refused
BATCH_ELEMENTS = 1 << 25  # activations of the records computed at once (bounds the lanes of a frame)
IMAGE_ELEMENTS = 1 << 27  # activations of one image plane; larger images go as bytes (strata)


class Spec:
    """One op, checked: kind, input indices, integer parameters, arrays, output tensor."""

    def __init__(self, **kw):
        self.__dict__.update(kw)


def _int(d, key, lo, hi, where):
    v = d.get(key)
    if type(v) is not int or not lo <= v <= hi:
        raise ValueError(f"{where}: {key} must be an integer in {lo}..{hi}")
    return v


def _array(arrays, name, dtype, shape):
    a = arrays.get(name)
    if a is None:
        raise ValueError(f"array {name} is missing")
    if a.dtype != np.dtype(dtype) or tuple(a.shape) != tuple(shape):
        raise ValueError(f"array {name} must be {np.dtype(dtype).name} {tuple(shape)}, not {a.dtype} {tuple(a.shape)}")
    return a


def _bias_mult(arrays, i, width, act, where):
    b = _array(arrays, f"{i}.b", np.int32, (width,)).astype(np.int64)
    if int(np.abs(b).max(initial=0)) >= SUM_LIMIT:
        raise ValueError(f"{where}: bias out of range (|b| < 2**24)")
    if act == "relu":
        m = _array(arrays, f"{i}.m", np.int32, (width,)).astype(np.int64)
        if width and int(m.min()) < 1:
            raise ValueError(f"{where}: multipliers must be 1..2**31-1")
        return b, m
    return b, None


def parse_graph(params: dict, arrays: dict):
    """Check a model file's graph and arrays; (record (H, W), alphabet, ops, lut).
    Raises ValueError with what is wrong."""
    if not isinstance(params, dict) or set(params) != {"record", "alphabet", "ops"}:
        raise ValueError("heddle needs exactly record, alphabet and ops")
    rec = params["record"]
    if not (isinstance(rec, list) and len(rec) == 2 and all(type(x) is int for x in rec)):
        raise ValueError("record must be [rows, cols]")
    H, W = rec
    if (H, W) != (0, 0) and not (H >= 1 and W >= 1 and H * W <= MAX_POSITIONS):
        raise ValueError(f"record must be [0, 0] (image-sized) or rows x cols of 1..{MAX_POSITIONS} positions")
    A = _int(params, "alphabet", 2, 256, "alphabet")
    ops = params["ops"]
    if not isinstance(ops, list) or not 2 <= len(ops) <= MAX_OPS:
        raise ValueError(f"ops must be a list of 2..{MAX_OPS} ops")
    P = H * W  # 0 for an image-sized model
    lut = arrays.get("lut")
    if lut is None or lut.ndim != 1 or not 2 <= len(lut) <= 1 << 16 or lut.dtype != np.int32:
        raise ValueError("array lut must be int32 of length 2..65536")
    if int(lut.min()) < 1 or int(lut.max()) > 1 << 24:
        raise ValueError("lut values must be 1..2**24")
    specs = []
    n_weights = 0
    for i, op in enumerate(ops):
        where = f"op {i}"
        if not isinstance(op, dict) or op.get("op") not in OPS:
            raise ValueError(f"{where}: unknown op {op.get('op') if isinstance(op, dict) else op!r} "
                             f"(this lcodec runs: {', '.join(OPS)})")
        kind = op["op"]
        allowed = {"embed": {"op", "shifts"}, "conv": {"op", "in", "act", "shift"},
                   "linear": {"op", "in", "act", "shift"}, "add": {"op", "in", "ma", "mb", "shift"},
                   "head": {"op", "in", "mo", "so"}}[kind]
        if set(op) != allowed:
            raise ValueError(f"{where} ({kind}) needs exactly the keys {', '.join(sorted(allowed))}")
        ins = op.get("in", [])
        ins = ins if isinstance(ins, list) else [ins]
        for j in ins:
            if type(j) is not int or not 0 <= j < i:
                raise ValueError(f"{where}: input {j!r} is not an earlier op (the graph must run in order, "
                                 "without cycles)")
            if specs[j].kind == "head":
                raise ValueError(f"{where}: reads the head's output")
        if kind == "embed":
            sh = op["shifts"]
            if not (isinstance(sh, list) and 1 <= len(sh) <= MAX_SHIFTS and all(
                    isinstance(s, list) and len(s) == 2 and all(type(v) is int and -256 <= v <= 256 for v in s)
                    for s in sh)):
                raise ValueError(f"{where}: shifts must be 1..{MAX_SHIFTS} pairs [rows, cols] within 256")
            tab = arrays.get(f"{i}.table")
            if tab is None or tab.dtype != np.int8 or tab.ndim != 2 or tab.shape[0] != A + 1 or not 1 <= tab.shape[1]:
                raise ValueError(f"array {i}.table must be int8 ({A + 1}, width)")
            if int(tab.min(initial=0)) < -ACT_MAX:
                raise ValueError(f"{where}: embedding values must be -127..127")
            width = tab.shape[1] * len(sh)
            if width > MAX_WIDTH:
                raise ValueError(f"{where}: output width above {MAX_WIDTH}")
            specs.append(Spec(kind=kind, ins=[], shifts=[tuple(s) for s in sh], table=tab.astype(np.int64),
                              out="grid", width=width, logits=False))
            continue
        if kind == "head":
            if i != len(ops) - 1:
                raise ValueError(f"{where}: the head must be the last op")
            if len(ins) != 1:
                raise ValueError(f"{where}: a head reads one tensor")
            u = specs[ins[0]]
            if not u.logits:
                raise ValueError(f"{where}: a head reads logits (a conv or linear with act 'logits')")
            if (u.out == "grid" and u.width != A) or (u.out == "flat" and u.width != P * A):
                raise ValueError(f"{where}: logits must have alphabet ({A}) values per position")
            mo = _int(op, "mo", 1, (1 << 31) - 1, where)
            so = _int(op, "so", 1, 40, where)
            specs.append(Spec(kind=kind, ins=ins, mo=mo, so=so, out=u.out, width=u.width, logits=False))
            continue
        srcs = [specs[j] for j in ins]
        if any(s.logits for s in srcs):
            raise ValueError(f"{where}: only a head may read logits")
        if kind == "add":
            if len(ins) != 2 or srcs[0].out != srcs[1].out or srcs[0].width != srcs[1].width:
                raise ValueError(f"{where}: add reads two tensors of one shape")
            ma = _int(op, "ma", 1, (1 << 31) - 1, where)
            mb = _int(op, "mb", 1, (1 << 31) - 1, where)
            s = _int(op, "shift", 1, 40, where)
            specs.append(Spec(kind=kind, ins=ins, ma=ma, mb=mb, s=s, out=srcs[0].out, width=srcs[0].width, logits=False))
            continue
        if len(ins) != 1:
            raise ValueError(f"{where}: {kind} reads one tensor")
        u = srcs[0]
        act = op["act"]
        if act not in ("relu", "logits"):
            raise ValueError(f"{where}: act must be 'relu' or 'logits'")
        s = _int(op, "shift", 1, 40, where)
        w = arrays.get(f"{i}.w")
        if w is None or w.dtype != np.int8:
            raise ValueError(f"array {i}.w must be int8")
        n_weights += w.size
        if n_weights > MAX_WEIGHTS:  # before any copy of them is made
            raise ValueError(f"{where}: more than {MAX_WEIGHTS:,} weights in all")
        if int(w.min(initial=0)) < -ACT_MAX:
            raise ValueError(f"{where}: weights must be -127..127")
        if kind == "conv":
            if u.out != "grid":
                raise ValueError(f"{where}: conv reads a grid tensor")
            if w.ndim != 4 or w.shape[1] != u.width or not 1 <= w.shape[0] <= MAX_WIDTH or w.shape[3] % 2 == 0 \
                    or not 1 <= w.shape[2] <= 64 or w.shape[3] > 127:
                raise ValueError(f"array {i}.w must be (out, {u.width}, rows <= 64, odd cols <= 127)")
            cout, cin, kh, kw = w.shape
            taps = [(a, c) for a in range(kh) for c in range(kw) if np.any(w[:, :, a, c])]
            wmat = np.zeros((len(taps) * cin, cout), np.float32)
            for t, (a, c) in enumerate(taps):
                wmat[t * cin:(t + 1) * cin] = w[:, :, a, c].T
            b, m = _bias_mult(arrays, i, cout, act, where)
            spec = Spec(kind=kind, ins=ins, taps=[(a - (kh - 1), c - kw // 2) for a, c in taps], wmat=wmat,
                        b=b, m=m, s=s, out="grid", width=cout, logits=act == "logits")
        else:
            if u.out == "grid" and P == 0:
                raise ValueError(f"{where}: linear needs a fixed record (an image-sized model has none)")
            n_in = u.width * (P if u.out == "grid" else 1)
            if w.ndim != 2 or w.shape[0] != n_in or not 1 <= w.shape[1] <= MAX_POSITIONS * 4:
                raise ValueError(f"array {i}.w must be ({n_in}, units)")
            b, m = _bias_mult(arrays, i, w.shape[1], act, where)
            spec = Spec(kind=kind, ins=ins, wmat=w.astype(np.float32), b=b, m=m, s=s, out="flat",
                        width=w.shape[1], logits=act == "logits")
        # exactness: |u| <= 127 and 127 * sum|w| per column < 2**24 bound every partial sum
        if ACT_MAX * column_bound(spec.wmat) >= SUM_LIMIT:
            raise ValueError(f"{where}: a product could reach 2**24 (127 * sum |w| of a column must stay below "
                             "2**24; the kit's layers keep it so by construction)")
        specs.append(spec)
    if specs[0].kind != "embed" or specs[-1].kind != "head":
        raise ValueError("the first op must be an embed and the last a head")
    if P == 0 and specs[-1].out != "grid":
        raise ValueError("an image-sized model's head must read a grid")
    return (H, W), A, specs, lut.astype(np.int64)


class Plan:
    """Ready counts and gather indices of a graph on one H x W grid (positions raster)."""

    def __init__(self, specs, H: int, W: int, A: int):
        self.H, self.W, self.P = H, W, H * W
        P = self.P
        rows, cols = np.divmod(np.arange(P), W)
        self.index, self.ready = [], []

        def src(dy, dx):
            r, c = rows + dy, cols + dx
            ok = (r >= 0) & (r < H) & (c >= 0) & (c < W)
            return np.where(ok, r * W + c, P)  # P: outside (the zero row / the PAD symbol)

        for sp in specs:
            if sp.kind == "embed":
                idx = np.stack([src(dy, dx) for dy, dx in sp.shifts], axis=1) if P else np.zeros((0, 1), np.int64)
                rank1 = np.append(np.arange(1, P + 1), 0)  # the symbol at q is known after q + 1 symbols
                ready = rank1[idx].max(axis=1)
            elif sp.kind == "conv":
                ru = np.append(self.ready[sp.ins[0]], 0)
                idx = np.stack([src(dy, dx) for dy, dx in sp.taps], axis=1) if sp.taps else np.full((P, 0), P)
                ready = ru[idx].max(axis=1, initial=0)
            elif sp.kind == "linear":
                u = specs[sp.ins[0]]
                ru = self.ready[sp.ins[0]]
                ru = np.repeat(ru, u.width) if u.out == "grid" else ru
                idx = None
                o = np.argsort(-ru, kind="stable")  # rows by ready count, largest first
                nz = sp.wmat[o] != 0  # (bool: one byte per weight)
                first = nz.argmax(axis=0)  # for each unit, the first (largest-count) input it reads
                ready = np.where(nz.any(axis=0), ru[o][first], 0) if len(o) else np.zeros(sp.width, np.int64)
            elif sp.kind == "add":
                idx = None
                ready = np.maximum(self.ready[sp.ins[0]], self.ready[sp.ins[1]])
            else:
                idx = None
                ru = self.ready[sp.ins[0]]
                ready = ru if specs[sp.ins[0]].out == "grid" else ru.reshape(P, A).max(axis=1)
            self.index.append(None if idx is None else np.ascontiguousarray(idx, np.int32))
            self.ready.append(np.asarray(ready, np.int64))
        head = self.ready[-1]
        bad = np.flatnonzero(head > np.arange(P))
        self.violations = [(int(p), int(head[p]) - 1) for p in bad]  # (position, a position it needs)
        # the step schedule: elements of each op by ready count
        self.order, self.bounds = [], []
        for r in self.ready:
            o = np.argsort(r, kind="stable")
            self.order.append(o)
            self.bounds.append(np.searchsorted(r[o], np.arange(P + 1)))

    def check_causal(self, where: str = "") -> None:
        if self.violations:
            p, q = self.violations[0]
            pairs = ", ".join(f"{a}<-{b}" for a, b in self.violations[:8])
            raise ValueError(f"{where}not autoregressive: the table of position {self._name(p)} depends on the "
                             f"symbol at {self._name(q)}, coded at or after it ({len(self.violations)} positions; "
                             f"position<-needed position: {pairs})")

    def _name(self, p: int) -> str:
        return f"{p}" if self.H == 1 else f"{p} (row {p // self.W}, col {p % self.W})"

    def at(self, i: int, q: int) -> np.ndarray:
        """Elements of op i whose ready count is q."""
        return self.order[i][self.bounds[i][q]:self.bounds[i][q + 1]]


class Graph:
    """A parsed heddle graph and its integer passes."""

    def __init__(self, params: dict, arrays: dict, check_causal: bool = True):
        (self.H, self.W), self.A, self.specs, self.lut = parse_graph(params, arrays)
        self.P = self.H * self.W
        self._plans = {}
        self.lazy = self.specs[-1].ins[0]  # the logits: computed by the head for the positions it needs
        self.grid_width = sum(sp.width for i, sp in enumerate(self.specs[:-1]) if sp.out == "grid" and i != self.lazy)
        self.flat_width = sum(sp.width for i, sp in enumerate(self.specs[:-1]) if sp.out == "flat" and i != self.lazy)
        if self.P and self.elements(self.P) > MAX_RECORD_ELEMENTS:
            raise ValueError(f"a record's activations ({self.elements(self.P):,}) exceed {MAX_RECORD_ELEMENTS:,}")
        if self.P and check_causal:
            self.plan(self.H, self.W).check_causal()

    def elements(self, P: int) -> int:
        """Activations one record of P positions holds (the logits are never held whole)."""
        return (P + 1) * self.grid_width + self.flat_width

    def plan(self, H: int, W: int) -> Plan:
        key = (H, W)
        if key not in self._plans:
            if len(self._plans) > 8:
                self._plans.clear()
            self._plans[key] = Plan(self.specs, H, W, self.A)
        return self._plans[key]

    # -- buffers and the ops ---------------------------------------------------------------
    def buffers(self, B: int, P: int) -> list:
        """Zeroed tensors for B records of P positions; grid tensors carry one zero row at
        index P (what a tap outside the grid reads)."""
        out = []
        for i, sp in enumerate(self.specs):
            if sp.kind == "head" or i == self.lazy:
                out.append(None)
            elif sp.out == "grid":
                out.append(np.zeros((B, P + 1, sp.width), np.int64 if sp.logits else np.float32))
            else:
                out.append(np.zeros((B, sp.width), np.int64 if sp.logits else np.float32))
        return out

    def run_op(self, i: int, plan: Plan, syms: np.ndarray, bufs: list, sel: np.ndarray) -> None:
        """Compute the elements `sel` (positions of a grid, units of a flat tensor) of op i
        for every record of the batch, from the tensors already computed."""
        if len(sel):
            if self.specs[i].out == "grid":
                bufs[i][:, sel, :] = self.compute(i, plan, syms, bufs, sel)
            else:
                bufs[i][:, sel] = self.compute(i, plan, syms, bufs, sel)

    def compute(self, i: int, plan: Plan, syms: np.ndarray, bufs: list, sel: np.ndarray) -> np.ndarray:
        """Elements `sel` of op i: (B, n, width) for a grid, (B, n) for a flat tensor."""
        sp, B, n = self.specs[i], syms.shape[0], len(sel)
        if sp.kind == "embed":
            x = np.minimum(syms, self.A)[:, plan.index[i][sel]]  # (B, n, shifts): symbols A+ read the PAD row
            return sp.table[x].reshape(B, n, sp.width)
        if sp.kind == "add":
            a, b = bufs[sp.ins[0]], bufs[sp.ins[1]]
            if sp.out == "grid":
                res = np.empty((B * n, sp.width), np.float32)
                residual(np.ascontiguousarray(a[:, sel, :].reshape(B * n, -1)),
                         np.ascontiguousarray(b[:, sel, :].reshape(B * n, -1)), sp.ma, sp.mb, sp.s, res)
                return res.reshape(B, n, -1)
            res = np.empty((B, n), np.float32)
            residual(np.ascontiguousarray(a[:, sel]), np.ascontiguousarray(b[:, sel]), sp.ma, sp.mb, sp.s, res)
            return res
        u = bufs[sp.ins[0]]
        if sp.kind == "conv":
            out = np.empty((B, n, sp.width), np.int64 if sp.logits else np.float32)
            step = max(1, CHUNK_ROWS // max(B, 1))
            for c0 in range(0, n, step):
                part = sel[c0:c0 + step]
                k = len(part)
                x = u[:, plan.index[i][part], :].reshape(B * k, -1)  # (B*k, taps*cin) integers
                acc = x @ sp.wmat  # exact: 127 * sum|w| per column < 2**24 (checked at load)
                out[:, c0:c0 + k, :] = self._act(sp, acc, sp.b, sp.m).reshape(B, k, -1)
            return out
        x = u[:, :-1, :].reshape(B, -1) if self.specs[sp.ins[0]].out == "grid" else u
        acc = x @ sp.wmat[:, sel]  # exact: 127 * sum|w| per column < 2**24 (checked at load)
        return self._act(sp, acc, sp.b[sel], None if sp.m is None else sp.m[sel])

    @staticmethod
    def _act(sp, acc, b, m):
        acc = np.ascontiguousarray(acc, np.float32)
        if sp.logits:
            res = np.empty(acc.shape, np.int64)
            add_logits(acc, b, res)
        else:
            res = np.empty(acc.shape, np.float32)
            requant_relu(acc, b, m, sp.s, res)
        return res

    def head(self, plan: Plan, bufs: list, pos: np.ndarray, width: int = 256) -> np.ndarray:
        """Tables (B, len(pos), width) of the given positions."""
        sp = self.specs[-1]
        syms = bufs[-1]  # the symbols (kept in the head's slot)
        if sp.out == "grid":
            rows = self.compute(self.lazy, plan, syms, bufs, pos)
        else:
            units = (np.asarray(pos)[:, None] * self.A + np.arange(self.A)[None, :]).reshape(-1)
            rows = self.compute(self.lazy, plan, syms, bufs, units)
        rows = np.ascontiguousarray(rows.reshape(-1, self.A))
        out = np.empty((len(rows), width), np.float64)
        softmax_lut(rows, sp.mo, sp.so, self.lut, width, out)
        return out.reshape(syms.shape[0], len(pos), width)

    # -- the two passes --------------------------------------------------------------------
    def parallel(self, syms: np.ndarray, H: int | None = None, W: int | None = None, width: int = 256) -> np.ndarray:
        """Every table of a batch of records (B, P) of symbols at once: (B, P, width)."""
        H, W = (self.H, self.W) if H is None else (H, W)
        plan = self.plan(H, W)
        P = H * W
        bufs = self.tensors(syms, H, W)
        out = np.empty((len(syms), P, width), np.float64)
        for a in range(0, P, max(1, CHUNK_ROWS // max(len(syms), 1))):
            b = min(P, a + max(1, CHUNK_ROWS // max(len(syms), 1)))
            out[:, a:b] = self.head(plan, bufs, np.arange(a, b), width)
        return out

    def tensors(self, syms: np.ndarray, H: int, W: int) -> list:
        """Every activation of a batch of records (the logits excepted: `head` makes those
        for the positions it is asked for); the symbols ride in the last slot."""
        plan = self.plan(H, W)
        syms = _with_pad(syms, self.A)
        bufs = self.buffers(syms.shape[0], H * W)
        bufs[-1] = syms
        for i in range(len(self.specs) - 1):
            if i != self.lazy:
                self.run_op(i, plan, syms, bufs, np.arange(len(plan.ready[i])))
        return bufs

    def stepper(self, B: int, H: int | None = None, W: int | None = None, width: int = 256):
        """A step pass over B records in lockstep: step(q, prev) takes the symbols at position
        q - 1 (ignored for q = 0, which starts new records) and returns the tables of
        position q, (B, width)."""
        H, W = (self.H, self.W) if H is None else (H, W)
        plan = self.plan(H, W)
        P = H * W
        state = {}
        pos = [np.array([q]) for q in range(P)]

        def step(q: int, prev, m: int | None = None):
            if q == 0:
                state["syms"] = np.full((B, P + 1), self.A, np.int64)
                state["bufs"] = self.buffers(B, P)
                state["bufs"][-1] = state["syms"]
            syms, bufs = state["syms"], state["bufs"]
            if q:
                syms[:len(prev), q - 1] = prev
            for i in range(len(self.specs) - 1):
                if i != self.lazy:
                    self.run_op(i, plan, syms, bufs, plan.at(i, q))
            return self.head(plan, bufs, pos[q], width)[:, 0, :]

        return step


def _with_pad(syms: np.ndarray, A: int) -> np.ndarray:
    syms = np.asarray(syms, np.int64)
    out = np.full((syms.shape[0], syms.shape[1] + 1), A, np.int64)
    out[:, :-1] = syms
    return out


def record_lanes(n: int, R: int, cap: int = MAX_LANES) -> int:
    """Lanes of an n-byte frame for records of R symbols: a frame of whole records gets the
    largest divisor of its record count up to `cap` (every lane then starts on a record of
    the file); otherwise one lane per 16 KiB, at most 16 (records then start at each lane's
    own start)."""
    cap = max(1, min(cap, MAX_LANES))
    if n and n % R == 0:
        k = n // R
        for L in range(min(k, cap), 0, -1):
            if k % L == 0:
                return L
    return max(1, min(16, cap, n // TEXT_LANE_BYTES))


class Heddle:
    """A heddle graph over records of the byte stream (the model protocol of a byte model).
    Each lane is cut into records of H*W bytes from its own start; a record starts from
    nothing (its tables depend on its own earlier bytes only)."""

    name = NAME
    kind = "learned"
    coder = "queue"  # tables come in coding order, record by record: the range coder stores none

    def __init__(self, params: dict, arrays: dict):
        self.graph = Graph(params, arrays)
        self.params = params
        self.R = self.graph.P

    @classmethod
    def from_params(cls, params: dict, arrays: dict | None = None):
        if arrays is None:
            raise ValueError("heddle needs its arrays (a model file)")
        if isinstance(params, dict) and params.get("record") == [0, 0]:
            return HeddleImage(params, arrays)
        return cls(params, arrays)

    @property
    def identity(self) -> dict:
        return {"model": self.name, "params": self.params}

    def max_lanes(self) -> int:
        """Records decoded in lockstep at most: their activations stay below BATCH_ELEMENTS."""
        return max(1, min(MAX_LANES, BATCH_ELEMENTS // self.graph.elements(self.R)))

    def lanes_for(self, n: int) -> int:
        return record_lanes(n, self.R, self.max_lanes())

    def teacher_chunks(self, data, starts, lengths):
        """(symbols, tables) in coding order: record by record of every lane, then step by
        step, lanes in order within a step."""
        nl, R, g = len(lengths), self.R, self.graph
        if nl == 0 or int(lengths[0]) == 0:
            return
        data = np.asarray(data)
        n_rec = -(-int(lengths[0]) // R)
        # records of every lane per chunk (about 16 K symbols, activations bounded); when one
        # record of every lane is more than that, its tables come in runs of positions
        per = max(1, min((1 << 14) // (R * nl), BATCH_ELEMENTS // (g.elements(R) * nl)))
        pc = R if R * nl <= 1 << 14 else max(1, (1 << 14) // nl)
        plan = g.plan(g.H, g.W)
        for k0 in range(0, n_rec, per):
            k1 = min(n_rec, k0 + per)
            recs = np.zeros((nl, k1 - k0, R), np.int64)
            live = np.zeros((nl, k1 - k0, R), bool)
            for b in range(nl):
                lo, hi = k0 * R, min(int(lengths[b]), k1 * R)
                if hi > lo:
                    seg = data[starts[b] + lo:starts[b] + hi]
                    recs[b].reshape(-1)[:hi - lo] = seg
                    live[b].reshape(-1)[:hi - lo] = True
            bufs = g.tensors(recs.reshape(-1, R), g.H, g.W)
            for a in range(0, R, pc):  # pc < R only with one record per chunk
                b = min(R, a + pc)
                tabs = g.head(plan, bufs, np.arange(a, b)).reshape(nl, k1 - k0, b - a, 256)
                # coding order: record, position, lane
                tabs = tabs.transpose(1, 2, 0, 3).reshape(-1, 256)
                syms = recs[:, :, a:b].transpose(1, 2, 0).reshape(-1)
                keep = live[:, :, a:b].transpose(1, 2, 0).reshape(-1)
                if keep.any():
                    yield syms[keep].astype(np.int32), tabs[keep]

    def stepper(self, lengths):
        nl, R = max(len(lengths), 1), self.R
        if nl > self.max_lanes():  # never written by this model's encoder: a damaged record
            raise ValueError(f"{nl} lanes: this model decodes at most {self.max_lanes()} at once")
        inner = self.graph.stepper(nl)
        t = [0]
        from threadpoolctl import threadpool_limits

        limit = threadpool_limits(limits=1, user_api="blas")  # small products: one BLAS thread is faster

        def step(prev_syms, m_prev, m):
            q = t[0] % R
            t[0] += 1
            return inner(q, np.asarray(prev_syms[:m_prev], np.int64))[:m]

        step.close = limit.restore_original_limits
        return step

    def record_tables(self, recs: np.ndarray) -> np.ndarray:
        """Tables (B, R, alphabet) of whole records, one parallel pass (the audit's view)."""
        return self.graph.parallel(recs, width=self.graph.A)


class HeddleImage(Heddle):
    """An image-sized heddle graph (record [0, 0]): a pixel model. Each channel of an 8-bit
    image is a plane coded in raster order; side bytes and byte frames go through the
    built-in strata model (as tessel's do)."""

    is_image_model = True

    def __init__(self, params: dict, arrays: dict):
        super().__init__(params, arrays)
        if self.graph.A != 256:
            raise ValueError("an image-sized model has an alphabet of 256 (8-bit samples)")
        self.bytes_model = Strata()
        self.plan_check = {}

    def has_depth(self, deep: bool) -> bool:
        return not deep

    def takes_image(self, layout) -> bool:
        """Images whose activations per plane stay within IMAGE_ELEMENTS are coded as pixels."""
        return self.graph.elements(layout.rows * layout.cols) <= IMAGE_ELEMENTS

    def teacher_chunks(self, *a, **k):
        return self.bytes_model.teacher_chunks(*a, **k)

    def stepper(self, *a, **k):
        return self.bytes_model.stepper(*a, **k)

    def lanes_for(self, n: int):
        return None

    def _plan(self, rows: int, cols: int) -> Plan:
        if self.graph.elements(rows * cols) > IMAGE_ELEMENTS:
            raise ModelError(f"a {rows} x {cols} image is too large for a heddle pixel model")
        plan = self.graph.plan(rows, cols)
        try:
            plan.check_causal(f"{rows} x {cols} image: ")
        except ValueError as e:
            raise ModelError(f"this heddle model cannot code the image: {e}") from None
        return plan

    def teacher_tables(self, v: np.ndarray, deep: bool):
        rows, cols, C = v.shape
        self._plan(rows, cols)
        for ch in range(C):
            plane = np.asarray(v[:, :, ch], np.int64).reshape(1, -1)
            plan = self.graph.plan(rows, cols)
            bufs = self.graph.tensors(plane, rows, cols)
            for a in range(0, rows * cols, 1 << 14):  # the tables in runs of 16 K samples
                pos = np.arange(a, min(rows * cols, a + (1 << 14)))
                yield plane[0, pos].astype(np.int32), self.graph.head(plan, bufs, pos)[0]

    def step_decode(self, rows: int, cols: int, C: int, deep: bool, decode, record=None) -> np.ndarray:
        from threadpoolctl import threadpool_limits

        self._plan(rows, cols)
        v = np.zeros((rows, cols, C), np.int32)
        with threadpool_limits(limits=1, user_api="blas"):
            for ch in range(C):
                step = self.graph.stepper(1, rows, cols)
                prev = np.zeros(1, np.int64)
                flat = v[:, :, ch].reshape(-1).copy()
                for q in range(rows * cols):
                    tab = step(q, prev)
                    if record is not None:
                        record.append(tab.copy())
                    s = np.asarray(decode(tab), np.int64).reshape(1)
                    flat[q] = s[0]
                    prev = s
                v[:, :, ch] = flat.reshape(rows, cols)
        return v
