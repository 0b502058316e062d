"""tessel's colour mode "rct": the reversible component transform checked against its published
definition, its inverse over every 8-bit triple, the pixel model's chroma prediction against a
plain Python-integer recomputation, parallel pass == step pass, the causal property, round
trips for every depth and channel layout, old model files unchanged, and the golden tessel-c1
containers."""
import io
import os

import numpy as np
import pytest

import lcodec
from lcodec.models.colour import rct_forward, rct_forward_int, rct_inverse, rct_inverse_int, rct_luma_of
from lcodec.models.tessel import (COLOUR_RCT, COLOUR_RCT_GRAD, HI_SLOT, Q, RCT_ORDER, Tessel, coding_order,
                                  raster_features)

from test_images import LAW, STRUCT, _pgm, _sample, _tables, check_step_equals_parallel, random_tessel

PIL = pytest.importorskip("PIL.Image", reason="Pillow is needed (pip install -e .[test])")
GOLDEN = os.path.join(os.path.dirname(__file__), "golden")


def rct_model(colour="rct", **kw):
    m = random_tessel(**kw)
    return Tessel(dict(m.params, colour=colour), m.arrays)


# -- the transform -------------------------------------------------------------------------------
def test_rct_matches_its_published_definition():
    """ITU-T T.800 | ISO/IEC 15444-1, Annex G, the reversible component transformation (RCT),
    with I0, I1, I2 = R, G, B (formulas as recalled from memory):
        forward  Y0 = floor((I0 + 2 I1 + I2) / 4), Y1 = I2 - I1, Y2 = I0 - I1
        inverse  I1 = Y0 - floor((Y2 + Y1) / 4), I0 = Y2 + I1, I2 = Y1 + I1
    checked on hand-worked triples (floor of a negative sum included) and on random ones,
    for the numpy functions and the Python-integer ones."""
    # hand-worked: (10, 20, 31): Y0 = floor(81 / 4) = 20, Y1 = 11, Y2 = -10
    assert rct_forward_int(10, 20, 31) == (20, 11, -10)
    # (0, 255, 0): Y0 = floor(510 / 4) = 127, Y1 = Y2 = -255; inverse G = 127 - floor(-510 / 4) = 127 + 128
    assert rct_forward_int(0, 255, 0) == (127, -255, -255)
    assert rct_inverse_int(127, -255, -255) == (0, 255, 0)
    assert rct_forward_int(255, 0, 255) == (127, 255, 255)
    rng = np.random.default_rng(3)
    for depth in (8, 16):
        rgb = rng.integers(0, 1 << depth, (2000, 3))
        y = rct_forward(rgb)
        for (r, g, b), yy in zip(rgb.tolist(), y.tolist()):
            y0 = (r + 2 * g + b) // 4  # the formula, written out again
            assert yy == [y0, b - g, r - g] == list(rct_forward_int(r, g, b))
            assert list(rct_inverse_int(*yy)) == [r, g, b]
        assert np.array_equal(rct_inverse(y), rgb)


def test_rct_inverse_over_every_8bit_triple():
    """All 2**24 triples: the inverse gives back R, G, B; Y0 keeps 8 bits, the chroma need 9
    (-255..255, both ends reached); given G each chroma lies in the 256 values -G..255-G (why
    tessel codes G first), while given Y0 = 127 the chroma Y1 spans all 511 values (why it does
    not code Y0 first); Y0 follows from G, Y1, Y2 (`rct_luma_of`)."""
    g, b = np.meshgrid(np.arange(256), np.arange(256), indexing="ij")
    g, b = g.ravel(), b.ravel()
    lo, hi = 0, 0
    y1_at_127 = set()
    for r in range(256):
        rgb = np.stack([np.full_like(g, r), g, b], axis=-1)
        y = rct_forward(rgb)
        assert np.array_equal(rct_inverse(y), rgb)
        assert y[:, 0].min() >= 0 and y[:, 0].max() <= 255
        assert ((y[:, 1] >= -g) & (y[:, 1] <= 255 - g) & (y[:, 2] >= -g) & (y[:, 2] <= 255 - g)).all()
        assert np.array_equal(rct_luma_of(g, y[:, 1], y[:, 2]), y[:, 0])
        lo, hi = min(lo, int(y[:, 1:].min())), max(hi, int(y[:, 1:].max()))
        y1_at_127.update(np.unique(y[y[:, 0] == 127, 1]).tolist())
    assert (lo, hi) == (-255, 255)
    assert y1_at_127 == set(range(-255, 256))


