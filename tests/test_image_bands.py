"""Image frames coded in bands (payload version 3, docs/FORMAT.md "Image frames"): every band
is an image of its own in a coder stream of its own, so threads decode bands side by side.
Round trips with the committed tiny pixel models, encoder tables == decoder tables band by
band, the same bytes with 1 to 3 threads, damage in one band's stream, the descriptor's
checks, the encoder's band rule, and the golden banded containers."""
import io
import os
import threading
import time
import warnings

import numpy as np
import pytest

import lcodec
from lcodec import api
from lcodec.coding import SubframeCheckFailed
from lcodec.errors import DataError
from lcodec.frames import decode_one
from lcodec.frames.forked import Stopped
from lcodec.frames.imageframe import _side_by_side, decode_image_frame, encode_image_frame
from lcodec.format import container as C
from lcodec.inputs import layout as L
from lcodec.inputs.layout import Layout, read_descriptor, values_region
from lcodec.models import load_model
from support import v3_twin

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")
MODELS = {"grey8": "tessel-tiny-structure.lcmodel", "rgb8": "tessel-tiny-rct.lcmodel",
          "grey16": "tessel-tiny-law.lcmodel", "gap8": "tessel-tiny-gap.lcmodel"}


def _model(kind):
    return load_model(os.path.join(GOLDEN, MODELS[kind]))


def _image(kind, rows=36, cols=22):
    """Real samples (crops of scikit-image's photographs), framed between other bytes."""
    import skimage.data as skd
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if kind == "rgb8":
            a, bps = skd.coffee()[100:100 + rows, 200:200 + cols], 1
        elif kind == "grey16":
            a, bps = skd.camera()[200:200 + rows, 150:150 + cols].astype(np.uint16) * 61 + 900, 2
        else:
            a, bps = skd.camera()[200:200 + rows, 150:150 + cols], 1
    a = np.ascontiguousarray(a if a.ndim == 3 else a[:, :, None])
    lay = Layout(6, a.shape[0], a.shape[1], a.shape[2], bps)
    return b"front!" + values_region(a, lay) + b"back", lay, a


@pytest.fixture(params=["processes", "threads"])
def band_workers(request, monkeypatch):
    """Both ways to decode bands side by side: forked processes (where forking is safe) and
    threads. Yields a list that counts the forked runs, to check which way was taken. The
    forked way is taken even where an earlier test left an idle thread behind (a cluster
    test's; weft's helper thread is still ended first): test_forked_bands.py checks that a
    fresh process may fork."""
    from lcodec.frames import forked, imageframe
    monkeypatch.setattr(imageframe, "BAND_PROCESSES", request.param == "processes")
    monkeypatch.setattr(forked, "may_fork", lambda: True)
    runs = []
    real = forked.in_processes

    def counted(*args):
        runs.append(1)
        return real(*args)
    monkeypatch.setattr(forked, "in_processes", counted)
    yield request.param, runs


