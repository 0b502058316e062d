"""tessel's predictor "gap" (gradient-adjusted prediction under the network): its symbols
against a plain Python-integer recomputation, parallel pass == step pass at every depth and
with the colour mode, round trips, the parameter checked, and the golden tessel-g1 containers."""
import io
import os

import numpy as np
import pytest

import lcodec
from lcodec.models.tessel import COLOUR_RCT, RCT_ORDER, Tessel, raster_features

from test_images import (LAW, STRUCT, _golden_image_round_trip, _pgm, _sample, check_step_equals_parallel,
                         random_tessel)

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")


def gap_model(colour="shift", **kw):
    m = random_tessel(**kw)
    return Tessel(dict(m.params, predictor="gap", colour=colour), m.arrays)


def _gap_reference(W, WW, N, NW, NE, NN, NNE, s):
    """Gradient-adjusted prediction as published with CALIC (Wu and Memon, 1997; the rule and
    its thresholds 80, 32, 8 recalled from memory), thresholds times s, floor divisions."""
    dh = abs(W - WW) + abs(N - NW) + abs(N - NE)
    dv = abs(W - NW) + abs(N - NN) + abs(NE - NNE)
    if dv - dh > 80 * s:
        return W
    if dh - dv > 80 * s:
        return N
    p = (W + N) // 2 + (NE - NW) // 4
    if dv - dh > 32 * s:
        p = (p + W) // 2
    elif dv - dh > 8 * s:
        p = (3 * p + W) // 4
    elif dh - dv > 32 * s:
        p = (p + N) // 2
    elif dh - dv > 8 * s:
        p = (3 * p + N) // 4
    return p


def _reference_symbols(v, deep, rct):
    """Plain Python integers: the symbols tessel codes with predictor gap (chan_shift 1, or
    colour rct on RGB: coded G, B, R with B and R in the chroma planes)."""
    rows, cols, C = v.shape
    order = RCT_ORDER if rct else tuple(range(C))
    w = [[[int(v[r, c, k]) for k in order] for c in range(cols)] for r in range(rows)]
    maxv, s = (65535, 16) if deep else (255, 1)
    res = [[[0] * C for _ in range(cols)] for _ in range(rows)]
    out = []
    for r in range(rows):
        for c in range(cols):
            for ch in range(C):
                sub = rct and ch > 0

                def p(rr, cc):
                    return w[rr][cc][ch] - (w[rr][cc][0] if sub else 0)
                W = p(r, c - 1) if c > 0 else (p(r - 1, c) if r > 0 else 0)
                WW = p(r, c - 2) if c > 1 else W
                N = p(r - 1, c) if r > 0 else W
                NW = p(r - 1, c - 1) if (r > 0 and c > 0) else N
                NE = p(r - 1, c + 1) if (r > 0 and c + 1 < cols) else N
                NN = p(r - 2, c) if r > 1 else N
                NNE = p(r - 2, c + 1) if (r > 1 and c + 1 < cols) else NE
                pred = _gap_reference(W, WW, N, NW, NE, NN, NNE, s)
                if sub:
                    pred = min(max(pred + w[r][c][0], 0), maxv)
                else:
                    pred = min(max(pred, 0), maxv)
                    if ch > 0:  # chan_shift 1: plus the residual of the channel before
                        pred = min(max(pred + res[r][c][ch - 1], 0), maxv)
                x = w[r][c][ch]
                res[r][c][ch] = x - pred
                if deep:
                    t = (x - pred + 128) & 0xFFFF
                    out += [t >> 8, t & 0xFF]
                else:
                    out.append((x - pred) & 0xFF)
    return out


