"""`tessel`: the learned pixel model. Integer-exact inference over a causal neighbourhood.

A network of the masked-autoencoder family (Germain et al., 2015: the distribution of
sample i depends only on samples before i) whose inputs are, by construction, only
samples already coded. For each sub-pixel (row r, column c, channel ch):

    pred   the median edge predictor on W, N, NW (published as part of LOCO-I), for
           channel ch > 0 plus the residual of channel ch-1 of the same pixel
           (chan_shift), clamped to the sample range. With colour "rct" (a later model
           version; lcodec/models/colour.py), an RGB image is coded as G, B, R and channels
           B and R are seen as the chroma planes B - G and R - G of the reversible component
           transform (ITU-T T.800 Annex G): their neighbours, differences and median
           prediction are taken in the chroma plane, and pred = that prediction + G of
           the pixel, clamped to the sample range. With predictor "gap" (a later model
           version; lcodec/models/tessel_predict.py), gradient-adjusted prediction on W, WW,
           N, NW, NE, NN, NNE takes the median predictor's place, clamped to the sample range;
           colour rct-grad: as rct, and for an 8-bit chroma sample the last slot holds G's
           change from W and from N at this pixel (15 x 15 levels)
    slots  15 integer contexts, each quantised to 63 levels (`_q`: sign and magnitude in
           half-octaves): N-NW, NW-W, NE-N, W-WW, NN-N, NNE-NE, NEE-NE, the residuals
           of W, N, NW, NE and WW, the residuals of channels ch-1 and ch-2 of this pixel,
           and for the low byte of a 16-bit sample the high byte just coded (256 levels)
    symbol (x - pred) mod 256 for 8-bit samples; for 16-bit samples
           s = (x - pred + 128) mod 65536 split into the high byte, then the low byte
           (conditioned on the high byte through the last slot)

Each role (8-bit sample, 16-bit high byte, 16-bit low byte) has its own network with
weft's layout and kernels (lcodec/models/weft.py): int8 embeddings per slot level, one
hidden layer, ReLU requantised to 0..127, int8 output weights, a softmax through the
exponential table. Both products run in float32 on integers with every partial sum
below 2**24 (bounds checked at load: 127*127*terms < 2**24).

Order: a wavefront. Pixel (r, c) is coded at step t = c + DELAY*r; within a step, the
sub-symbols in turn (channel, then high/low byte), and for each, the active rows in
order. Every neighbour above reaches at most 2 columns right (NEE, NNE), so with DELAY
= 3 everything a pixel needs is decoded in an earlier step: the wavefront loses no
context at all (decoding in parallel over rows costs no bits).

The encoder computes every table in one teacher-forced pass (all samples known); the
decoder, one wavefront step at a time. Both call the same numba kernels on the same
integers, so their tables agree bit for bit.
"""
from __future__ import annotations


import numpy as np
from numba import njit

from .tessel_net import FusedNet
from .tessel_stages import (HI_OFFSET, _law_count, _law_evidence, _law_rows, _mix, _mix2, _mix_law, _update,
                            _update2, law_normed, law_tables, weight_table)
from .tessel_predict import _gap, _pv, _q16
from .weft import BACKENDS
from .strata import Strata
from .tessel_common import (FLAG_BIG_ENDIAN, FLAG_SIGNED, MAX_SAMPLES, PAYLOAD_VERSION,  # noqa: F401 - this module's interface
                            limit_blas, one_blas_thread)

Q = 63  # levels per slot
QMID = 31
N_SLOTS = 15
HI_SLOT = 14
EMB_ROWS = HI_SLOT * Q + 256
DELAY = 3  # wavefront: row r runs DELAY columns behind row r-1 (neighbours reach c+2)
ROLES = ("r8", "r16h", "r16l")
CHUNK = 8192  # symbols per teacher-pass batch
# colour modes (the internal `shift` of `_context`): 0 none, 1 the residual of channel ch-1 added to
# the prediction (params chan_shift), COLOUR_RCT: params colour "rct" (lcodec/models/colour.py)
COLOUR_RCT = 2
COLOUR_RCT_GRAD = 3  # colour "rct-grad": rct, and an 8-bit chroma sample's last slot holds G's gradients here
COLOUR_MODES = ("shift", "rct", "rct-grad")
RCT_ORDER = (1, 2, 0)  # RGB coded as G, B, R: channel 0 first, so the chroma planes B-G, R-G fit 8 bits
RCT_BACK = (2, 0, 1)  # coded order back to R, G, B
N_CLASSES = 16  # activity classes of the adaptive counts
CTX_BASE = {"r8": 0, "r16h": N_CLASSES, "r16l": 2 * N_CLASSES}  # rows of the count table
N_CTX = 6 * N_CLASSES  # r8 16, r16h 16, r16l 16 x 4 high-byte classes
N_KEYS = 256  # structure keys of the second count table (`_context`)
SCTX_BASE = {"r8": 0, "r16h": N_KEYS, "r16l": 2 * N_KEYS}
N_SCTX = 6 * N_KEYS  # r8 256, r16h 256, r16l 256 x 4 high-byte classes