@pytest.mark.parametrize("kind", ["grey8", "rgb8", "grey16", "gap8"])
@pytest.mark.parametrize("bands", [2, 3, 5])
def test_bands_round_trip_and_tables(kind, bands, band_workers):
    """Decoded with 1, 2 and 3 threads to the same bytes, and coded by 2 and 3 workers to the
    same payload; the decoder's tables, band after band,
    equal the encoder's tables of each band coded as an image of its own (parallel pass ==
    step pass); every band's rows are the layout's split of the coded rows."""
    m = _model(kind)
    raw, lay, a = _image(kind)
    payload, _, nll = encode_image_frame(m, raw, lay, bands=bands)
    got, pos = read_descriptor(payload, len(raw))
    assert payload[0] == L.BANDED_VERSION and got.bands == bands and len(got.band_words) == bands - 1
    bounds = got.band_bounds()
    assert bounds[0][0] == 0 and bounds[-1][1] == lay.rows
    assert all(r1 - r0 in (lay.rows // bands, lay.rows // bands + 1) for r0, r1 in bounds)
    for threads in (1, 2, 3):
        assert decode_image_frame(m, payload, len(raw), threads=threads) == raw
    for workers in (2, 3):  # bands coded side by side: the same bytes
        assert encode_image_frame(m, raw, lay, bands=bands, workers=workers)[0] == payload
    assert len(band_workers[1]) == (4 if band_workers[0] == "processes" else 0)
    rec = []
    assert decode_image_frame(m, payload, len(raw), record=rec) == raw
    inner = m.inner
    want = np.concatenate([t for r0, r1 in bounds
                           for _, t in inner.teacher_tables(np.ascontiguousarray(a[r0:r1]), lay.deep)])
    step = np.concatenate(rec)
    assert step.dtype == want.dtype == np.float64 and np.array_equal(step, want)
    # the streams are independent: band 1 alone, coded as its own image, gives its stream's words
    one, _, _ = encode_image_frame(m, b"" + values_region(a[bounds[1][0]:bounds[1][1]], Layout(
        0, bounds[1][1] - bounds[1][0], lay.cols, lay.channels, lay.bps)), Layout(
        0, bounds[1][1] - bounds[1][0], lay.cols, lay.channels, lay.bps))
    words = payload[pos:]
    start = 4 * got.band_words[0]
    end = start + 4 * (got.band_words[1] if bands > 2 else len(words) // 4 - got.band_words[0])
    assert words[start:end] == one[len(one) - (end - start):]


def test_bands_cost_little_and_one_stream_is_unchanged():
    """bands=1 writes the version-1 payload (no band fields), byte for byte what the encoder
    wrote before bands existed; more bands cost a little (the adaptive stages restart)."""
    m = _model("grey8")
    raw, lay, _ = _image("grey8", 64, 48)
    one, _, nll1 = encode_image_frame(m, raw, lay, bands=1)
    assert one[0] == L.PAYLOAD_VERSION and encode_image_frame(m, raw, lay)[0] == one  # small: no bands
    two, _, nll2 = encode_image_frame(m, raw, lay, bands=2)
    assert nll1 < nll2 < 1.1 * nll1


def test_band_rule():
    """The encoder's rule (constants in lcodec.inputs.layout): the largest power of two at most
    min(samples // BAND_SAMPLES, rows // BAND_MIN_ROWS, BAND_LIMIT); none below 2."""
    assert (L.BAND_SAMPLES, L.BAND_MIN_ROWS, L.BAND_LIMIT) == (1 << 19, 128, 16)
    assert L.choose_bands(512, 512, 3) == 1  # 786,432 samples: one stream
    assert L.choose_bands(512, 1024, 1) == 1  # 2^19 samples: one band is no band
    assert L.choose_bands(1024, 1024, 1) == 2
    assert L.choose_bands(1411, 1411, 1) == 2  # 3 -> 2
    assert L.choose_bands(1411, 1411, 3) == 8  # min(11, 1411 // 128 = 11) -> 8
    assert L.choose_bands(200, 8000, 1) == 1  # wide and short: rows too few for two bands
    assert L.choose_bands(300, 8000, 1) == 2
    assert L.choose_bands(4096, 4096, 3) == L.BAND_LIMIT
    for rows in range(1, 3000, 7):
        for cols, ch in ((1, 1), (333, 1), (1024, 3), (4000, 4)):
            b = L.choose_bands(rows, cols, ch)
            assert b & (b - 1) == 0 and 1 <= b <= L.BAND_LIMIT
            if b > 1:
                assert rows // b >= L.BAND_MIN_ROWS and rows * cols * ch // b >= L.BAND_SAMPLES


def test_api_packs_large_images_in_bands(monkeypatch, tmp_path):
    """Through the archive layer: a PGM above the (lowered) band threshold is packed in bands,
    `info` shows them, and unpack with 1 and 2 threads, and with --jobs 2 (a lone frame: its
    bands go to the workers, not the frame to one worker's pool), gives the file back; packing
    with --jobs 2 codes the bands in 2 workers, in memory and to a file, to the same bytes."""
    from lcodec.frames import forked, imageframe
    runs = []
    real = forked.in_processes
    monkeypatch.setattr(forked, "in_processes", lambda *a: (runs.append(1), real(*a))[1])
    monkeypatch.setattr(forked, "may_fork", lambda: True)  # an earlier test may leave a thread
    monkeypatch.setattr(L, "BAND_SAMPLES", 256)
    monkeypatch.setattr(L, "BAND_MIN_ROWS", 8)
    raw, lay, a = _image("grey8", 40, 30)
    pgm = b"P5\n30 40\n255\n" + a.tobytes()
    model = os.path.join(GOLDEN, MODELS["grey8"])
    blob = lcodec.pack(pgm, model=model)
    frame = lcodec.info(blob)["frames"][0]
    assert frame["image"]["bands"] == 4  # min(1200 // 256, 40 // 8)
    assert lcodec.unpack(blob, model=model) == pgm
    assert b"".join(api.decode(blob, model=model, workers=2).frames) == pgm
    assert len(runs) == 1
    assert lcodec.unpack(blob, model=model, jobs=2) == pgm
    assert len(runs) == 2
    assert lcodec.pack(pgm, model=model, jobs=2) == blob  # a lone image's bands coded by 2 workers
    assert len(runs) == 3
    src = tmp_path / "plate.pgm"
    src.write_bytes(pgm)
    one, two = tmp_path / "one.lcodec", tmp_path / "two.lcodec"
    lcodec.pack_to([str(src)], str(one), model=model)
    lcodec.pack_to([str(src)], str(two), model=model, jobs=2)
    assert one.read_bytes() == two.read_bytes() and len(runs) == 4
    assert lcodec.unpack(two.read_bytes(), model=model) == pgm


def _damaged(kind="grey8", bands=3):
    m = _model(kind)
    raw, lay, _ = _image(kind, 60, 40)
    payload, _, _ = encode_image_frame(m, raw, lay, bands=bands)
    got, pos = read_descriptor(payload, len(raw))
    return m, raw, payload, got, pos


@pytest.mark.parametrize("threads", [1, 2, 3])
def test_damage_in_one_band_is_reported(threads, band_workers):
    """Words of the last band's stream changed: the frame is reported damaged with 1 to 3
    threads (never other bytes), and the other bands' streams still decode on their own."""
    m, raw, payload, got, pos = _damaged()
    bad = bytearray(payload)
    last = pos + 4 * sum(got.band_words)
    for k in range(last, len(bad), 7):
        bad[k] ^= 0x5A
    try:
        out = decode_image_frame(m, bytes(bad), len(raw), threads=threads)
    except Exception:  # a failed sub-frame check, or words the range decoder refuses
        out = None
    assert out != raw
    rec = C.crc32c(bytes(bad))
    value, problem = decode_one(m, 0, C.METHOD_IMAGE, len(raw), 1, C.crc32c(raw), rec, bytes(bad), True, threads)
    assert value is None and problem.startswith("frame 0 damaged")


def test_descriptor_checks():
    """A banded descriptor is refused when it claims fewer than 2 or more than MAX_BANDS bands,
    more bands than coded rows, or streams longer than the words it holds."""
    head = lambda *v: bytes([L.BANDED_VERSION]) + b"".join(C.uvarint(x) for x in v)  # noqa: E731
    raw_len = 6 * 4
    ok = head(0, 6, 4, 1, 1, 0, 1, 1, 2, 1) + bytes(8)
    lay, pos = read_descriptor(ok, raw_len)
    assert lay.bands == 2 and lay.band_words == (1,) and lay.band_bounds() == [(0, 3), (3, 6)]
    for bad, why in ((head(0, 6, 4, 1, 1, 0, 1, 1, 1) + bytes(8), "1 bands"),
                     (head(0, 6, 4, 1, 1, 0, 1, 1, 65) + bytes(8), "65 bands"),
                     (head(0, 6, 4, 1, 1, 0, 1, 1, 7, 1, 1, 1, 1, 1, 1) + bytes(8), "impossible"),
                     (head(0, 6, 4, 1, 1, 0, 3, 1, 3, 1, 1) + bytes(8), "impossible"),  # 2 coded rows
                     (head(0, 6, 4, 1, 1, 0, 1, 1, 2, 3) + bytes(8), "claim more words")):
        with pytest.raises(DataError, match=why):
            read_descriptor(bad, raw_len)


def test_side_by_side_stops_the_other_bands():
    """A band that fails stops the others at their next step (they see the stop flag), and the
    failure of the lowest failing band is raised, not the others' stop."""
    stop = np.zeros(1, np.uint8)
    steps = []

    def band(b, r0, r1):
        if b == 1:
            time.sleep(0.05)
            raise SubframeCheckFailed(0, 65536)
        for k in range(2000):  # would take 20 s unless stopped
            if stop[0]:
                raise Stopped
            steps.append(k)
            time.sleep(0.01)
        return b

    t = time.monotonic()
    with pytest.raises(SubframeCheckFailed):
        _side_by_side(band, [(0, 1), (1, 2), (2, 3)], 3, stop)
    assert time.monotonic() - t < 10 and len(steps) < 1000


GOLDEN_BANDS = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-b3-") and f.endswith(".lcodec"))


def test_golden_banded_vectors_exist():
    assert GOLDEN_BANDS == ["tessel-b3-npy16", "tessel-b3-pgm", "tessel-b3-ppm"]


@pytest.mark.parametrize("name", GOLDEN_BANDS)
def test_golden_banded_containers(name, monkeypatch):
    """The committed banded containers (scripts/make_golden.py, `golden_tessel_bands`, with the
    band rule lowered so that small images get bands): they decode to the original bytes with
    1 and 2 threads, and today's encoder under the same rule writes the same bytes."""
    monkeypatch.setattr(L, "BAND_SAMPLES", 256)
    monkeypatch.setattr(L, "BAND_MIN_ROWS", 8)
    model = os.path.join(GOLDEN, {"pgm": MODELS["grey8"], "ppm": MODELS["rgb8"], "npy16": MODELS["grey16"]}[
        name.split("-")[-1]])
    blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
    assert lcodec.info(blob)["frames"][0]["image"]["bands"] >= 3
    assert lcodec.unpack(blob, model=model) == orig
    assert b"".join(api.decode(blob, model=model, workers=2).frames) == orig
    assert lcodec.pack(orig, model=model) == blob
    if name.endswith("npy16"):  # reference reader: numpy
        assert np.load(io.BytesIO(orig)).dtype == np.dtype("<u2")


@pytest.fixture(scope="module")
def banded_archive(tmp_path_factory):
    """A 1024 x 1536 PGM (scikit-image's camera, flipped and turned six ways) packed with the
    tiny grey model: 2 bands by the encoder's own rule."""
    import skimage.data as skd
    cam = skd.camera()
    a = np.ascontiguousarray(np.block([[cam, cam[:, ::-1]], [cam[::-1], cam.T], [cam.T[::-1], cam[::-1, ::-1]]]))
    pgm = b"P5\n1024 1536\n255\n" + a.tobytes()
    model = os.path.join(GOLDEN, MODELS["grey8"])
    arc = tmp_path_factory.mktemp("banded") / "plate.pgm.lcodec"
    arc.write_bytes(lcodec.pack(pgm, model=model))
    assert lcodec.info(arc.read_bytes())["frames"][0]["image"]["bands"] == 2
    return arc, model


@pytest.mark.skipif(os.name != "posix", reason="POSIX signals")
@pytest.mark.parametrize("sig,code,text", [("SIGINT", 130, "interrupted (SIGINT)"), ("SIGTERM", 143, "terminated (SIGTERM)")])
def test_unpack_with_band_threads_interrupted(tmp_path, banded_archive, sig, code, text):
    """A signal while `unpack --threads 2` decodes a banded image: exit 130 / 143 with one line,
    nothing under the output's name, no temporary file (the band threads stop)."""
    import signal
    import subprocess
    import sys

    arc, model = banded_archive
    out = tmp_path / "out"
    out.mkdir()
    p = subprocess.Popen([sys.executable, "-m", "lcodec", "unpack", str(arc), "-o", str(out / "plate.pgm"), "-m", model,
                          "--threads", "2"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    time.sleep(1.5)  # imports and the model load take about 0.7 s; decoding takes several seconds
    p.send_signal(getattr(signal, sig))
    _, err = p.communicate(timeout=120)
    lines = [ln for ln in err.decode().splitlines() if ln.strip()]
    assert p.returncode == code and len(lines) == 1 and text in lines[0], err
    assert os.listdir(out) == []


def test_info_shows_bands(banded_archive):
    """`lcodec info --frames` names the image and its bands, from the descriptor alone."""
    from click.testing import CliRunner

    from lcodec.cli import main
    arc, _ = banded_archive
    res = CliRunner().invoke(main, ["info", str(arc), "--frames"])
    assert res.exit_code == 0 and "image 1536 x 1024 x 1, 8-bit, 2 bands" in res.output, res.output