@pytest.mark.parametrize("layout", ["grey8", "rgb8", "grey16", "rgb16"])
@pytest.mark.parametrize("rct", [False, True])
def test_gap_symbols_match_a_python_integer_reference(layout, rct):
    """Random samples over the full range (every branch of the rule and the clamps) and a
    photograph: the encoder's symbols equal the plain-Python recomputation."""
    deep = layout.endswith("16")
    C = 3 if layout.startswith("rgb") else 1
    rng = np.random.default_rng(5)
    photo = _sample("astronaut", 12, 15).astype(np.int64)[:, :, :C] * (251 if deep else 1)
    smooth = np.cumsum(rng.integers(-3, 4, (11, 14, C)), axis=1) * (40 if deep else 2) + (30000 if deep else 120)
    for v in (rng.integers(0, 65536 if deep else 256, (9, 13, C)), photo, smooth):
        v = np.clip(v, 0, 65535 if deep else 255).astype(np.uint16 if deep else np.uint8)
        _, syms, _ = raster_features(v, COLOUR_RCT if rct else 1, gap=1)
        assert syms.tolist() == _reference_symbols(v, deep, rct and C == 3)


@pytest.mark.parametrize("stages", [None, "structure", "law"])
@pytest.mark.parametrize("kind", ["grey8", "rgb8-rct", "grey16", "rgb16"])
def test_gap_parallel_pass_equals_step_pass(kind, stages):
    m = gap_model("rct" if kind.endswith("rct") else "shift", structure=STRUCT if stages else None,
                  law=LAW if stages == "law" else None)
    a = _sample("astronaut" if kind.startswith("rgb") else "camera", 13, 17)
    deep = "16" in kind
    if deep:
        a = a.astype(np.uint16) * 257 + 5
    check_step_equals_parallel(m, a, (2 if deep else 1, 0))


def test_gap_round_trips_and_parameter_checked(tmp_path):
    from lcodec.format import modelfile
    m = gap_model(structure=STRUCT, law=LAW)
    p = str(tmp_path / "gap.lcmodel")
    modelfile.dump(p, {"name": "tessel", "params": m.params}, m.arrays)
    for a in (_sample("coins", 15, 21), _sample("chelsea", 11, 13), _sample("moon", 14, 9).astype(np.uint16) * 199):
        data = _pgm(a)
        blob = lcodec.pack(data, model=p)
        assert lcodec.info(blob)["frames"][0]["method"] == "modelled/image"
        assert lcodec.unpack(blob, model=p) == data
    base = random_tessel()
    assert base.gap == 0 and "predictor" not in base.params  # older files: the median edge detector
    for bad in ("GAP", "calic", 1, None):
        with pytest.raises(ValueError, match="predictor"):
            Tessel(dict(base.params, predictor=bad), base.arrays)


GOLDEN_GAP = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-g1-") and f.endswith(".lcodec"))


def test_golden_gap_vectors_exist():
    assert GOLDEN_GAP == ["tessel-g1-npy16", "tessel-g1-pgm"]


@pytest.mark.parametrize("name", GOLDEN_GAP)
def test_golden_gap_containers_decode_exactly(name):
    """tessel-tiny-gap.lcmodel (tessel-tiny-law's networks and stages with predictor gap): its
    containers decode (1 and 2 threads) to the original bytes, whose samples the outside
    readers give as the scikit-image crops; today's encoder writes the same bytes (container
    version 3 already: its own twin)."""
    from lcodec.models import load_model
    PIL = pytest.importorskip("PIL.Image")
    skd = pytest.importorskip("skimage.data")
    model = os.path.join(GOLDEN, "tessel-tiny-gap.lcmodel")
    assert load_model(model).inner.params["predictor"] == "gap"
    blob, orig = _golden_image_round_trip(model, name)
    assert lcodec.info(blob)["format_version"] == 3  # made in version 3: its own twin
    if name.endswith("pgm"):  # reference reader: Pillow
        assert np.array_equal(np.asarray(PIL.open(io.BytesIO(orig))), skd.camera()[220:252, 300:340])
    else:  # reference reader: numpy
        assert np.array_equal(np.load(io.BytesIO(orig)), skd.moon()[60:92, 100:140].astype(np.uint16) * 53 + 1000)