@njit(cache=True, nogil=True)
def _q(d):
    """Quantise a signed difference: exact below 4, then two levels per octave, 31 at most."""
    a = d if d >= 0 else -d
    if a < 4:
        lv = a
    else:
        b = 0
        x = a
        while x:
            b += 1
            x >>= 1
        lv = 2 * (b - 1) + ((a >> (b - 2)) & 1)
        if lv > QMID:
            lv = QMID
    return QMID + lv if d >= 0 else QMID - lv


@njit(cache=True, nogil=True)
def _context(v, e, r, c, ch, cols, maxv, shift, gap, idx):
    """Prediction and the 14 neighbourhood slots (as embedding rows) of sub-pixel (r, c, ch).
    Reads only samples coded before it (rows above up to column c+2, this row left of c,
    channels before ch of this pixel). With shift == COLOUR_RCT on 3 channels (coded G, B, R),
    channels 1 and 2 are seen as their difference from channel 0 (`_pv`)."""
    sub = shift >= COLOUR_RCT and v.shape[2] == 3 and ch > 0
    if c > 0:
        W = _pv(v, r, c - 1, ch, sub)
    elif r > 0:
        W = _pv(v, r - 1, c, ch, sub)
    else:
        W = 0
    WW = _pv(v, r, c - 2, ch, sub) if c > 1 else W
    N = _pv(v, r - 1, c, ch, sub) if r > 0 else W
    NW = _pv(v, r - 1, c - 1, ch, sub) if (r > 0 and c > 0) else N
    NE = _pv(v, r - 1, c + 1, ch, sub) if (r > 0 and c + 1 < cols) else N
    NEE = _pv(v, r - 1, c + 2, ch, sub) if (r > 0 and c + 2 < cols) else NE
    NN = _pv(v, r - 2, c, ch, sub) if r > 1 else N
    NNE = _pv(v, r - 2, c + 1, ch, sub) if (r > 1 and c + 1 < cols) else NE
    eW = e[r, c - 1, ch] if c > 0 else 0
    eWW = e[r, c - 2, ch] if c > 1 else 0
    eN = e[r - 1, c, ch] if r > 0 else 0
    eNW = e[r - 1, c - 1, ch] if (r > 0 and c > 0) else 0
    eNE = e[r - 1, c + 1, ch] if (r > 0 and c + 1 < cols) else 0
    if gap:  # gradient-adjusted prediction instead (params predictor "gap")
        p = _gap(W, WW, N, NW, NE, NN, NNE, 16 if maxv > 255 else 1)
        if not sub:
            p = min(max(p, 0), maxv)
    else:
        mn = min(N, W)
        mx = max(N, W)
        if NW >= mx:
            p = mn
        elif NW <= mn:
            p = mx
        else:
            p = N + W - NW
    e1 = e[r, c, ch - 1] if ch >= 1 else 0
    e2 = e[r, c, ch - 2] if ch >= 2 else 0
    if sub:  # chroma plane: its median prediction plus this pixel's channel 0, in sample range
        p = min(max(p + v[r, c, 0], 0), maxv)
    elif shift:
        p += e1
        p = min(max(p, 0), maxv)
    idx[0] = 0 * Q + _q(N - NW)
    idx[1] = 1 * Q + _q(NW - W)
    idx[2] = 2 * Q + _q(NE - N)
    idx[3] = 3 * Q + _q(W - WW)
    idx[4] = 4 * Q + _q(NN - N)
    idx[5] = 5 * Q + _q(NNE - NE)
    idx[6] = 6 * Q + _q(NEE - NE)
    idx[7] = 7 * Q + _q(eW)
    idx[8] = 8 * Q + _q(eN)
    idx[9] = 9 * Q + _q(eNW)
    idx[10] = 10 * Q + _q(eNE)
    idx[11] = 11 * Q + _q(eWW)
    idx[12] = 12 * Q + _q(e1)
    idx[13] = 13 * Q + _q(e2)
    # activity class of the adaptive counts: bit length of a local gradient/residual sum
    a = abs(N - NW) + abs(NW - W) + abs(NE - N) + abs(eW) + abs(eN)
    b = 0
    while a:
        b += 1
        a >>= 1
    idx[HI_SLOT] = min(b, N_CLASSES - 1)
    # structure key of the second count table (8 bits): position parity (Bayer-like mosaics,
    # binned or pixel-replicated images), which nearby samples are equal, a coarse activity
    idx[N_SLOTS] = (((r & 1) << 7) | ((c & 1) << 6) | (np.int64(W == NW) << 5) | (np.int64(N == NW) << 4)
                    | (np.int64(W == WW) << 3) | (np.int64(N == NN) << 2)
                    | (0 if b == 0 else (1 if b <= 3 else (2 if b <= 6 else 3))))
    idx[N_SLOTS + 1] = 0  # the last slot's level for an 8-bit sample (a 16-bit low byte: the high byte)
    if sub and shift == COLOUR_RCT_GRAD:  # G here against G at W and at N (W and N as above)
        g = v[r, c, 0]
        gw = v[r, c - 1, 0] if c > 0 else (v[r - 1, c, 0] if r > 0 else g)
        gn = v[r - 1, c, 0] if r > 0 else gw
        idx[N_SLOTS + 1] = 16 * _q16(g - gw) + _q16(g - gn)
    return p