# -- the pixel model in colour mode --------------------------------------------------------------
def _med(a, b, c):
    """The median edge detector on W = a, N = b, NW = c (LOCO-I as published; ITU-T T.87)."""
    if c >= max(a, b):
        return min(a, b)
    if c <= min(a, b):
        return max(a, b)
    return a + b - c


def _reference_symbols(v, deep):
    """Plain Python integers: the symbols tessel codes in colour mode rct for an RGB image
    (raster order of the coded channels G, B, R): channel G predicted by the median edge
    detector (no shift: the first coded channel), B and R by the median edge detector in the
    chroma plane (B - G, R - G) plus the pixel's G, clamped to the sample range."""
    rows, cols, _ = v.shape
    w = [[[int(v[r, c, k]) for k in RCT_ORDER] for c in range(cols)] for r in range(rows)]
    maxv = 65535 if deep else 255
    out = []
    for r in range(rows):
        for c in range(cols):
            for ch in range(3):
                def p(rr, cc):
                    return w[rr][cc][ch] - (w[rr][cc][0] if ch else 0)
                W = p(r, c - 1) if c > 0 else (p(r - 1, c) if r > 0 else 0)
                N = p(r - 1, c) if r > 0 else W
                NW = p(r - 1, c - 1) if (r > 0 and c > 0) else N
                pred = _med(W, N, NW)
                if ch:
                    pred = min(max(pred + w[r][c][0], 0), maxv)
                x = w[r][c][ch]
                if deep:
                    s = (x - pred + 128) & 0xFFFF
                    out += [s >> 8, s & 0xFF]
                else:
                    out.append((x - pred) & 0xFF)
    return out


def _reference_grad_levels(v):
    """Plain Python integers: colour rct-grad's last slot for each 8-bit sample (raster order
    of the coded channels G, B, R): 0 for G; for B and R, 16 q(G - G_W) + q(G - G_N) with G_W,
    G_N the pixel's left and upper G (left falls back to upper, upper to left, both to G), and
    q(d) = 8 + sign(d) * min(bit length of |d|, 7)."""
    rows, cols, _ = v.shape
    G = [[int(v[r, c, 1]) for c in range(cols)] for r in range(rows)]

    def q(d):
        return 8 + (1 if d >= 0 else -1) * min(abs(d).bit_length(), 7)
    out = []
    for r in range(rows):
        for c in range(cols):
            g = G[r][c]
            gw = G[r][c - 1] if c > 0 else (G[r - 1][c] if r > 0 else g)
            gn = G[r - 1][c] if r > 0 else gw
            out += [0, 16 * q(g - gw) + q(g - gn), 16 * q(g - gw) + q(g - gn)]
    return out


@pytest.mark.parametrize("deep", [False, True])
def test_rct_symbols_match_a_python_integer_reference(deep):
    """Random RGB samples (full range, so the chroma reach both ends and the clamp acts) and a
    photograph: the symbols of the encoder's features equal the plain-Python recomputation, for
    both rct modes (same prediction); rct-grad's last slot equals its recomputation for 8-bit
    samples, and 16-bit samples keep the high byte there."""
    rng = np.random.default_rng(11)
    imgs = [rng.integers(0, 65536 if deep else 256, (9, 13, 3)), _sample("astronaut", 12, 15).astype(np.int64)]
    for v in imgs:
        v = v.astype(np.uint16 if deep else np.uint8)
        idx0, syms, _ = raster_features(v, COLOUR_RCT)
        assert syms.tolist() == _reference_symbols(v, deep)
        idx, syms2, _ = raster_features(v, COLOUR_RCT_GRAD)
        assert np.array_equal(syms2, syms) and np.array_equal(idx[:, :HI_SLOT], idx0[:, :HI_SLOT])
        if deep:
            assert np.array_equal(idx, idx0)
        else:
            assert (idx0[:, HI_SLOT] == HI_SLOT * Q).all()
            assert (idx[:, HI_SLOT] - HI_SLOT * Q).tolist() == _reference_grad_levels(v)


