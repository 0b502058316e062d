"""tessel's first layer through per-slot products (lcodec/models/tessel_net.py) and weft's
gather kernel give the integers of the plain definition: a reference in Python integers
(no numpy arithmetic, no floats) on random networks and inputs, including weights at the
int8 extremes, must equal the kernels' tables entry for entry."""

import numpy as np
import pytest

from lcodec.models.tessel import EMB_ROWS, HI_SLOT, N_SLOTS, Q
from lcodec.models.tessel_net import FusedNet
from lcodec.models.weft import NumpyKernels, _embed_rows


def _net(rng, E, H, extreme):
    if extreme:  # every weight at +-127 or -128: the largest accumulators the bounds allow
        pick = lambda shape: rng.choice(np.array([-128, -127, 127], np.int8), size=shape)  # noqa: E731
    else:
        pick = lambda shape: rng.integers(-128, 128, size=shape).astype(np.int8)  # noqa: E731
    lut = np.maximum(1, (rng.random(700) * (1 << 20))).astype(np.int32)
    lut[::-1].sort()
    arrays = {"emb": pick((EMB_ROWS, E)), "w1": pick((N_SLOTS * E, H)),
              "b1": rng.integers(-(1 << 23), 1 << 23, size=H).astype(np.int32),
              "w2": pick((H, 256)), "b2": rng.integers(-(1 << 23), 1 << 23, size=256).astype(np.int32), "lut": lut}
    params = {"window": N_SLOTS, "embed": E, "hidden": H, "m1": int(rng.integers(1, 1 << 31)),
              "s1": int(rng.integers(20, 41)), "mo": int(rng.integers(1, 1 << 31)), "so": int(rng.integers(20, 41))}
    return params, arrays


def _reference(params, arrays, idx):
    """The network's table in Python integers: int8 embeddings, one hidden layer requantised
    to 0..127, logits, the exponential LUT at min(round((max - logit) * mo / 2**so), last)."""
    emb = arrays["emb"].tolist()
    w1, b1 = arrays["w1"].tolist(), arrays["b1"].tolist()
    w2, b2, lut = arrays["w2"].tolist(), arrays["b2"].tolist(), arrays["lut"].tolist()
    E, H = params["embed"], params["hidden"]
    m1, s1, mo, so = params["m1"], params["s1"], params["mo"], params["so"]
    out = []
    for row in idx.tolist():
        x = [v for r in row for v in emb[r]]
        assert len(x) == N_SLOTS * E
        h = []
        for j in range(H):
            acc = b1[j] + sum(x[i] * w1[i][j] for i in range(len(x)))
            h.append(min(max((acc * m1 + (1 << (s1 - 1))) >> s1, 0), 127))
        lg = [b2[o] + sum(h[j] * w2[j][o] for j in range(H)) for o in range(256)]
        mx = max(lg)
        out.append([lut[min(((mx - v) * mo + (1 << (so - 1))) >> so, len(lut) - 1)] for v in lg])
    return out


def _rows(rng, n):
    """Embedding rows as tessel's `_context` makes them: column s within slot s's rows."""
    idx = np.empty((n, N_SLOTS), np.int16)
    for s in range(HI_SLOT):
        idx[:, s] = s * Q + rng.integers(0, Q, size=n)
    idx[:, HI_SLOT] = HI_SLOT * Q + rng.integers(0, 256, size=n)
    return idx


@pytest.mark.parametrize("seed,extreme", [(0, False), (1, False), (2, True)])
def test_fused_first_layer_equals_the_integer_reference(seed, extreme):
    rng = np.random.default_rng(seed)
    E, H = 4, 24
    params, arrays = _net(rng, E, H, extreme)
    idx = _rows(rng, 12)
    if extreme:  # also the rows at both ends of each slot
        idx[0, :HI_SLOT] = np.arange(HI_SLOT) * Q
        idx[1, :HI_SLOT] = np.arange(HI_SLOT) * Q + Q - 1
        idx[0, HI_SLOT], idx[1, HI_SLOT] = HI_SLOT * Q, EMB_ROWS - 1
    ref = _reference(params, arrays, idx)
    k = NumpyKernels(params, arrays)
    fused = FusedNet(k, Q, HI_SLOT).tables(idx)
    assert fused.dtype == np.float64
    assert [[int(v) for v in row] for row in fused.tolist()] == ref
    assert np.array_equal(k.tables(idx), fused)  # weft's own path: the same integers


def test_embed_rows_is_the_gather():
    rng = np.random.default_rng(5)
    emb = rng.integers(-128, 128, size=(257, 3)).astype(np.int8)
    ctx = rng.integers(0, 257, size=(9, 5)).astype(np.int16)
    out = np.empty((9, 15), np.float32)
    _embed_rows(ctx, emb, out)
    e = emb.tolist()
    assert out.tolist() == [[float(v) for c in row for v in e[c]] for row in ctx.tolist()]


def test_fused_tables_in_two_halves_equal_weft_tables():
    """An encoder's chunk (past PAR_MIN_ROWS: computed in two threads) gives the tables of
    weft's own path, row for row, and those of one row at a time (the decoder's batches)."""
    from lcodec.models.weft import PAR_MIN_ROWS
    rng = np.random.default_rng(7)
    params, arrays = _net(rng, 8, 64, False)
    idx = _rows(rng, PAR_MIN_ROWS + 77)
    k = NumpyKernels(params, arrays)
    net = FusedNet(k, Q, HI_SLOT)
    whole = net.tables(idx)
    assert np.array_equal(whole, k.tables(idx))
    assert np.array_equal(whole[:40], np.concatenate([net.tables(idx[i:i + 1]) for i in range(40)]))