@njit(cache=True, nogil=True)
def _hib(hi):
    """Class of a 16-bit high byte for the low byte's adaptive counts."""
    if hi == 0:
        return 0
    if hi == 255:
        return 1
    return 2 if hi == 1 else 3


@njit(cache=True, nogil=True)
def _mix_chunk(tab, ctx, syms, gid, Ks, counts, tots, mid, ctx2, K2s, counts2, tots2, D, wtab, cap, decay,
               qa, tb, sums, out, blend, D1, limit, lcls, lhi, lrow, law, lawq, lawsum, A, Nc, D3, wtab3, cap3, out3,
               law_high):
    """The encoder's side of the adaptive counts: group by group (one wavefront step and
    sub-symbol, as the decoder sees them), every table from the state before the group,
    then the group's symbols counted in lane order. Stage 1: the network mixed with the
    activity counts (K; with `blend`, weighed against the network alone like stage 2, evidence
    D1); stage 2: that mixed with the structure counts (K2); with `limit` > 0 (16-bit samples
    only), stage 3: that weighed against the law (evidence D3), whose scales learn from each
    low-byte group (lhi >= 0: the high byte of the same sample) once it is coded; with
    law_high == 0 the high bytes' groups skip stage 3."""
    n = tab.shape[0]
    i = 0
    while i < n:
        j = i
        while j < n and gid[j] == gid[i]:
            j += 1
        m = j - i  # the stages' rows live in scratch of one group (in cache), not of the chunk
        K = Ks[i]
        K2 = K2s[i]
        q, t, s = qa[:m], tb[:m], sums[:m]
        fin = out3[i:j] if limit > 0 else out[i:j]
        two = out[:m] if limit > 0 else fin
        one = mid[:m]
        if K > 0 and blend:
            _mix2(tab[i:j], ctx[i:j], K, counts, D1, wtab, cap, q, t, s, one)
            _update2(ctx[i:j], syms[i:j], counts, tots, D1, cap, decay, q, t, s)
        elif K > 0:
            _mix(tab[i:j], ctx[i:j], K, counts, one)
            _update(ctx[i:j], syms[i:j], counts, tots)
        else:
            one = tab[i:j]
        if K2 > 0:
            _mix2(one, ctx2[i:j], K2, counts2, D, wtab, cap, q, t, s, two)
            _update2(ctx2[i:j], syms[i:j], counts2, tots2, D, cap, decay, q, t, s)
        else:
            two[:] = one
        if limit > 0 and lhi[i] < 0 and law_high == 0:  # a high byte the law stage leaves alone
            fin[:] = two
        elif limit > 0:
            _law_rows(lcls[i:j], lhi[i:j], A, Nc, lrow[i:j])
            _mix_law(two, ctx[i:j], lrow[i:j], lawq, lawsum, D3, wtab3, cap3, q, s, fin)
            _law_evidence(ctx[i:j], syms[i:j], D3, cap3, lrow[i:j], law, q, t, s)
            if lhi[i] >= 0:
                _law_count(lcls[i:j], lhi[i:j], syms[i:j], A, Nc, limit)
        i = j