@pytest.mark.parametrize("colour", ["rct", "rct-grad"])
def test_rct_leaves_other_layouts_as_chan_shift_1(colour):
    """Grey, two-channel and RGBA images: colour rct gives exactly chan_shift 1's tables."""
    old, new = random_tessel(structure=STRUCT), rct_model(colour, structure=STRUCT)
    v = _sample("astronaut", 10, 12)
    for a in (v[:, :, :1], v[:, :, :2], np.concatenate([v, v[:, :, :1]], axis=2)):
        a = np.ascontiguousarray(a)
        assert np.array_equal(_tables(old, a, False), _tables(new, a, False))
    assert not np.array_equal(_tables(old, v, False), _tables(new, v, False))  # RGB does change


@pytest.mark.parametrize("colour", ["rct", "rct-grad"])
@pytest.mark.parametrize("stages", [None, "structure", "law"])
@pytest.mark.parametrize("kind", ["rgb8", "rgb16"])
def test_rct_parallel_pass_equals_step_pass(kind, stages, colour):
    """The encoder's teacher-forced tables equal the decoder's step tables bit for bit, and the
    decoded samples are the originals (channel order restored), numpy and torch backends."""
    m = rct_model(colour, structure=STRUCT if stages else None, law=LAW if stages == "law" else None)
    a = _sample("astronaut", 13, 17)
    a, lay_args = (a.astype(np.uint16) * 257 + 5, (2, 0)) if kind == "rgb16" else (a, (1, 0))
    check_step_equals_parallel(m, a, lay_args)


@pytest.mark.parametrize("colour", ["rct", "rct-grad"])
def test_rct_causal_property(colour):
    """Germain et al., 2015: a table depends only on sub-symbols coded before it. Original
    channel ch is coded as channel RCT_ORDER.index(ch); changing it changes no table up to
    its own position in coding order and some table after it."""
    m = rct_model(colour, structure=STRUCT)
    v = _sample("astronaut", 5, 7)
    rows, cols, C = v.shape
    base = _tables(m, v, False)
    order = coding_order(rows, cols, C, 1)
    pos = np.empty_like(order)
    pos[order] = np.arange(len(order))
    for r in range(rows):
        for c in range(cols):
            for ch in range(C):
                w = v.copy()
                w[r, c, ch] = (int(w[r, c, ch]) + 77) % 256
                t = _tables(m, w, False)
                first = pos[(r * cols + c) * C + RCT_ORDER.index(ch)]
                assert np.array_equal(t[:first + 1], base[:first + 1]), (r, c, ch)
                if r < rows - 1 or c < cols - 1 or RCT_ORDER.index(ch) < C - 1:
                    assert not np.array_equal(t[first + 1:], base[first + 1:]), (r, c, ch)


@pytest.fixture(scope="module")
def rct_file(tmp_path_factory):
    from lcodec.format import modelfile
    m = rct_model(structure=STRUCT, law=LAW)
    p = str(tmp_path_factory.mktemp("m") / "rct.lcmodel")
    modelfile.dump(p, {"name": "tessel", "params": m.params}, m.arrays)
    return p