@njit(cache=True, nogil=True)
def _teacher(v, deep, shift, gap, e, idx, syms, preds, ctx, ctx2):
    """Every sub-symbol of a known image, in raster order (row, column, channel, byte):
    embedding rows, symbols; fills the residual plane e as it goes."""
    rows, cols, C = v.shape
    maxv = 65535 if deep else 255
    P = 2 if deep else 1
    tmp = np.empty(N_SLOTS + 2, np.int64)
    k = 0
    for r in range(rows):
        for c in range(cols):
            for ch in range(C):
                p = _context(v, e, r, c, ch, cols, maxv, shift, gap, tmp)
                x = v[r, c, ch]
                e[r, c, ch] = x - p
                if deep:
                    s = (x - p + HI_OFFSET) & 0xFFFF
                    hi = s >> 8
                    for j in range(N_SLOTS - 1):
                        idx[k, j] = tmp[j]
                        idx[k + 1, j] = tmp[j]
                    idx[k, HI_SLOT] = HI_SLOT * Q
                    idx[k + 1, HI_SLOT] = HI_SLOT * Q + hi
                    syms[k] = hi
                    syms[k + 1] = s & 0xFF
                    ctx[k] = N_CLASSES + tmp[HI_SLOT]
                    ctx[k + 1] = 2 * N_CLASSES + tmp[HI_SLOT] * 4 + _hib(hi)
                    ctx2[k] = N_KEYS + tmp[N_SLOTS]
                    ctx2[k + 1] = 2 * N_KEYS + tmp[N_SLOTS] * 4 + _hib(hi)
                else:
                    for j in range(N_SLOTS - 1):
                        idx[k, j] = tmp[j]
                    idx[k, HI_SLOT] = HI_SLOT * Q + tmp[N_SLOTS + 1]
                    syms[k] = (x - p) & 0xFF
                    ctx[k] = tmp[HI_SLOT]
                    ctx2[k] = tmp[N_SLOTS]
                preds[k // P] = p
                k += P
    return k


@njit(cache=True, nogil=True)
def _gather(v, e, r0, r1, t, ch, shift, gap, deep, idx, preds, cls, keys):
    """Contexts of channel ch of the pixels on wavefront step t, rows r0..r1-1."""
    cols = v.shape[1]
    maxv = 65535 if deep else 255
    tmp = np.empty(N_SLOTS + 2, np.int64)
    for i in range(r1 - r0):
        r = r0 + i
        c = t - DELAY * r
        preds[i] = _context(v, e, r, c, ch, cols, maxv, shift, gap, tmp)
        for j in range(N_SLOTS - 1):
            idx[i, j] = tmp[j]
        idx[i, HI_SLOT] = HI_SLOT * Q + (0 if deep else tmp[N_SLOTS + 1])
        cls[i] = tmp[HI_SLOT]
        keys[i] = tmp[N_SLOTS]


@njit(cache=True, nogil=True)
def _apply(v, e, r0, r1, t, ch, deep, preds, hi, lo):
    for i in range(r1 - r0):
        r = r0 + i
        c = t - DELAY * r
        p = preds[i]
        if deep:
            x = (p + ((hi[i] << 8) | lo[i]) - HI_OFFSET) & 0xFFFF
        else:
            x = (p + lo[i]) & 0xFF
        v[r, c, ch] = x
        e[r, c, ch] = x - p


def wavefront_rows(t: int, rows: int, cols: int) -> tuple[int, int]:
    """Rows r0..r1-1 whose pixel c = t - DELAY*r lies in 0..cols-1."""
    r0 = max(0, -(-(t - cols + 1) // DELAY))
    r1 = min(rows, t // DELAY + 1)
    return r0, max(r0, r1)


def coding_order(rows: int, cols: int, C: int, P: int) -> np.ndarray:
    """Raster sub-symbol indices in coding order: step t, then sub-symbol, then row."""
    r, c, sub = np.meshgrid(np.arange(rows), np.arange(cols), np.arange(C * P), indexing="ij")
    t = c + DELAY * r
    order = np.lexsort((r.ravel(), sub.ravel(), t.ravel()))
    return order  # raster index = ((r*cols + c)*C + ch)*P + part = position in (r, c, sub) ravel


def check_net(params: dict, arrays: dict, prefix: str, hidden: int | None = None) -> None:
    E, H = params["embed"], hidden or params["hidden"]
    want = {"emb": ((EMB_ROWS, E), np.int8), "w1": ((N_SLOTS * E, H), np.int8), "b1": ((H,), np.int32),
            "w2": ((H, 256), np.int8), "b2": ((256,), np.int32)}
    for name, (shape, dt) in want.items():
        a = arrays.get(prefix + name)
        if a is None or tuple(a.shape) != shape or a.dtype != dt:
            raise ValueError(f"array {prefix}{name} must be {np.dtype(dt).name} {shape}")
    b1, b2 = arrays[prefix + "b1"], arrays[prefix + "b2"]
    if int(np.abs(b1).max(initial=0)) >= 1 << 24 or int(np.abs(b2).max(initial=0)) >= 1 << 24:
        raise ValueError("biases out of range")


def raster_features(v: np.ndarray, shift: int, with_ctx: bool = False, gap: int = 0):
    """(embedding rows (n, N_SLOTS), symbols (n,), roles (n,): 0 r8, 1 r16h, 2 r16l) of every
    sub-symbol of samples v (rows, cols, channels; uint8 or uint16), in raster order."""
    rows, cols, C = v.shape
    if shift >= COLOUR_RCT and C == 3:
        v = v[:, :, RCT_ORDER]
    deep = v.dtype == np.uint16
    P = 2 if deep else 1
    n = rows * cols * C * P
    vi = np.ascontiguousarray(v, np.int32)
    e = np.zeros_like(vi)
    idx = np.empty((n, N_SLOTS), np.int16)
    syms = np.empty(n, np.int32)
    preds = np.empty(rows * cols * C, np.int64)
    ctx = np.empty(n, np.int16)
    ctx2 = np.empty(n, np.int16)
    _teacher(vi, deep, shift, gap, e, idx, syms, preds, ctx, ctx2)
    roles = np.tile(np.array([1, 2], np.int8), n // 2) if deep else np.zeros(n, np.int8)
    if with_ctx:
        return idx, syms, roles, ctx, ctx2
    return idx, syms, roles


class Tessel:
    name = "tessel"
    kind = "learned"
    coder = "queue"  # byte mode (non-image content) goes through the built-in strata model

    def __init__(self, params: dict, arrays: dict, backend: str = "numpy"):
        p = params
        if not isinstance(p, dict) or not {"embed", "hidden", "chan_shift", "roles", "bytes"} <= set(p) <= {
                "embed", "hidden", "chan_shift", "roles", "bytes", "adapt", "structure", "law", "colour", "predictor",
                "stages_min_gain"}:
            raise ValueError("tessel needs embed, hidden, chan_shift, roles and bytes "
                             "(and optionally adapt, structure, law, colour, predictor, stages_min_gain)")
        gain = p.get("stages_min_gain")  # absent: every image with the stages (older files)
        if gain is not None and (type(gain) is not int or not 0 <= gain <= 10000):
            raise ValueError("stages_min_gain must be an integer 0..10000 (ten-thousandths of the coded samples)")
        self.stages_min_gain = gain
        if p.get("colour", "shift") not in COLOUR_MODES:  # absent: "shift" (older files)
            raise ValueError(f"colour must be one of {', '.join(COLOUR_MODES)}")
        if p.get("predictor", "med") not in ("med", "gap"):  # absent: "med" (older files)
            raise ValueError("predictor must be med or gap")
        self.gap = int(p.get("predictor") == "gap")
        if p.get("colour", "shift") != "shift" and p["chan_shift"] != 1:
            raise ValueError("colour rct goes with chan_shift 1 (used for layouts other than RGB)")
        adapt = p.get("adapt", {})
        if not isinstance(adapt, dict) or not set(adapt) <= set(p["roles"]) or not all(
                type(k) is int and 0 <= k <= 1 << 16 for k in adapt.values()):
            raise ValueError("adapt maps roles to integer prior strengths 0..65536")
        self.adapt = dict(adapt)
        st = p.get("structure", {"k": {}, "cap": 1, "decay": 0, "blend": 0})  # absent: off (older files)
        if (not isinstance(st, dict) or set(st) != {"k", "cap", "decay", "blend"} or not isinstance(st["k"], dict)
                or st["blend"] not in (0, 1) or type(st["blend"]) is not int
                or not set(st["k"]) <= set(p["roles"])
                or not all(type(k) is int and 0 <= k <= 1 << 16 for k in st["k"].values())
                or type(st["cap"]) is not int or not 1 <= st["cap"] <= 30
                or type(st["decay"]) is not int or not 0 <= st["decay"] <= 16):
            raise ValueError("structure needs k (roles to integer prior strengths 0..65536), cap 1..30, "
                             "decay 0..16, blend 0 or 1")
        self.k2 = dict(st["k"])
        self.blend = st["blend"]
        self.cap, self.decay = st["cap"], st["decay"]
        self.wtab = weight_table(self.cap)
        law = p.get("law", {"limit": 0, "cap": 1})  # absent: off (older files)
        if (not isinstance(law, dict) or not {"limit", "cap"} <= set(law) <= {"limit", "cap", "high_byte"}
                or type(law["limit"]) is not int or not 0 <= law["limit"] <= 1 << 16
                or type(law["cap"]) is not int or not 1 <= law["cap"] <= 30
                or law.get("high_byte", 1) not in (0, 1) or type(law.get("high_byte", 1)) is not int):
            raise ValueError("law needs limit (samples per class before halving, 0 = off, at most 65536) "
                             "and cap 1..30 (and optionally high_byte 0 or 1)")
        self.law_limit, self.law_cap = law["limit"], law["cap"]
        # whether the law stage weighs a 16-bit sample's high byte too (absent: yes, older
        # files); `train` writes 0 since 2026-12-05: +0.05% bits on the same-kind 16-bit tiles,
        # and the high byte skips the stage's two kernels (about 7% of a 16-bit decode)
        self.law_high = law.get("high_byte", 1)
        self.law_wtab = weight_table(self.law_cap)
        E, H = p["embed"], p["hidden"]
        if not all(type(x) is int and x >= 1 for x in (E, H)):
            raise ValueError("embed and hidden must be positive integers")
        # exactness: |x|, |w1| <= 127 over N_SLOTS*E terms; 0 <= h <= 127, |w2| <= 127 over H terms
        if 127 * 127 * N_SLOTS * E >= 1 << 24 or 127 * 127 * H >= 1 << 24:
            raise ValueError("slots*embed and hidden must keep 127*127*terms below 2**24")
        if p["chan_shift"] not in (0, 1) or type(p["chan_shift"]) is not int:
            raise ValueError("chan_shift must be 0 or 1")
        if p["bytes"] != "o6m":
            raise ValueError("bytes must be 'o6m' (the built-in strata preset)")
        roles = p["roles"]
        if not isinstance(roles, dict) or not roles or not set(roles) <= set(ROLES):
            raise ValueError(f"roles must be a non-empty subset of {ROLES}")
        if ("r16h" in roles) != ("r16l" in roles):
            raise ValueError("roles r16h and r16l come together")
        lut = arrays.get("lut")
        if lut is None or lut.ndim != 1 or not 2 <= len(lut) <= 1 << 16 or lut.dtype != np.int32:
            raise ValueError("array lut must be int32 of length 2..65536")
        if int(lut.min()) < 1 or int(lut.max()) > 1 << 24:
            raise ValueError("lut values must be 1..2**24")
        self.role_params = {}
        for role, rp in roles.items():
            if (not isinstance(rp, dict) or not {"m1", "s1", "mo", "so"} <= set(rp) <= {"m1", "s1", "mo", "so",
                                                                                          "hidden"}
                    or not all(type(x) is int for x in rp.values())):
                raise ValueError(f"role {role} needs integer m1, s1, mo, so (and optionally hidden)")
            Hr = rp.get("hidden", H)  # a role's own hidden width (absent: the model's)
            if not 1 <= Hr or 127 * 127 * Hr >= 1 << 24:
                raise ValueError(f"{role}.hidden must be positive and keep 127*127*hidden below 2**24")
            for k in ("m1", "mo"):
                if not 0 < rp[k] < 1 << 31:
                    raise ValueError(f"{role}.{k} out of range")
            for k in ("s1", "so"):
                if not 1 <= rp[k] <= 40:
                    raise ValueError(f"{role}.{k} out of range")
            check_net(p, arrays, role + ".", Hr)
            self.role_params[role] = dict(rp, window=N_SLOTS, embed=E, hidden=Hr)
        self.params = p
        self.arrays = arrays
        self.shift = {"rct": COLOUR_RCT, "rct-grad": COLOUR_RCT_GRAD}.get(p.get("colour"), int(p["chan_shift"]))
        self.bytes_model = Strata()  # preset o6m: side bytes and byte-mode frames
        self.set_backend(backend)

    @classmethod
    def from_params(cls, params: dict, arrays: dict | None = None) -> "Tessel":
        if arrays is None:
            raise ValueError("tessel needs its arrays (a model file)")
        return cls(params, arrays)

    def set_backend(self, backend: str) -> None:
        if backend not in BACKENDS:
            raise ValueError(f"unknown backend {backend!r} (have: {', '.join(BACKENDS)})")
        self.backend = backend
        self.kernels = {}
        for role, rp in self.role_params.items():
            arr = {k: self.arrays[role + "." + k] for k in ("emb", "w1", "b1", "w2", "b2")}
            arr["lut"] = self.arrays["lut"]
            self.kernels[role] = BACKENDS[backend](rp, arr)
        # the numpy backend's tables through tessel_net (the same integers, a faster first layer)
        self.nets = {r: FusedNet(k, Q, HI_SLOT) for r, k in self.kernels.items()} if backend == "numpy" else {}

    def has_stages(self, deep: bool) -> bool:
        """Whether images of this depth go through any per-image stage."""
        roles = ("r16h", "r16l") if deep else ("r8",)
        return any(self.adapt.get(r, 0) or self.k2.get(r, 0) for r in roles) or bool(deep and self.law_limit)

    def has_depth(self, deep: bool) -> bool:
        return ("r16h" in self.kernels) if deep else ("r8" in self.kernels)

    # -- byte mode: the model protocol, through strata -------------------------------------
    def teacher_chunks(self, *a, **k):
        return self.bytes_model.teacher_chunks(*a, **k)

    def stepper(self, *a, **k):
        return self.bytes_model.stepper(*a, **k)

    # -- pixels ----------------------------------------------------------------------------
    def role_tables(self, role: str, idx: np.ndarray) -> np.ndarray:
        """Tables of the sub-symbols with embedding rows idx (n, N_SLOTS), each column within
        its slot's rows (as `_context` makes them)."""
        net = self.nets.get(role)
        return net.tables(idx) if net is not None else self.kernels[role].tables(idx)

    def teacher(self, v: np.ndarray):
        """(embedding rows, symbols, roles) of every sub-symbol in raster order."""
        return raster_features(v, self.shift, gap=self.gap)

    def teacher_tables(self, v: np.ndarray, deep: bool, stages: bool = True, with_bare: bool = False):
        """Yield (symbols, tables) in coding order, chunk by chunk (the encoder's pass).
        Chunks end on wavefront groups (one step's sub-symbol), where the adaptive counts
        are updated. stages False: the networks' tables alone (an image frame with
        FLAG_NETS_ONLY). with_bare: yield (symbols, tables, the networks' tables alone), the
        third what `stages` False would give."""
        rows, cols, C = v.shape
        P = 2 if deep else 1
        vv = v.astype(np.uint16) if deep else v.astype(np.uint8)
        idx, syms, roles, ctx, ctx2 = raster_features(vv, self.shift, with_ctx=True, gap=self.gap)
        order = coding_order(rows, cols, C, P)
        names = ("r16h", "r16l") if deep else ("r8",)
        K = np.array([self.adapt.get(r, 0) if stages else 0 for r in ROLES], np.int64)
        K2 = np.array([self.k2.get(r, 0) if stages else 0 for r in ROLES], np.int64)
        # group id of each coded symbol: (step, sub-symbol); raster index -> (r, c, sub)
        sub = order % (C * P)
        pix = order // (C * P)
        gid = ((pix % cols) + DELAY * (pix // cols)) * (C * P) + sub
        bounds = np.flatnonzero(np.diff(gid)) + 1
        counts = np.zeros((N_CTX, 256), np.int32)
        tots = np.zeros(N_CTX, np.int64)
        counts2 = np.zeros((N_SCTX, 256), np.int32)
        tots2 = np.zeros(N_SCTX, np.int64)
        D = np.zeros(N_SCTX, np.int64)
        D1 = np.zeros(N_CTX, np.int64)
        # the law stage (16-bit samples): each symbol's activity class, and for a low byte the
        # high byte of its sample (-1 for a high byte); scale sums and evidence per image
        limit = self.law_limit if (deep and stages) else 0
        law = law_tables() if limit else np.zeros((1, 256), np.int64)
        lawq, lawsum = law_normed() if limit else (law, np.ones(1, np.int64))
        lcls = np.zeros(len(syms), np.int64)
        lhi = np.full(len(syms), -1, np.int64)
        if deep:  # raster order: high byte, low byte of each sample; contexts as `_teacher` sets them
            lcls[0::2] = ctx[0::2].astype(np.int64) - N_CLASSES
            lcls[1::2] = (ctx[1::2].astype(np.int64) - 2 * N_CLASSES) >> 2
            lhi[1::2] = syms[0::2]
        lrow = np.empty(len(syms), np.int64)
        A, Nc, D3 = np.zeros(N_CLASSES, np.int64), np.zeros(N_CLASSES, np.int64), np.zeros(N_CTX, np.int64)
        ends, last = [], 0
        for b in bounds.tolist() + [len(order)]:  # chunks of whole groups, about CHUNK symbols
            if b - last >= CHUNK or b == len(order):
                ends.append(b)
                last = b
        # the stages' scratch, rows of one group (the largest), shared by every chunk
        gm = int(np.diff(np.concatenate(([0], bounds, [len(order)]))).max())
        m2 = gm if (K2.any() or (self.blend and K.any()) or limit) else 0
        mid, stage2 = np.empty((gm, 256), np.float64), np.empty((gm if limit else 0, 256), np.float64)
        qa, tb, sums = np.empty((m2, 256), np.int64), np.empty((m2, 256), np.int64), np.empty((m2, 2), np.int64)
        i = 0
        for j in ends:
            o = order[i:j]
            ci, cs = idx[o], syms[o]
            tab = np.empty((len(o), 256), np.float64)
            if deep:
                part = roles[o] - 1
                for q, role in enumerate(names):
                    sel = np.nonzero(part == q)[0]
                    if len(sel):
                        tab[sel] = self.role_tables(role, ci[sel])
            else:
                tab[:] = self.role_tables("r8", ci)
            bare = tab  # the stages below write their tables elsewhere: this one stays the networks'
            if K.any() or K2.any() or limit:
                out = stage2 if limit else np.empty_like(tab)  # with the law stage, out is its input: scratch
                out3 = np.empty_like(tab) if limit else out
                _mix_chunk(tab, ctx[o].astype(np.int64), cs, gid[i:j], K[roles[o]], counts, tots, mid,
                           ctx2[o].astype(np.int64), K2[roles[o]], counts2, tots2, D, self.wtab, self.cap,
                           self.decay, qa, tb, sums, out, self.blend, D1,
                           limit, lcls[o], lhi[o], lrow[:len(o)], law, lawq, lawsum, A, Nc, D3, self.law_wtab,
                           self.law_cap, out3, self.law_high)
                tab = out3
            yield (cs, tab, bare) if with_bare else (cs, tab)
            i = j

    def step_decode(self, rows: int, cols: int, C: int, deep: bool, decode, record=None,
                    stages: bool = True) -> np.ndarray:
        """The decoder's pass: wavefront steps; `decode(tables) -> symbols` is the entropy
        decoder. Returns the samples (rows, cols, C). stages False: the networks' tables
        alone (FLAG_NETS_ONLY)."""
        adapt, k2 = (self.adapt, self.k2) if stages else ({}, {})
        v = np.zeros((rows, cols, C), np.int32)  # int32: samples and residuals are below 2**17
        e = np.zeros_like(v)
        cap = min(rows, cols // DELAY + 2)
        idx = np.empty((cap, N_SLOTS), np.int16)
        preds = np.empty(cap, np.int64)
        cls = np.empty(cap, np.int64)
        keys = np.empty(cap, np.int64)
        zero = np.zeros(cap, np.int64)
        counts = np.zeros((N_CTX, 256), np.int32)
        tots = np.zeros(N_CTX, np.int64)
        mixed = np.empty((cap, 256), np.float64)
        counts2 = np.zeros((N_SCTX, 256), np.int32)
        tots2 = np.zeros(N_SCTX, np.int64)
        D = np.zeros(N_SCTX, np.int64)
        D1 = np.zeros(N_CTX, np.int64)
        mixed2 = np.empty((cap, 256), np.float64)
        qa1, tb1, sums1 = np.empty((cap, 256), np.int64), np.empty((cap, 256), np.int64), np.empty((cap, 2), np.int64)
        qa, tb, sums = np.empty((cap, 256), np.int64), np.empty((cap, 256), np.int64), np.empty((cap, 2), np.int64)
        limit = self.law_limit if (deep and stages) else 0
        law = law_tables() if limit else None
        lawq, lawsum = law_normed() if limit else (None, None)
        A, Nc, D3 = np.zeros(N_CLASSES, np.int64), np.zeros(N_CLASSES, np.int64), np.zeros(N_CTX, np.int64)
        lrow = np.empty(cap, np.int64)
        mixed3 = np.empty((cap, 256), np.float64)
        qa3, tb3, sums3 = np.empty((cap, 256), np.int64), np.empty((cap, 256), np.int64), np.empty((cap, 2), np.int64)
        no_hi = np.full(cap, -1, np.int64)
        n_steps = cols + DELAY * (rows - 1)

        def table(role, m, ctx, ctx2, his=None):
            tab = self.role_tables(role, idx[:m])
            K, K2 = adapt.get(role, 0), k2.get(role, 0)
            if K and self.blend:
                _mix2(tab, ctx, K, counts, D1, self.wtab, self.cap, qa1[:m], tb1[:m], sums1[:m], mixed[:m])
                tab = mixed[:m]
            elif K:
                _mix(tab, ctx, K, counts, mixed[:m])
                tab = mixed[:m]
            if K2:
                _mix2(tab, ctx2, K2, counts2, D, self.wtab, self.cap, qa[:m], tb[:m], sums[:m], mixed2[:m])
                tab = mixed2[:m]
            weigh = limit and (his is not None or self.law_high)
            if weigh:
                _law_rows(cls[:m], no_hi[:m] if his is None else his, A, Nc, lrow[:m])
                _mix_law(tab, ctx, lrow[:m], lawq, lawsum, D3, self.law_wtab, self.law_cap, qa3[:m], sums3[:m],
                         mixed3[:m])
                tab = mixed3[:m]
            if record is not None:
                record.append(tab.copy())
            syms = np.asarray(decode(tab), np.int64)
            if K and self.blend:
                _update2(ctx, syms, counts, tots, D1, self.cap, self.decay, qa1[:m], tb1[:m], sums1[:m])
            elif K:
                _update(ctx, syms, counts, tots)
            if K2:
                _update2(ctx2, syms, counts2, tots2, D, self.cap, self.decay, qa[:m], tb[:m], sums[:m])
            if weigh:
                _law_evidence(ctx, syms, D3, self.law_cap, lrow[:m], law, qa3[:m], tb3[:m], sums3[:m])
                if his is not None:
                    _law_count(cls[:m], his, syms, A, Nc, limit)
            return syms

        with one_blas_thread():  # small products: one BLAS thread is faster
            for t in range(n_steps):
                r0, r1 = wavefront_rows(t, rows, cols)
                m = r1 - r0
                if m <= 0:
                    continue
                for ch in range(C):
                    _gather(v, e, r0, r1, t, ch, self.shift, self.gap, deep, idx, preds, cls, keys)
                    if deep:
                        hi = table("r16h", m, N_CLASSES + cls[:m], N_KEYS + keys[:m])
                        idx[:m, HI_SLOT] = HI_SLOT * Q + hi
                        hib = np.where(hi == 0, 0, np.where(hi == 255, 1, np.where(hi == 1, 2, 3)))
                        lo = table("r16l", m, 2 * N_CLASSES + cls[:m] * 4 + hib, 2 * N_KEYS + keys[:m] * 4 + hib,
                                   hi.astype(np.int64))
                    else:
                        hi, lo = zero, table("r8", m, cls[:m].copy(), keys[:m].copy())
                    _apply(v, e, r0, r1, t, ch, deep, preds, hi, lo)
        return v[:, :, RCT_BACK] if self.shift >= COLOUR_RCT and C == 3 else v