@pytest.mark.parametrize("layout", ["grey8", "rgb8", "rgba8", "grey16", "rgb16", "rgb16-signed"])
def test_rct_round_trips_every_depth_and_layout(layout, rct_file):
    """Files packed with a colour-rct model come back byte for byte as modelled image frames;
    the pixels read back by the outside readers (Pillow for PNM/PNG, numpy for NPY)."""
    a = _sample("chelsea", 14, 19)
    if layout in ("grey8", "grey16"):
        a = a[:, :, 1]
    if layout == "rgba8":
        a = np.concatenate([a, a[:, :, :1] // 3], axis=2)
    if layout.endswith("16"):
        a = a.astype(np.uint16) * 257 + 3
    if layout == "rgb16-signed":
        a = (a.astype(np.int32) * 129 - 17000).astype("<i2")
    if layout in ("rgba8", "rgb16", "rgb16-signed"):  # Pillow reads 16-bit RGB PNM as 8 bits: NPY
        buf = io.BytesIO()
        np.save(buf, a)
        data = buf.getvalue()
    else:
        data = _pgm(a)
    blob = lcodec.pack(data, model=rct_file)
    assert lcodec.info(blob)["frames"][0]["method"] == "modelled/image"
    out = lcodec.unpack(blob, model=rct_file)
    assert out == data
    got = np.load(io.BytesIO(out)) if data.startswith(b"\x93NUMPY") else np.asarray(PIL.open(io.BytesIO(out)))
    assert np.array_equal(got, a if layout != "grey16" else a.astype(np.uint16))


def test_colour_parameter_is_checked_and_old_models_read_as_shift():
    m = random_tessel()
    assert "colour" not in m.params and m.shift == 1  # an older file: no key, as before
    for bad in ("RCT", "rct_grad", 1, None):
        with pytest.raises(ValueError, match="colour"):
            Tessel(dict(m.params, colour=bad), m.arrays)
    with pytest.raises(ValueError, match="chan_shift 1"):
        Tessel(dict(m.params, colour="rct", chan_shift=0), m.arrays)
    with pytest.raises(ValueError, match="chan_shift 1"):
        Tessel(dict(m.params, colour="rct-grad", chan_shift=0), m.arrays)
    assert Tessel(dict(m.params, colour="shift"), m.arrays).shift == 1


# -- golden vectors ------------------------------------------------------------------------------
GOLDEN_COLOUR = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-c1-") and f.endswith(".lcodec"))


def test_golden_colour_vectors_exist():
    assert GOLDEN_COLOUR == ["tessel-c1-ppm", "tessel-c1-rgb16"]


@pytest.mark.parametrize("name", GOLDEN_COLOUR)
def test_golden_colour_containers_decode_exactly(name):
    """tessel-tiny-rct.lcmodel (the tiny networks and stages of tessel-tiny-law with colour
    rct): its containers decode (1 and 2 threads) to the original bytes, whose pixels the
    outside readers give as the scikit-image crops; today's encoder writes the same bytes."""
    from lcodec import api
    from lcodec.models import load_model
    model = os.path.join(GOLDEN, "tessel-tiny-rct.lcmodel")
    assert load_model(model).inner.params["colour"] == "rct"
    blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
    assert lcodec.info(blob)["frames"][0]["method"] == "modelled/image"
    assert lcodec.unpack(blob, model=model) == orig
    assert b"".join(api.decode(blob, model=model, workers=2).frames) == orig
    # written at container version 3 already, so the container is its own version-3 twin
    # (golden_v3_twins skips it); today's encoder must keep writing exactly these bytes
    assert lcodec.info(blob)["format_version"] == 3
    assert lcodec.pack(orig, model=model) == blob
    skd = pytest.importorskip("skimage.data")
    if name.endswith("ppm"):  # reference reader: Pillow
        assert np.array_equal(np.asarray(PIL.open(io.BytesIO(orig))), skd.coffee()[120:152, 300:340])
    else:  # reference reader: numpy
        want = skd.astronaut()[200:224, 180:210].astype(np.uint16) * 251 + 7
        assert np.array_equal(np.load(io.BytesIO(orig)), want)


@pytest.mark.parametrize("colour", ["rct", None, "bogus"])
def test_train_image_cli_colour(colour, tmp_path):
    """train --kind image --colour rct writes the mode into the model file's parameters (by
    default rct-grad, for RGB training images), and a PPM packed with it round-trips (Pillow
    reads the samples back); an unknown mode is a usage error (exit 2, no traceback)."""
    import subprocess
    import sys
    pytest.importorskip("torch")
    d = tmp_path / "plates"
    d.mkdir()
    for n in ("astronaut", "chelsea", "coffee"):
        (d / f"{n}.ppm").write_bytes(_pgm(_sample(n, 30, 36)))
    out = tmp_path / "m.lcmodel"
    r = subprocess.run([sys.executable, "-m", "lcodec", "train", "--kind", "image", str(d), "-o", str(out),
                        "--time-limit", "2", "--preset", "tiny"] + (["--colour", colour] if colour else []),
                       capture_output=True, text=True,
                       env=dict(os.environ, PYTHONPATH=os.getcwd()))
    if colour == "bogus":
        assert r.returncode == 2 and "Traceback" not in r.stderr and "rct" in r.stderr
        return
    assert r.returncode == 0, r.stderr
    from lcodec.models import load_model
    params = load_model(str(out)).inner.params
    assert params["colour"] == (colour or "rct-grad") and params["predictor"] == "gap"  # the defaults
    a = _sample("astronaut", 20, 24)
    blob = lcodec.pack(_pgm(a), model=str(out))
    assert lcodec.info(blob)["frames"][0]["method"] == "modelled/image"
    assert np.array_equal(np.asarray(PIL.open(io.BytesIO(lcodec.unpack(blob, model=str(out))))), a)
