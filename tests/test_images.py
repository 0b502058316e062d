"""Images: round trips for every input format, decoded pixels checked against the readers
of the originals (Pillow, numpy, tifffile, pydicom, imagecodecs), the causal property of
the pixel model, parallel pass == step pass across backends and thread settings, damaged
image archives, and the committed golden pixel model + containers."""
import hashlib
import io
import json
import os
import subprocess
import sys
import warnings
import zlib

import numpy as np
import pytest

import lcodec
from lcodec import api
from lcodec.errors import DataError, ModelError
from lcodec.format import container as C
from lcodec.inputs.images import analyse, read_record, rebuild
from lcodec.models import load_model
from lcodec.models.tessel import EMB_ROWS, N_SLOTS, Tessel, coding_order
from lcodec.frames.imageframe import decode_image_frame, encode_image_frame
from lcodec.inputs.layout import region_values
from support import v3_twin

PIL = pytest.importorskip("PIL.Image", reason="Pillow is needed (pip install -e .[test])")
skdata = pytest.importorskip("skimage.data", reason="scikit-image is needed for its bundled sample images")
tifffile = pytest.importorskip("tifffile")
pydicom = pytest.importorskip("pydicom")

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")
LUT = np.maximum(1, np.round((1 << 20) * np.exp(-np.arange(768) / 32))).astype(np.int32)


STRUCT = {"k": 24, "cap": 12, "decay": 0, "blend": 1}  # the second stage (structure counts), blended first stage
LAW = {"limit": 255, "cap": 12}  # the third stage of 16-bit samples (two-sided geometric law)


def random_tessel(seed=0, E=4, H=24, roles=("r8", "r16h", "r16l"), shift=1, adapt=64, structure=None, law=None,
                  light_high=0):
    """An untrained pixel model: random integer weights over output biases shaped like a
    two-sided geometric law around residual 0, so that it compresses images (enough to
    exercise every path, stored frames aside). `structure`: None (off) or STRUCT-like
    settings with one prior strength k for every role. light_high > 0: the 16-bit high
    byte's network has that many hidden units and no adaptive stages (law high_byte 0),
    as `train` writes 16-bit models."""
    rng = np.random.default_rng(seed)
    arrays, rp = {"lut": LUT}, {}
    s = np.arange(256)
    peak = {"r8": -np.minimum(s, 256 - s) * 3000, "r16h": -np.minimum(s, 256 - s) * 30000,
            "r16l": -np.abs(s - 128) * 600}
    light = {r: bool(light_high) and r == "r16h" for r in roles}
    for r in roles:
        Hr = light_high if light[r] else H
        arrays[r + ".emb"] = rng.integers(-127, 128, (EMB_ROWS, E)).astype(np.int8)
        arrays[r + ".w1"] = rng.integers(-127, 128, (N_SLOTS * E, Hr)).astype(np.int8)
        arrays[r + ".b1"] = rng.integers(-5000, 5000, Hr).astype(np.int32)
        arrays[r + ".w2"] = rng.integers(-8, 9, (Hr, 256)).astype(np.int8)
        arrays[r + ".b2"] = (peak[r] + rng.integers(-2000, 2000, 256)).astype(np.int32)
        rp[r] = {"m1": 1 << 10, "s1": 20, "mo": 1 << 12, "so": 20}
        if light[r]:
            rp[r]["hidden"] = Hr
    params = {"embed": E, "hidden": H, "chan_shift": shift, "roles": rp, "bytes": "o6m"}
    if adapt is not None:
        params["adapt"] = {r: adapt for r in roles if not light[r]}
    if structure is not None:
        params["structure"] = dict(structure, k={r: structure["k"] for r in roles if not light[r]})
    if law is not None:
        params["law"] = dict(law, high_byte=0) if light_high else dict(law)
    return Tessel(params, arrays)


@pytest.fixture(scope="module")
def model_file(tmp_path_factory):
    from lcodec.format import modelfile
    m = random_tessel(structure=STRUCT)
    p = str(tmp_path_factory.mktemp("m") / "rand.lcmodel")
    modelfile.dump(p, {"name": "tessel", "params": m.params}, m.arrays)
    return p


def _sample(name, rows=24, cols=30):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.ascontiguousarray(getattr(skdata, name)()[:rows, :cols])


def _dicom(name):
    from pydicom.data import get_testdata_file
    p = get_testdata_file(name)
    if p is None or not os.path.exists(p):
        pytest.skip(f"pydicom test file {name} is not bundled (needs a download)")
    return p


def _roundtrip(data, model_file):
    blob = lcodec.pack(data, model=model_file)
    inf = lcodec.info(blob)
    return blob, inf, lcodec.unpack(blob, model=model_file)


# -- byte-exact formats -------------------------------------------------------------------------
def _pgm(a, maxval=None):
    if a.ndim == 2:
        magic, body = b"P5", a
    else:
        magic, body = b"P6", a
    maxval = maxval or (255 if a.dtype == np.uint8 else 65535)
    raw = body.astype(">u2").tobytes() if a.dtype == np.uint16 else body.tobytes()
    return magic + b"\n# invented scanner bay-3\n%d %d\n%d\n" % (a.shape[1], a.shape[0], maxval) + raw


@pytest.mark.parametrize("kind", ["pgm8", "ppm8", "pgm16", "pgm-trailing"])
def test_pnm_round_trip_byte_exact(kind, model_file, tmp_path):
    if kind == "ppm8":
        a = _sample("astronaut", 17, 23)
    elif kind == "pgm16":
        a = (_sample("camera").astype(np.uint16) * 257 + 3)
    else:
        a = _sample("camera")
    data = _pgm(a) + (b"trailing bytes after the raster" if kind == "pgm-trailing" else b"")
    blob, inf, out = _roundtrip(data, model_file)
    assert out == data
    assert inf["frames"][0]["method"] == "modelled/image" and inf["guarantee"] == "byte-exact"
    if kind != "pgm-trailing":  # reference reader: Pillow
        p = tmp_path / "x.pnm"
        p.write_bytes(out)
        ref = np.asarray(PIL.open(io.BytesIO(data)))
        got = np.asarray(PIL.open(p))
        assert np.array_equal(got, ref)
        if kind != "pgm16":
            assert np.array_equal(got, a)


@pytest.mark.parametrize("dtype", ["u1", "<u2", ">u2", "<i2", "rgb"])
def test_npy_round_trip_byte_exact(dtype, model_file):
    if dtype == "rgb":
        a = _sample("chelsea", 15, 19)
    else:
        a = _sample("coins").astype(np.int32) * (1 if dtype == "u1" else 211) - (3000 if dtype == "<i2" else 0)
        a = a.astype(dtype)
    buf = io.BytesIO()
    np.save(buf, a)
    data = buf.getvalue()
    blob, inf, out = _roundtrip(data, model_file)
    assert out == data and inf["frames"][0]["method"] == "modelled/image"
    got = np.load(io.BytesIO(out))  # reference reader: numpy
    assert got.dtype == a.dtype and np.array_equal(got, a)


@pytest.mark.parametrize("kind", ["u8", "u16", "rgb", "bigendian16"])
def test_tiff_uncompressed_round_trip_byte_exact(kind, model_file):
    a = {"u8": _sample("text"), "u16": _sample("moon").astype(np.uint16) * 64,
         "rgb": _sample("coffee", 14, 21), "bigendian16": _sample("moon").astype(np.uint16) * 3}[kind]
    buf = io.BytesIO()
    tifffile.imwrite(buf, a, byteorder=">" if kind == "bigendian16" else "<", description="bay-3 plate 7")
    data = buf.getvalue()
    blob, inf, out = _roundtrip(data, model_file)
    assert out == data and inf["frames"][0]["method"] == "modelled/image"
    assert np.array_equal(tifffile.imread(io.BytesIO(out)), a)  # reference reader: tifffile
    if kind == "u8":
        assert np.array_equal(np.asarray(PIL.open(io.BytesIO(out))), a)  # and Pillow


@pytest.mark.parametrize("kind", ["zlib", "lzw-int16", "zlib-rgb-predictor", "packbits-u16", "zlib-planar"])
def test_compressed_tiff_round_trip_pixel_exact(kind, model_file):
    comp = kind.split("-")[0]
    a = {"zlib": _sample("camera"), "lzw-int16": _sample("moon").astype(np.int16) - 500,
         "zlib-rgb-predictor": _sample("astronaut", 14, 19), "packbits-u16": _sample("coins").astype(np.uint16) * 200,
         "zlib-planar": _sample("astronaut", 14, 19)}[kind]
    kw = {"predictor": 2} if "predictor" in kind else {}
    src = np.moveaxis(a, -1, 0) if "planar" in kind else a
    if "planar" in kind:
        kw["planarconfig"] = "separate"
        kw["photometric"] = "rgb"
    buf = io.BytesIO()
    tifffile.imwrite(buf, src, compression=comp, description="bay-3 plate 7", resolution=(300, 300),
                     software="scanner-7 fw 2", **kw)
    data = buf.getvalue()
    blob, inf, out = _roundtrip(data, model_file)
    assert inf["guarantee"] == "pixel-exact" and inf["frames"][0]["method"] == "modelled/image"
    with tifffile.TiffFile(io.BytesIO(out)) as t, tifffile.TiffFile(io.BytesIO(data)) as o:  # reference: tifffile
        p, q = t.pages[0], o.pages[0]
        assert np.array_equal(p.asarray(), q.asarray()) and p.asarray().dtype == q.asarray().dtype
        assert p.compression == q.compression and p.description == "bay-3 plate 7"
        assert p.tags["Software"].value == "scanner-7 fw 2"
        assert p.tags["XResolution"].value == q.tags["XResolution"].value
    assert analyse(out).content == analyse(data).content


def test_lossy_or_multipage_tiff_is_coded_as_bytes(model_file):
    for kw in ({"compression": "jpeg"}, {}):
        buf = io.BytesIO()
        if kw:
            tifffile.imwrite(buf, _sample("camera", 32, 32), **kw)
        else:
            tifffile.imwrite(buf, np.stack([_sample("camera", 16, 16)] * 2), compression="zlib")
        data = buf.getvalue()
        blob, inf, out = _roundtrip(data, model_file)
        assert out == data and inf["frames"][0]["method"] != "modelled/image"


@pytest.mark.parametrize("name", ["CT_small.dcm", "MR_small.dcm", "MR_small_bigendian.dcm", "examples_overlay.dcm"])
def test_dicom_round_trip_byte_exact(name, model_file):
    """12- and 16-bit DICOM (pydicom's bundled test files), little- and big-endian."""
    path = _dicom(name)
    data = open(path, "rb").read()
    ref = pydicom.dcmread(path)
    blob, inf, out = _roundtrip(data, model_file)
    assert out == data
    assert inf["frames"][0]["method"] == "modelled/image"
    assert inf["frames"][0]["image"]["bits_per_sample"] == 16
    got = pydicom.dcmread(io.BytesIO(out))  # reference reader: pydicom
    assert np.array_equal(got.pixel_array, ref.pixel_array)
    if name == "examples_overlay.dcm":
        assert int(ref.BitsStored) == 12


def test_dicom_layout_is_the_pixel_data_pydicom_reads(model_file):
    data = open(_dicom("CT_small.dcm"), "rb").read()
    info = analyse(data)
    ds = pydicom.dcmread(io.BytesIO(data))
    v = region_values(info.content, info.layout)
    assert np.array_equal(v[:, :, 0].astype(np.uint16) ^ 0x8000, ds.pixel_array.astype(np.int16).view(np.uint16))


# -- pixel-exact PNG ----------------------------------------------------------------------------
def _png(a, mode=None, text=True):
    from PIL import PngImagePlugin
    im = PIL.fromarray(a, mode) if mode else PIL.fromarray(a)
    info = PngImagePlugin.PngInfo()
    if text:
        info.add_text("Station", "kestrel-ridge scanner 2")
    buf = io.BytesIO()
    im.save(buf, "PNG", pnginfo=info, optimize=True)
    return buf.getvalue()


@pytest.mark.parametrize("kind", ["L", "RGB", "RGBA", "I;16", "P"])
def test_png_round_trip_pixel_exact(kind, model_file):
    if kind == "L":
        a, data = _sample("camera"), None
    elif kind == "RGB":
        a = _sample("astronaut", 18, 25)
    elif kind == "RGBA":
        a = np.dstack([_sample("astronaut", 18, 25), _sample("camera", 18, 25)])
    elif kind == "I;16":
        a = _sample("moon").astype(np.uint16) * 250
    else:
        a = _sample("coins") // 16
    if kind == "I;16":
        import imagecodecs
        data = imagecodecs.png_encode(a)
    elif kind == "P":
        im = PIL.fromarray(a.astype(np.uint8), "L").convert("P")
        im.putpalette([i % 256 for i in range(768)])
        buf = io.BytesIO()
        im.save(buf, "PNG")
        data = buf.getvalue()
    else:
        data = _png(a)
    blob, inf, out = _roundtrip(data, model_file)
    assert inf["guarantee"] == "pixel-exact" and inf["frames"][0]["method"] == "modelled/image"
    if kind == "I;16":
        import imagecodecs  # reference reader for 16-bit PNG: imagecodecs
        assert np.array_equal(imagecodecs.png_decode(out), imagecodecs.png_decode(data))
    else:  # reference reader: Pillow (same mode, same samples, same palette)
        ref, got = PIL.open(io.BytesIO(data)), PIL.open(io.BytesIO(out))
        assert ref.mode == got.mode and np.array_equal(np.asarray(got), np.asarray(ref))
        if kind == "P":
            assert ref.getpalette() == got.getpalette()
        if kind in ("L", "RGB", "RGBA"):
            assert got.text == ref.text == {"Station": "kestrel-ridge scanner 2"}
    # the content is the pixel record: verify checks it against the original file
    rep = api.verify(blob, model=model_file)
    assert rep.ok and rep.guarantees == {"pixel-exact image": 1}
    # unpacking again and re-packing gives the same record (same pixels, same chunks)
    assert analyse(out).content == analyse(data).content


def test_png_pixel_record_fields():
    data = _png(_sample("camera"))
    meta, extra, pix = read_record(analyse(data).content)
    assert meta["format"] == "png" and meta["color_type"] == 0 and meta["bit_depth"] == 8
    assert b"tEXt" in extra and np.array_equal(pix[:, :, 0], _sample("camera"))
    assert zlib.decompress  # rebuild uses zlib: the output is a valid PNG Pillow reads
    assert np.array_equal(np.asarray(PIL.open(io.BytesIO(rebuild(analyse(data).content)))), _sample("camera"))


def test_png_whose_image_data_is_too_long_is_bytes():
    """IDAT inflating past what IHDR allows (here 1 MB for a 2 x 2 image) is not inflated
    further and not turned into a record (PNG chunk layout: ISO/IEC 15948)."""
    import struct as st

    def chunk(t, b):
        return st.pack(">I", len(b)) + t + b + st.pack(">I", zlib.crc32(t + b))
    png = (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", st.pack(">IIBBBBB", 2, 2, 8, 0, 0, 0, 0))
           + chunk(b"IDAT", zlib.compress(bytes(1 << 20))) + chunk(b"IEND", b""))
    assert analyse(png) is None
    good = (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", st.pack(">IIBBBBB", 2, 2, 8, 0, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(bytes(6))) + chunk(b"IEND", b""))
    assert analyse(good).guarantee == "pixel-exact"
    assert np.array_equal(np.asarray(PIL.open(io.BytesIO(good))), np.zeros((2, 2), np.uint8))


def test_one_bit_png_is_coded_as_bytes(model_file):
    buf = io.BytesIO()
    PIL.fromarray(_sample("camera") > 100).save(buf, "PNG")  # bit depth 1: not turned into a record
    data = buf.getvalue()
    assert data[24] == 1  # IHDR bit depth (PNG specification: byte 24 of the file)
    blob, inf, out = _roundtrip(data, model_file)
    assert out == data and inf["frames"][0]["method"] != "modelled/image"


# -- folders, byte mode, fallbacks, verify --------------------------------------------------------
def _folder(tmp_path):
    d = tmp_path / "plates"
    d.mkdir()
    (d / "a.pgm").write_bytes(_pgm(_sample("camera")))
    (d / "b.png").write_bytes(_png(_sample("coins")))
    (d / "c.dcm").write_bytes(open(_dicom("MR_small.dcm"), "rb").read())
    (d / "notes.txt").write_bytes(b"plate log, bay 3\n" * 20)
    return d


def test_folder_round_trip_and_guarantees(model_file, tmp_path):
    d = _folder(tmp_path)
    blob, stats = api.pack_paths([str(d)], model=model_file)
    assert len(stats.images) == 3
    g = {m["path"]: m["guarantee"] for m in lcodec.info(blob)["members"]}
    assert g == {"plates": "byte-exact", "plates/a.pgm": "byte-exact", "plates/b.png": "pixel-exact",
                 "plates/c.dcm": "byte-exact", "plates/notes.txt": "byte-exact"}
    out = tmp_path / "out"
    lcodec.unpack_to_dir(blob, str(out), model=model_file)
    for n in ("a.pgm", "c.dcm", "notes.txt"):
        assert (out / "plates" / n).read_bytes() == (d / n).read_bytes()
    assert np.array_equal(np.asarray(PIL.open(out / "plates" / "b.png")), _sample("coins"))
    rep = api.verify(blob, model=model_file, against=str(d))
    assert rep.ok, rep.problems
    # a changed pixel in the original is found by verify --against (pixel-exact member)
    a = _sample("coins").copy()
    a[3, 4] ^= 1
    (d / "b.png").write_bytes(_png(a))
    assert not api.verify(blob, model=model_file, against=str(d)).ok


def test_a_file_that_is_a_pixel_record_stays_bytes(model_file):
    """Only a PNG becomes a pixel record; a file that happens to be one is coded as its bytes."""
    rec = analyse(_png(_sample("coins"))).content
    assert analyse(rec) is None
    blob = lcodec.pack(rec, model=model_file)
    assert lcodec.info(blob)["guarantee"] == "byte-exact" and lcodec.unpack(blob, model=model_file) == rec


def test_salvage_rebuilds_pixel_exact_members(model_file, tmp_path):
    from lcodec.archive import salvage as S
    d = _folder(tmp_path)
    blob, _ = api.pack_paths([str(d)], model=model_file)
    inf = lcodec.info(blob)
    names = [m["path"] for m in inf["members"] if not m["folder"]]
    k = names.index("plates/a.pgm")  # damage the PGM's frame (frames follow the member order)
    fr = inf["frames"][k]
    end = inf["archive_bytes"] - sum(f["coded_bytes"] + 16 for f in inf["frames"][k + 1:])
    bad = bytearray(blob)
    bad[end - 40] ^= 0xFF  # inside the PGM frame's coded words (16+ bytes of head per later record)
    assert not api.verify(bytes(bad), model=model_file).ok
    out = tmp_path / "saved"
    res = S.salvage_to(bytes(bad), str(out), model_file, False, False, None)
    status = {m.path: m.status for m in res.members}
    assert status["plates/a.pgm"] == "lost" and status["plates/b.png"] == "recovered"
    assert np.array_equal(np.asarray(PIL.open(out / "plates" / "b.png")), _sample("coins"))
    assert (out / "plates" / "c.dcm").read_bytes() == (d / "c.dcm").read_bytes()
    assert fr["method"] == "modelled/image"


def test_force_byte_mode(model_file, tmp_path):
    d = _folder(tmp_path)
    blob, stats = api.pack_paths([str(d)], model=model_file, pixels=False)
    assert not stats.images
    assert all(f["method"] != "modelled/image" for f in lcodec.info(blob)["frames"])
    out = tmp_path / "out"
    lcodec.unpack_to_dir(blob, str(out), model=model_file)
    for n in ("a.pgm", "b.png", "c.dcm"):
        assert (out / "plates" / n).read_bytes() == (d / n).read_bytes()


def test_depth_without_a_network_is_coded_as_bytes(tmp_path):
    from lcodec.format import modelfile
    m = random_tessel(roles=("r8",))
    p = str(tmp_path / "m8.lcmodel")
    modelfile.dump(p, {"name": "tessel", "params": m.params}, m.arrays)
    data = open(_dicom("MR_small.dcm"), "rb").read()
    blob = lcodec.pack(data, model=p)
    assert lcodec.info(blob)["frames"][0]["method"] != "modelled/image"
    assert lcodec.unpack(blob, model=p) == data


def test_wrong_or_missing_model_is_a_clear_error(model_file, tmp_path):
    blob = lcodec.pack(_pgm(_sample("camera")), model=model_file)
    with pytest.raises(ModelError, match="needs the tessel model file"):
        lcodec.unpack(blob)
    from lcodec.format import modelfile
    other = random_tessel(seed=5)
    p = str(tmp_path / "other.lcmodel")
    modelfile.dump(p, {"name": "tessel", "params": other.params}, other.arrays)
    with pytest.raises(ModelError, match="wrong model"):
        lcodec.unpack(blob, model=p)


def test_damaged_image_archive_is_refused(model_file, tmp_path):
    data = _pgm(_sample("camera", 40, 40))
    blob = bytearray(lcodec.pack(data, model=model_file))
    fr = lcodec.info(bytes(blob))["frames"][0]
    assert fr["method"] == "modelled/image"
    for pos in (len(blob) - 30, len(blob) - fr["coded_bytes"] + 2):  # coded words; the descriptor
        bad = bytearray(blob)
        bad[pos] ^= 0x10
        with pytest.raises(DataError):
            lcodec.unpack(bytes(bad), model=model_file)
        rep = api.verify(bytes(bad), model=model_file)
        assert not rep.ok
    with pytest.raises(DataError):
        lcodec.unpack(bytes(blob[:-7]), model=model_file)
    # through the CLI: exit 1, a message, no traceback, no output file
    bad = bytearray(blob)
    bad[len(blob) - 30] ^= 0x10
    (tmp_path / "bad.lcodec").write_bytes(bytes(bad))
    r = subprocess.run([sys.executable, "-m", "lcodec", "unpack", str(tmp_path / "bad.lcodec"), "-o",
                        str(tmp_path / "x.pgm"), "-m", model_file], capture_output=True, text=True,
                       env=dict(os.environ, PYTHONPATH=os.getcwd()))
    assert r.returncode == 1 and "Traceback" not in r.stderr and "damaged" in r.stderr
    assert not (tmp_path / "x.pgm").exists()


GOOD = b"\x01\x00\x01\x01\x01\x01\x00"  # version 1, offset 0, 1 x 1 x 1 sample of 1 byte, flags 0


@pytest.mark.parametrize("payload", [b"", b"\x02" + GOOD[1:], GOOD[:4], b"\x01\x00\x00\x01\x01\x01\x00",
                                     b"\x01\x00\x01\x01\x05\x01\x00", b"\x01\x00\x01\x01\x01\x03\x00",
                                     b"\x01\x00\x01\x02\x01\x01\x00", b"\x01\x00\x01\x01\x01\x01\x10",
                                     b"\x01\x00\x01\x01\x01\x01\x01", b"\x01\x01\x01\x01\x01\x01\x00",
                                     GOOD + b"abc", b"\x01\x00\xff\xff\xff\xff\xff\xff\xff\xff\x7f\x01\x01\x01\x00"])
def test_hostile_image_descriptors_are_refused(payload):
    """Zero rows, 5 channels, 3-byte samples, a region past the content, unknown or
    8-bit-only-forbidden flags, a prefix past the end, broken words, an over-long varint."""
    from lcodec.inputs.layout import read_descriptor
    lay, pos = read_descriptor(GOOD, 1)  # the valid one is accepted
    assert (lay.rows, lay.cols, pos) == (1, 1, len(GOOD))
    with pytest.raises(DataError):
        read_descriptor(payload, 1)


def test_mutated_image_archives_never_give_wrong_output(model_file):
    """Random byte flips anywhere in image archives (byte-exact and pixel-exact): unpack
    either gives back exactly the original or refuses with an lcodec error."""
    from lcodec.errors import LcodecError
    rng = np.random.default_rng(7)
    for data in (_pgm(_sample("camera", 20, 26)), _png(_sample("coins", 18, 22))):
        blob = lcodec.pack(data, model=model_file)
        want = lcodec.unpack(blob, model=model_file)
        for _ in range(150):
            bad = bytearray(blob)
            for pos in rng.integers(0, len(bad), rng.integers(1, 4)):
                bad[pos] ^= 1 << int(rng.integers(0, 8))
            try:
                out = lcodec.unpack(bytes(bad), model=model_file)
            except LcodecError:
                continue
            assert out == want


# -- the model: causal property, determinism -----------------------------------------------------
def _tables(m, v, deep):
    return np.concatenate([t for _, t in m.teacher_tables(v, deep)])


@pytest.mark.parametrize("adapt", [None, 64, "structure", "structure-unblended", "law"])
@pytest.mark.parametrize("kind", ["grey8", "rgb8", "grey16"])
def test_causal_property(kind, adapt):
    """Masked-autoencoder property (Germain et al., 2015): the table of every sub-symbol
    depends only on sub-symbols coded before it. Changing one sample changes no table at
    or before its own position in coding order, and does change some later table. With
    the structure stage too (its counts and weights are updated after each group)."""
    if adapt == "structure":
        m = random_tessel(structure=STRUCT)
    elif adapt == "law":
        m = random_tessel(structure=STRUCT, law={"limit": 2, "cap": 3})
    elif adapt == "structure-unblended":
        m = random_tessel(adapt=None, structure=dict(STRUCT, blend=0, decay=3, cap=4))
    else:
        m = random_tessel(adapt=adapt)
    if kind == "rgb8":
        v = _sample("astronaut", 6, 8)
    elif kind == "grey16":
        v = (_sample("camera", 6, 8).astype(np.uint16) * 251)[:, :, None]
    else:
        v = _sample("camera", 7, 9)[:, :, None]
    deep = v.dtype == np.uint16
    P = 2 if deep else 1
    rows, cols, C = v.shape
    base = _tables(m, v, deep)
    order = coding_order(rows, cols, C, P)
    pos = np.empty_like(order)
    pos[order] = np.arange(len(order))  # raster sub-symbol -> coding position
    for r in range(rows):
        for c in range(cols):
            for ch in range(C):
                w = v.copy()
                w[r, c, ch] = (int(w[r, c, ch]) + 77) % (65536 if deep else 256)
                t = _tables(m, w, deep)
                first = pos[((r * cols + c) * C + ch) * P]  # its first sub-symbol (high byte)
                assert np.array_equal(t[:first + 1], base[:first + 1]), (r, c, ch)
                if r < rows - 1 or c < cols - 1:
                    assert not np.array_equal(t[first + 1:], base[first + 1:]), (r, c, ch)


@pytest.mark.parametrize("adapt", [None, 1, 3000, "structure", "structure-k1", "structure-unblended", "law", "law-alone",
                                   "light-high"])
@pytest.mark.parametrize("kind", ["grey8", "rgb8", "grey16", "signed16", "rgb16"])
def test_parallel_pass_equals_step_pass(kind, adapt):
    if adapt == "structure":
        m = random_tessel(structure=STRUCT)
    elif adapt == "light-high":  # all three stages for the low byte; a 5-unit high byte without them
        m = random_tessel(structure=STRUCT, law=LAW, light_high=5)
    elif adapt == "law":  # all three stages
        m = random_tessel(structure=STRUCT, law=LAW)
    elif adapt == "law-alone":  # the network and the law only; scales halved every 3 samples
        m = random_tessel(adapt=None, law={"limit": 3, "cap": 1})
    elif adapt == "structure-k1":  # the smallest priors and a short evidence cap
        m = random_tessel(adapt=1, structure=dict(STRUCT, k=1, cap=1))
    elif adapt == "structure-unblended":  # no first stage; decayed evidence
        m = random_tessel(adapt=None, structure=dict(STRUCT, blend=0, decay=2, k=3000))
    else:
        m = random_tessel(adapt=adapt)
    if kind == "rgb8":
        a, lay_args = _sample("astronaut", 13, 17), (1, 0)
    elif kind in ("grey16", "signed16"):
        a, lay_args = (_sample("moon", 19, 11).astype(np.uint16) * 199), (2, 3 if kind == "signed16" else 0)
    elif kind == "rgb16":  # three 16-bit channels: wide residuals, both signs, several blocks
        a, lay_args = (_sample("astronaut", 9, 12).astype(np.uint16) * 257), (2, 0)
    else:
        a, lay_args = _sample("camera", 21, 10), (1, 0)
    check_step_equals_parallel(m, a, lay_args)


@pytest.mark.parametrize("kind", ["grey8", "rgb8", "grey16", "signed16"])
def test_networks_alone_when_the_stages_save_too_little(kind):
    """A model file with stages_min_gain: an image whose stages save less than that share of
    its samples' bits is coded with the networks alone (flag FLAG_NETS_ONLY); the decoder's
    step tables then equal the encoder's networks-only tables bit for bit, and the archive
    is what the same image gives with the stages switched off in the model's parameters.
    With gain 0 the image is coded with the stages unless they make it larger."""
    from lcodec.inputs.layout import FLAG_NETS_ONLY, Layout, read_descriptor, values_region
    a, lay_args = {"grey8": (_sample("camera", 21, 30), (1, 0)), "rgb8": (_sample("astronaut", 13, 17), (1, 0)),
                   "grey16": (_sample("moon", 19, 23).astype(np.uint16) * 199, (2, 0)),
                   "signed16": (_sample("moon", 19, 23).astype(np.uint16) * 199, (2, 3))}[kind]
    a = a[:, :, None] if a.ndim == 2 else a
    lay = Layout(5, a.shape[0], a.shape[1], a.shape[2], *lay_args)
    raw = b"head!" + values_region(a, lay) + b"tail"
    base = random_tessel(structure=STRUCT, law=LAW, light_high=5)
    always = Tessel(dict(base.params, stages_min_gain=10000), base.arrays)
    never = Tessel(dict(base.params, stages_min_gain=0), base.arrays)
    bare = Tessel({k: v for k, v in base.params.items() if k not in ("adapt", "structure", "law")}, base.arrays)
    payload, _, nll = encode_image_frame(always, raw, lay)
    got, _ = read_descriptor(payload, len(raw))
    assert got.flags & FLAG_NETS_ONLY
    rec = []
    assert decode_image_frame(always, payload, len(raw), rec) == raw
    v = region_values(raw, lay)
    want = np.concatenate([t for _, t in always.teacher_tables(v, lay.deep, stages=False)])
    assert np.array_equal(np.concatenate(rec), want)
    assert np.array_equal(want, _tables(bare, v, lay.deep))  # the networks' tables alone
    start = read_descriptor(payload, len(raw))[1]  # the coded words: the same as with the stages switched off
    assert payload[start:] == encode_image_frame(bare, raw, lay)[0][start:]
    # a model file without the parameter never writes the flag: a flagged frame is damage to it
    with pytest.raises(DataError, match="networks alone"):
        decode_image_frame(base, payload, len(raw))
    # gain 0: the networks alone exactly when that makes the coded samples smaller (random
    # networks: on some of these images it does); the choice compares the two codings' sizes
    staged = encode_image_frame(base, raw, lay)[0]
    kept, _, kept_nll = encode_image_frame(never, raw, lay)
    alone = len(payload) < len(staged)
    assert bool(read_descriptor(kept, len(raw))[0].flags & FLAG_NETS_ONLY) == alone
    assert kept == (payload if alone else staged)
    assert kept_nll == pytest.approx(nll if alone else encode_image_frame(base, raw, lay)[2])
    assert decode_image_frame(never, kept, len(raw)) == raw
    # with 2 forked band workers and 3 bands: the same choice, the same bytes
    three = encode_image_frame(never, raw, lay, bands=3)[0]
    assert encode_image_frame(never, raw, lay, bands=3, workers=2)[0] == three
    assert decode_image_frame(never, three, len(raw), threads=2) == raw


def test_stages_min_gain_refused():
    m = random_tessel(law=LAW)
    for bad in (-1, 10001, 2.5, True, "25"):
        with pytest.raises(ValueError, match="stages_min_gain"):
            Tessel(dict(m.params, stages_min_gain=bad), m.arrays)


def check_step_equals_parallel(m, a, lay_args):
    """Samples a (rows, columns[, channels]) framed between other bytes, coded and decoded
    with m: the decode gives the bytes back, and the decoder's step tables equal the
    teacher-forced tables bit for bit (positive integers, float64), on both backends."""
    from lcodec.inputs.layout import Layout, values_region
    if a.ndim == 2:
        a = a[:, :, None]
    lay = Layout(5, a.shape[0], a.shape[1], a.shape[2], *lay_args)
    raw = b"head!" + values_region(a, lay) + b"tail"
    payload, _, _ = encode_image_frame(m, raw, lay)
    rec = []
    assert decode_image_frame(m, payload, len(raw), rec) == raw
    step = np.concatenate(rec)
    v = region_values(raw, lay)
    par = _tables(m, v, lay.deep)
    assert step.dtype == par.dtype == np.float64 and np.array_equal(step, par)
    assert (par == np.floor(par)).all() and (par >= 1).all()
    m.set_backend("torch")  # the second backend gives the same integers
    assert np.array_equal(_tables(m, v, lay.deep), par)


SNIPPET = r"""
import sys, hashlib, lcodec
data = open(sys.argv[1], 'rb').read()
print(hashlib.sha256(lcodec.pack(data, model=sys.argv[2])).hexdigest())
"""


def test_same_archive_across_processes_and_thread_settings(model_file, tmp_path):
    src = tmp_path / "in.dcm"
    src.write_bytes(open(_dicom("CT_small.dcm"), "rb").read())
    digests = set()
    for threads in ("1", "2"):
        env = dict(os.environ, NUMBA_NUM_THREADS=threads, OMP_NUM_THREADS=threads, OPENBLAS_NUM_THREADS=threads,
                   PYTHONPATH=os.getcwd())
        out = subprocess.run([sys.executable, "-c", SNIPPET, str(src), model_file], env=env, capture_output=True,
                             text=True, check=True)
        digests.add(out.stdout.strip())
    digests.add(hashlib.sha256(lcodec.pack(src.read_bytes(), model=model_file)).hexdigest())
    assert len(digests) == 1


def test_chunking_does_not_change_tables(monkeypatch):
    """The encoder's batches end on wavefront groups; their size changes no table."""
    import lcodec.models.tessel as T
    for m in (random_tessel(), random_tessel(structure=STRUCT)):
        v = _sample("camera", 33, 40)[:, :, None]
        a = _tables(m, v, False)
        monkeypatch.setattr(T, "CHUNK", 7)
        assert np.array_equal(_tables(m, v, False), a)
        monkeypatch.setattr(T, "CHUNK", 8192)


def test_adaptive_counts_stay_exact_at_the_limits():
    """Largest network tables (every entry 2**20) and counts at the halving limit: the
    mixed table is exact in float64 (below 2**53) and every entry positive."""
    from lcodec.models.tessel import N_CTX
    from lcodec.models.tessel_stages import COUNT_LIMIT, _mix
    tab = np.full((3, 256), float(1 << 20))
    tab[1, 5] = 1.0
    counts = np.zeros((N_CTX, 256), np.int32)
    counts[0, :] = COUNT_LIMIT
    out = np.empty_like(tab)
    _mix(tab, np.zeros(3, np.int64), 1 << 16, counts, out)
    assert (out >= 1).all() and out.max() < 2 ** 53 and (out == np.floor(out)).all()


def test_structure_stage_stays_exact_at_the_limits():
    """The second stage at its extremes: first-stage entries near 2**45 (the largest `_mix`
    writes), one entry 1, the largest prior K2 = 2**16, counts at the halving limit, evidence
    at both caps: every mixed entry an integer in 1..2**53, and the kept A and B tables match
    a plain-Python recomputation (Python integers as the reference)."""
    from lcodec.models.tessel import N_SCTX
    from lcodec.models.tessel_stages import COUNT_LIMIT, MIX_ONE, _mix2, weight_table
    cap = 12
    wtab = weight_table(cap)
    tab = np.full((3, 256), float((1 << 45) - 1))
    tab[1, 5] = 1.0
    tab[2, :] = np.arange(1, 257)
    counts = np.zeros((N_SCTX, 256), np.int32)
    counts[0, :] = COUNT_LIMIT
    counts[1, 7] = COUNT_LIMIT
    D = np.zeros(N_SCTX, np.int64)
    D[0], D[1] = 256 * cap, -256 * cap
    ctx = np.array([0, 1, 2], np.int64)
    qa, tb, sums, out = (np.empty((3, 256), np.int64), np.empty((3, 256), np.int64), np.empty((3, 2), np.int64),
                         np.empty((3, 256)))
    _mix2(tab, ctx, 1 << 16, counts, D, wtab, cap, qa, tb, sums, out)
    assert (out >= 1).all() and out.max() < 2 ** 53 and (out == np.floor(out)).all()
    for i in range(3):
        t = [int(x) for x in tab[i]]
        inv = (1 << 44) // sum(t)
        q = [(x * inv) >> 24 for x in t]
        b = [(1 << 16) * (x >> 4) + (int(counts[i, j]) << 16) + 1 for j, x in enumerate(q)]
        assert qa[i].tolist() == q and tb[i].tolist() == b
        wb = int(wtab[(int(D[i]) >> 4) + 16 * cap])
        invb = (1 << 44) // sum(b)
        assert out[i].tolist() == [float((MIX_ONE - wb) * x + wb * ((y * invb) >> 24) + 1) for x, y in zip(q, b)]
    assert wtab[0] == 1 and wtab[-1] == MIX_ONE - 1  # at the caps, the losing estimate keeps 1/4096


def test_log_and_weight_tables_match_their_formulas():
    """LOG2_TAB[i] = floor(256 log2(1 + i/256)) and the weight table MIX_ONE * 2**d / (1 + 2**d),
    both built from integers alone, checked against Python's math.log2 / float powers (the
    floats are the reference here, never inside the coder)."""
    import math
    from lcodec.models.tessel_stages import LOG2_TAB, MIX_ONE, _ilog, weight_table
    for i in range(256):
        f = 256 * math.log2(1 + i / 256)
        assert LOG2_TAB[i] == math.floor(f) or abs(f - round(f)) < 1e-9
    for x in (1, 2, 3, 255, 256, 257, 1000, 65535, 1 << 40, (1 << 53) - 1):
        assert abs(_ilog(x) / 256 - math.log2(x)) < 2 / 256, x
    for cap in (1, 12, 30):
        w = weight_table(cap)
        assert len(w) == 32 * cap + 1 and w[16 * cap] == MIX_ONE // 2
        assert (np.diff(w) >= 0).all() and w.min() >= 1 and w.max() <= MIX_ONE - 1
        for k in range(0, len(w), 7):
            d = (k - 16 * cap) / 16
            ref = MIX_ONE / (1 + 2.0 ** -d)
            assert abs(int(w[k]) - min(max(ref, 1), MIX_ONE - 1)) <= 1, (cap, k)


def _moon_upscaled():
    """scikit-image's moon is a 2x pixel-replicated image: every aligned 2x2 block is constant."""
    a = _sample("moon", 48, 64)
    assert (a[:, 1::2] == a[:, 0::2]).all() and (a[1::2] == a[0::2]).all()
    return a


def _mosaic():
    """A Bayer-like mosaic from scikit-image's astronaut (RGB): R on even rows and columns,
    B on odd rows and columns, G elsewhere; one sample per position."""
    rgb = _sample("astronaut", 40, 56).astype(np.int32)
    r, c = np.meshgrid(np.arange(40), np.arange(56), indexing="ij")
    ch = np.where((r % 2 == 0) & (c % 2 == 0), 0, np.where((r % 2 == 1) & (c % 2 == 1), 2, 1))
    return np.take_along_axis(rgb, ch[:, :, None], 2)[:, :, 0].astype(np.uint8)


@pytest.mark.parametrize("kind", ["upscaled8", "upscaled16", "mosaic8"])
def test_upscaled_and_mosaic_images_round_trip(kind, model_file, tmp_path):
    """A 2x-upscaled image and a Bayer-like mosaic: byte-exact round trip, pixels read back by
    Pillow (PGM) or numpy (NPY) equal the originals; on the upscaled image the structure stage
    codes the three copied samples of every 2x2 block far below what the first stage alone needs."""
    if kind == "mosaic8":
        a = _mosaic()
    else:
        a = _moon_upscaled()
        if kind == "upscaled16":
            a = a.astype(np.uint16) * 257
    if a.dtype == np.uint16:
        buf = io.BytesIO()
        np.save(buf, a)
        data = buf.getvalue()
    else:
        data = _pgm(a)
    blob, inf, out = _roundtrip(data, model_file)
    assert out == data and inf["frames"][0]["method"] == "modelled/image"
    if a.dtype == np.uint16:
        assert np.array_equal(np.load(io.BytesIO(out)), a)  # reference reader: numpy
    else:
        assert np.array_equal(np.asarray(PIL.open(io.BytesIO(out))), a)  # reference reader: Pillow
    if kind != "mosaic8":
        v = a[:, :, None]
        deep = a.dtype == np.uint16
        on = random_tessel(structure=STRUCT)
        off = random_tessel()
        P = 2 if deep else 1
        order = coding_order(a.shape[0], a.shape[1], 1, P)
        copied = ((np.arange(a.size) // a.shape[1]) % 2 + (np.arange(a.size) % a.shape[1]) % 2 > 0)
        cost = {}
        for name, m in (("on", on), ("off", off)):
            c = np.concatenate([-np.log2(t[np.arange(len(s_)), s_] / t.sum(1)) for s_, t in m.teacher_tables(v, deep)])
            per_pixel = np.zeros(a.size)
            np.add.at(per_pixel, order // P, c)
            cost[name] = (per_pixel[copied].mean(), per_pixel[~copied].mean())
        # copied samples: far cheaper with the structure stage; the informative quarter: no worse than 10% more
        assert cost["on"][0] < 0.5 * cost["off"][0] and cost["on"][1] < 1.1 * cost["off"][1], cost


def test_law_params_refused(tmp_path):
    from lcodec.format import modelfile
    m = random_tessel(law=LAW)
    for bad in ({"limit": -1, "cap": 12}, {"limit": 255}, {"limit": 255, "cap": 0}, {"limit": 255, "cap": 31},
                {"limit": (1 << 16) + 1, "cap": 12}, {"limit": 2.5, "cap": 12}, {"limit": 255, "cap": 12, "x": 1}, 7):
        p = str(tmp_path / "bad.lcmodel")
        modelfile.dump(p, {"name": "tessel", "params": dict(m.params, law=bad)}, m.arrays)
        with pytest.raises(ModelError, match="bad parameters.*law"):
            load_model(p)


def test_law_tables_follow_the_two_sided_geometric_law():
    """Each level's tables, built from integers alone, against the law they stand for,
    computed here in floats (the reference; floats never reach the coder): the high byte's
    block masses and the low byte's shape in the centre, rising and falling blocks match
    P(r) ~ t**|r| with mean |r| = 2t / (1 - t**2) = 2**(L/8) / 16, to the tables' rounding."""
    import math
    from lcodec.models.tessel_stages import LAW_MIN_LEVEL, N_LEVELS, law_tables
    tab = law_tables()
    assert tab.shape == (4 * N_LEVELS, 256) and tab.dtype == np.int64 and tab.min() >= 1
    assert (abs(tab.sum(1) - (1 << 20)) <= 256).all()
    assert law_tables() is tab  # built once per process
    r = np.arange(-128 - 256 * 128, 128 + 256 * 127)  # every residual of the 256 blocks
    for L in range(LAW_MIN_LEVEL, N_LEVELS, 9):
        m = 2 ** (L / 8) / 16
        t = (math.sqrt(1 + m * m) - 1) / m
        assert abs(2 * t / (1 - t * t) - m) < 1e-6 * m
        p = np.exp(np.abs(r) * math.log(t))
        p /= p.sum()
        blocks = p.reshape(256, 256).sum(1)  # residual blocks from the most negative up: hi 128..255, 0..127
        ref_hi = np.concatenate([blocks[128:], blocks[:128]])
        got_hi = tab[L] / tab[L].sum()
        big = ref_hi > 1e-4
        assert np.allclose(got_hi[big], ref_hi[big], rtol=2e-3, atol=3e-6), L
        for k, blk in ((1, 128), (2, 129), (3, 127)):  # centre (hi 0), hi 1 (rising residuals), hi 255
            ref = p.reshape(256, 256)[blk]
            ref = ref / ref.sum()
            got = tab[k * N_LEVELS + L] / tab[k * N_LEVELS + L].sum()
            assert np.allclose(got, ref, rtol=2e-3, atol=3e-6), (L, k)


def test_law_stage_stays_exact_at_the_limits():
    """`_mix_law` with stage-2 entries near their largest (2**32) and near 1, law rows at both
    ends of the scale, evidence at both caps: integers in 1..2**53, equal to a plain-Python
    recomputation (Python integers as the reference), and `_law_evidence` moves the evidence
    by the code lengths under A and under the law row."""
    from lcodec.models.tessel import N_CTX
    from lcodec.models.tessel_stages import (LOG2_TAB, MIX_ONE, N_LEVELS, _law_evidence, _mix_law, law_normed,
                                             law_tables, weight_table)
    cap = 12
    wtab, law = weight_table(cap), law_tables()
    lawq, lawsum = law_normed()
    tab = np.full((3, 256), float((1 << 45) - 1))
    tab[1, :] = 1.0
    tab[2, :] = np.arange(1, 257) * float(1 << 24)
    ctx = np.array([0, 1, 2], np.int64)
    lrow = np.array([N_LEVELS - 1, 16, 3 * N_LEVELS + 50], np.int64)
    D = np.zeros(N_CTX, np.int64)
    D[0], D[1] = 256 * cap, -256 * cap
    qa, tb, sums, out = (np.empty((3, 256), np.int64), np.empty((3, 256), np.int64), np.empty((3, 2), np.int64),
                         np.empty((3, 256)))
    _mix_law(tab, ctx, lrow, lawq, lawsum, D, wtab, cap, qa, sums, out)
    assert (out >= 1).all() and out.max() < 2 ** 53 and (out == np.floor(out)).all()

    def ilog(x):  # `_ilog` in Python integers
        b = x.bit_length() - 1
        return b * 256 + int(LOG2_TAB[((x >> (b - 8)) if b >= 8 else (x << (8 - b))) & 255])
    syms = np.array([0, 128, 255], np.int64)
    D0 = D.copy()
    _law_evidence(ctx, syms, D, cap, lrow, law, qa, tb, sums)
    for i in range(3):
        t = [int(x) for x in tab[i]]
        inv = (1 << 44) // sum(t)
        q = [(x * inv) >> 24 for x in t]
        b = [int(x) for x in law[lrow[i]]]
        wb = int(wtab[(int(D0[i]) >> 4) + 16 * cap])
        invb = (1 << 44) // sum(b)
        assert qa[i].tolist() == q and sums[i].tolist() == [sum(q) + 256, sum(b)]
        assert out[i].tolist() == [float((MIX_ONE - wb) * x + wb * ((y * invb) >> 24) + 1) for x, y in zip(q, b)]
        s = int(syms[i])
        d = int(D0[i]) + (ilog(sum(q) + 256) - ilog(q[s] + 1)) - (ilog(sum(b)) - ilog(b[s]))
        assert int(D[i]) == min(max(d, -256 * cap), 256 * cap)


def test_law_stage_learns_a_small_noisy_scan(model_file, tmp_path):
    """pydicom's MR_small (64 x 64, 16 bits, residuals around 80 wide): the law stage learns its
    noise from a few hundred samples, which count tables of 256 symbols cannot; the archive
    round-trips byte-exact and pydicom reads the samples back unchanged."""
    import pydicom
    data = open(_dicom("MR_small.dcm"), "rb").read()
    v = pydicom.dcmread(io.BytesIO(data)).pixel_array.astype(np.uint16)[:, :, None]
    bits = {}
    for name, law in (("off", None), ("on", LAW)):
        m = random_tessel(structure=STRUCT, law=law)
        bits[name] = sum(float(-np.log2(t[np.arange(len(s_)), s_] / t.sum(1)).sum()) for s_, t in m.teacher_tables(v, True))
    assert bits["on"] < 0.9 * bits["off"], bits
    from lcodec.format import modelfile
    p = str(tmp_path / "law.lcmodel")
    m = random_tessel(structure=STRUCT, law=LAW)
    modelfile.dump(p, {"name": "tessel", "params": m.params}, m.arrays)
    blob = lcodec.pack(data, model=p)
    out = lcodec.unpack(blob, model=p)
    assert out == data and np.array_equal(pydicom.dcmread(io.BytesIO(out)).pixel_array, v[:, :, 0])


def test_structure_params_refused(tmp_path):
    from lcodec.format import modelfile
    m = random_tessel(structure=STRUCT)
    for bad in ({"k": {"r8": 1}, "cap": 0, "decay": 0, "blend": 1}, {"k": {"r8": 1}, "cap": 12, "decay": 0},
                {"k": {"r8": -1}, "cap": 12, "decay": 0, "blend": 1}, {"k": {"r9": 1}, "cap": 12, "decay": 0, "blend": 1},
                {"k": {"r8": 1}, "cap": 12, "decay": 17, "blend": 1}, {"k": {"r8": 1}, "cap": 12, "decay": 0, "blend": 2},
                {"k": {"r8": 1.5}, "cap": 12, "decay": 0, "blend": 1}, [1, 2]):
        p = str(tmp_path / "bad.lcmodel")
        modelfile.dump(p, {"name": "tessel", "params": dict(m.params, structure=bad)}, m.arrays)
        with pytest.raises(ModelError, match="bad parameters.*structure"):
            load_model(p)


def test_model_file_round_trip_and_refusals(model_file, tmp_path):
    m = load_model(model_file)
    assert m.is_image_model and m.identity["model"] == "tessel"
    from lcodec.format import modelfile
    bad = random_tessel()
    arrays = dict(bad.arrays)
    arrays["r8.w1"] = arrays["r8.w1"][:-1]
    p = str(tmp_path / "bad.lcmodel")
    modelfile.dump(p, {"name": "tessel", "params": bad.params}, arrays)
    with pytest.raises(ModelError, match="bad parameters"):
        load_model(p)
    params = dict(bad.params, hidden=2000)
    modelfile.dump(p, {"name": "tessel", "params": params}, bad.arrays)
    with pytest.raises(ModelError, match="bad parameters"):
        load_model(p)


# -- training and the golden pixel model -----------------------------------------------------------
def test_train_image_cli(tmp_path):
    pytest.importorskip("torch")
    d = tmp_path / "plates"
    d.mkdir()
    for i, n in enumerate(("camera", "coins", "text")):
        (d / f"{n}.pgm").write_bytes(_pgm(_sample(n, 40, 48)))
    (d / "notes.txt").write_bytes(b"not an image")
    out = tmp_path / "m.lcmodel"
    r = subprocess.run([sys.executable, "-m", "lcodec", "train", "--kind", "image", str(d), "-o", str(out),
                        "--time-limit", "3", "--preset", "tiny"], capture_output=True, text=True,
                       env=dict(os.environ, PYTHONPATH=os.getcwd()))
    assert r.returncode == 0, r.stderr
    assert "skipped" in r.stderr and "exported r8" in r.stderr
    assert "and 6 mirrored, flipped or transposed copies" in r.stderr  # 2 training images, 3 copies each
    params = load_model(str(out)).inner.params  # the defaults: both per-image stages
    assert params["adapt"] == {"r8": 4096} and params["structure"] == {"k": {"r8": 32}, "cap": 12, "decay": 0, "blend": 1}
    assert params["stages_min_gain"] == 25  # train.STAGES_MIN_GAIN: 0.25% of the samples' bits
    assert "law" not in params  # the law stage is for 16-bit samples only
    assert "colour" not in params and params["predictor"] == "gap"  # grey images: no colour mode; gap by default
    data = _pgm(_sample("page", 30, 30))
    blob = lcodec.pack(data, model=str(out))
    assert lcodec.info(blob)["frames"][0]["method"] == "modelled/image"
    assert lcodec.unpack(blob, model=str(out)) == data
    # a trained file is named by its SHA-256 alone: the identity's binary form, no file name
    cont = C.read_container(blob)
    assert cont.identity == {"model": "tessel", "sha256": load_model(str(out)).sha256}
    assert b"m.lcmodel" not in blob


def test_archives_name_a_tessel_file_only_when_its_metadata_asks(model_file, tmp_path):
    """Model files from before 2026-12-05 (no `archives_name_file` key; the golden ones among
    them) keep their file's name in every archive, so their archives re-encode to the same
    bytes; a file that says false gets the 39-byte binary identity: 77 bytes less here."""
    from lcodec.format import modelfile
    m = random_tessel(structure=STRUCT)
    short = str(tmp_path / "short.lcmodel")
    modelfile.dump(short, {"name": "tessel", "params": m.params}, m.arrays, archives_name_file=False)
    data = _pgm(_sample("camera", 20, 20))
    named, bare = lcodec.pack(data, model=model_file), lcodec.pack(data, model=short)
    assert C.read_container(named).identity["file"] == "rand.lcmodel"
    assert C.read_container(bare).identity == {"model": "tessel", "sha256": load_model(short).sha256}
    json_form = len('{"file":"rand.lcmodel","model":"tessel","sha256":""}') + 64  # 116 bytes
    assert len(named) - len(bare) == json_form - (1 + 32 + len("tessel")) == 77
    assert lcodec.unpack(bare, model=short) == data
    with pytest.raises(ModelError, match="wrong model"):
        lcodec.unpack(bare, model=model_file)


def test_augmented_copies_and_budget():
    """`augmented`: the copies are exactly numpy's mirror, flip and transpose of each training
    image, in that order, and never take the training samples past the budget."""
    from lcodec.training.train import augmented
    a = np.arange(2 * 3 * 1, dtype=np.uint8).reshape(2, 3, 1)
    b = (np.arange(4 * 5 * 3) % 251).astype(np.uint8).reshape(4, 5, 3)
    got = augmented([a, b])
    want = [np.fliplr(a), np.fliplr(b), np.flipud(a), np.flipud(b), np.transpose(a, (1, 0, 2)),
            np.transpose(b, (1, 0, 2))]
    assert len(got) == len(want) and all(np.array_equal(g, w) and g.flags.c_contiguous for g, w in zip(got, want))
    # budget 100 samples: originals 66, then a's mirror (6) fits and b's (60) does not; a's flip fits ...
    small = augmented([a, b], budget=100)
    assert [g.shape for g in small] == [(2, 3, 1), (2, 3, 1), (3, 2, 1)]
    assert sum(v.size for v in [a, b] + small) <= 100
    assert augmented([a, b], budget=66) == [] and augmented([b], budget=10) == []


@pytest.mark.parametrize("flag", [None, "--no-law"])
def test_train_image_cli_16bit_law_stage(flag, tmp_path):
    """16-bit training images: the model carries the law stage unless --no-law; a 16-bit
    NPY packed with it round-trips and numpy reads the samples back."""
    pytest.importorskip("torch")
    d = tmp_path / "scans"
    d.mkdir()
    for n in ("camera", "coins"):
        a = _sample(n, 40, 48).astype(np.uint16) * 37 + 900
        buf = io.BytesIO()
        np.save(buf, a)
        (d / f"{n}.npy").write_bytes(buf.getvalue())
    out = tmp_path / "m.lcmodel"
    cmd = [sys.executable, "-m", "lcodec", "train", "--kind", "image", str(d), "-o", str(out), "--time-limit", "3",
           "--preset", "tiny"] + ([flag, "--no-augment"] if flag else [])
    r = subprocess.run(cmd, capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=os.getcwd()))
    assert r.returncode == 0, r.stderr
    params = load_model(str(out)).inner.params
    assert params.get("law") == (None if flag else {"limit": 255, "cap": 12, "high_byte": 0})
    # the high byte's light network, without adaptive stages (train.HIGH_HIDDEN)
    assert params["roles"]["r16h"]["hidden"] == 16 and "hidden" not in params["roles"]["r16l"]
    assert set(params["adapt"]) == set(params["structure"]["k"]) == {"r16l"}
    assert load_model(str(out)).inner.arrays["r16h.w2"].shape == (16, 256)
    from lcodec.format import modelfile
    trained = modelfile.load(str(out))[0]["training"]["sets"]["16-bit"]  # one training image, one validation image
    assert (trained["augmented_copies"], trained["train_samples"]) == ((0, 40 * 48) if flag else (3, 4 * 40 * 48))
    assert ("mirrored, flipped or transposed" in r.stderr) == (flag is None)
    a = _sample("page", 30, 30).astype(np.uint16) * 41
    buf = io.BytesIO()
    np.save(buf, a)
    blob = lcodec.pack(buf.getvalue(), model=str(out))
    # a 3 s training may leave a model under which this image does not shrink: its frame is
    # then stored, so the model's own coding of it is checked on the frame itself
    assert lcodec.info(blob)["frames"][0]["method"] in ("modelled/image", "stored")
    assert np.array_equal(np.load(io.BytesIO(lcodec.unpack(blob, model=str(out)))), a)
    from lcodec.inputs.layout import Layout
    m = load_model(str(out))
    lay = Layout(0, 30, 30, 1, 2)
    raw = a.astype("<u2").tobytes()
    payload, _, _ = encode_image_frame(m, raw, lay)
    assert decode_image_frame(m, payload, len(raw)) == raw


def test_bench_kind_image_cli(model_file, tmp_path):
    """bench --kind image: every codec round-trip checked, sizes equal a direct call of the
    library (imagecodecs' JPEG XL here), JSON written."""
    import json
    import imagecodecs
    d = tmp_path / "test"
    d.mkdir()
    (d / "a.pgm").write_bytes(_pgm(_sample("camera", 32, 40)))
    (d / "b.dcm").write_bytes(open(_dicom("MR_small.dcm"), "rb").read())
    j = tmp_path / "rows.json"
    r = subprocess.run([sys.executable, "-m", "lcodec", "bench", "--kind", "image", str(d), "-m", model_file,
                        "--json", str(j)], capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=os.getcwd()))
    assert r.returncode == 0, r.stderr
    assert "jpegxl" in r.stdout and "total" in r.stdout
    rows = {x["file"]: x for x in json.loads(j.read_text())["rows"]}
    assert rows["a.pgm"]["codecs"]["jpegxl"] == len(imagecodecs.jpegxl_encode(_sample("camera", 32, 40), lossless=True, effort=9))
    assert rows["b.dcm"]["codecs"]["webp"] is None and rows["b.dcm"]["bits"] == 16
    # the file's other bytes (for the whole-file comparison): everything but the pixel data
    # element's value, as pydicom reads it; xz -9e of them, never more than their raw size
    import lzma
    import pydicom
    raw = open(_dicom("MR_small.dcm"), "rb").read()
    pv = pydicom.dcmread(_dicom("MR_small.dcm")).PixelData
    i = raw.rfind(pv)
    side = raw[:i] + raw[i + len(pv):]
    assert rows["b.dcm"]["side_bytes"] == len(side)
    assert rows["b.dcm"]["side_xz_bytes"] == len(lzma.compress(side, preset=9 | lzma.PRESET_EXTREME))
    assert 0 < rows["a.pgm"]["side_xz_bytes"] == rows["a.pgm"]["side_bytes"] < 64  # a PGM header: raw is smaller
    tot = json.loads(j.read_text())["totals"]
    n = sum(x["subpixels"] for x in rows.values())
    side_bits = 8 * sum(x["side_xz_bytes"] for x in rows.values()) / n
    assert abs(tot["jpeg2000+xz_side"] - tot["jpeg2000"] - side_bits) < 1e-9
    r = subprocess.run([sys.executable, "-m", "lcodec", "bench", "--kind", "image", str(d)], capture_output=True,
                       text=True, env=dict(os.environ, PYTHONPATH=os.getcwd()))
    assert r.returncode == 2 and "pixel model" in r.stderr


GOLDEN_IMAGES = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-v1-") and f.endswith(".lcodec"))


@pytest.mark.parametrize("name", GOLDEN_IMAGES)
def test_golden_image_containers_decode_exactly(name):
    model = os.path.join(GOLDEN, "tessel-tiny.lcmodel")
    blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
    d = api.decode(blob, model=model)
    assert b"".join(d.frames) == analyse(orig).content  # the content: the file's bytes or its pixel record
    if lcodec.info(blob)["guarantee"] == "byte-exact":
        assert lcodec.unpack(blob, model=model) == orig
    # and today's encoder still writes the same bytes (version 3: the golden's twin)
    assert lcodec.pack(orig, model=model) == v3_twin(name)


def test_golden_image_containers_exist():
    assert {"tessel-v1-pgm", "tessel-v1-png", "tessel-v1-dicom16"} <= set(GOLDEN_IMAGES)
    assert {"tessel-s1-moon2x", "tessel-s1-mosaic", "tessel-s1-dicom16"} <= set(GOLDEN_STRUCTURE)


GOLDEN_STRUCTURE = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-s1-") and f.endswith(".lcodec"))


def _golden_image_round_trip(model, name, today=None):
    """A golden image container: one modelled image frame, decoded in 1 and 2 threads to the
    original bytes, which today's encoder turns into the same container (its twin in
    tests/golden/v3 when it was made before container version 3; itself when it was made in
    version 3; or the golden container `today`, where the format has grown since)."""
    blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
    assert lcodec.info(blob)["frames"][0]["method"] == "modelled/image"
    assert lcodec.unpack(blob, model=model) == orig
    assert b"".join(api.decode(blob, model=model, workers=2).frames) == orig
    if today is not None:
        want = v3_twin(today)
    else:
        want = blob if C.read_container(blob).version == C.VERSION_BOUND else v3_twin(name)
    assert lcodec.pack(orig, model=model) == want
    return blob, orig


GOLDEN_LIGHT = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-h1-") and f.endswith(".lcodec"))


def test_golden_light_high_byte_vectors_exist():
    assert GOLDEN_LIGHT == ["tessel-h1-dicom16", "tessel-h1-npy16"]


@pytest.mark.parametrize("name", GOLDEN_LIGHT)
def test_golden_light_high_byte_containers_decode_exactly(name):
    """The model file with a light 16-bit high byte (tessel-tiny-light.lcmodel, as `train`
    writes 16-bit models since 2026-12-05: 8 hidden units, no adaptive counts, law
    high_byte 0; named by its SHA-256 alone): its containers decode to the original bytes
    with 1 and 2 threads, today's encoder writes the same bytes, and the archives' identity
    is the binary form."""
    model = os.path.join(GOLDEN, "tessel-tiny-light.lcmodel")
    inner = load_model(model).inner
    assert inner.role_params["r16h"]["hidden"] == 8 and inner.role_params["r16l"]["hidden"] == 16
    assert inner.law_high == 0 and "r16h" not in inner.adapt and "r16h" not in inner.k2
    blob, orig = _golden_image_round_trip(model, name)
    assert C.read_container(blob).version == C.VERSION_BOUND  # made today: its own twin
    assert set(C.read_container(blob).identity) == {"model", "sha256"}
    if name.endswith("dicom16"):  # reference reader: pydicom
        assert np.array_equal(pydicom.dcmread(io.BytesIO(orig)).pixel_array,
                              pydicom.dcmread(_dicom("CT_small.dcm")).pixel_array)
    else:  # reference reader: numpy
        want = (skdata.coins()[150:190, 200:236].astype(np.int32) * 43 + 2000
                + np.random.default_rng(7).integers(-60, 60, (40, 36)))
        assert np.array_equal(np.load(io.BytesIO(orig)), want.astype("<u2"))


GOLDEN_NETS_ONLY = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-n1-") and f.endswith(".lcodec"))


def test_golden_nets_only_vectors_exist():
    assert GOLDEN_NETS_ONLY == ["tessel-n1-npy16", "tessel-n1-pgm"]


@pytest.mark.parametrize("name", GOLDEN_NETS_ONLY)
def test_golden_nets_only_containers_decode_exactly(name):
    """Images coded with the networks alone (flag FLAG_NETS_ONLY; tessel-tiny-netsonly.lcmodel
    has stages_min_gain 10000, so the encoder always drops the stages): they decode to the
    original bytes with 1 and 2 threads, and today's encoder writes the same bytes."""
    model = os.path.join(GOLDEN, "tessel-tiny-netsonly.lcmodel")
    assert load_model(model).inner.stages_min_gain == 10000
    blob, orig = _golden_image_round_trip(model, name)
    assert C.read_container(blob).version == C.VERSION_BOUND  # made today: its own twin
    assert lcodec.info(blob)["frames"][0]["image"]["networks_only"] is True
    if name.endswith("pgm"):  # reference reader: Pillow
        assert np.array_equal(np.asarray(PIL.open(io.BytesIO(orig))), skdata.camera()[140:168, 200:236])
    else:  # reference reader: numpy
        assert np.array_equal(np.load(io.BytesIO(orig)), skdata.moon()[300:330, 40:72].astype(np.uint16) * 71 + 300)


def test_light_high_byte_params_refused():
    """A role's own hidden width and the law's high_byte flag are checked like the rest."""
    m = random_tessel(law=LAW, light_high=5)
    for edit in (lambda p: p["roles"]["r16h"].update(hidden=6),  # does not match the arrays
                 lambda p: p["roles"]["r16h"].update(hidden=0),
                 lambda p: p["roles"]["r16h"].update(hidden=2000),
                 lambda p: p["roles"]["r16h"].update(width=5),
                 lambda p: p["law"].update(high_byte=2),
                 lambda p: p["law"].update(high_byte=True),
                 lambda p: p["law"].update(low_byte=0)):
        params = json.loads(json.dumps(m.params))
        edit(params)
        with pytest.raises(ValueError):
            Tessel(params, m.arrays)


GOLDEN_LAW = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-l1-") and f.endswith(".lcodec"))


def test_golden_law_vectors_exist():
    assert GOLDEN_LAW == ["tessel-l1-dicom16", "tessel-l1-signed16"]


@pytest.mark.parametrize("name", GOLDEN_LAW)
def test_golden_law_containers_decode_exactly(name):
    """The model file with the law stage (tessel-tiny-law.lcmodel): its 16-bit containers
    decode to the original bytes (samples as pydicom / numpy read them), as modelled image
    frames, with 1 and 2 decoding threads, and today's encoder writes the same bytes; the
    law stage makes MR_small's archive smaller than the structure model's golden one."""
    model = os.path.join(GOLDEN, "tessel-tiny-law.lcmodel")
    assert load_model(model).inner.params["law"] == {"limit": 255, "cap": 12}
    blob, orig = _golden_image_round_trip(model, name)
    if name.endswith("dicom16"):  # reference reader: pydicom
        assert np.array_equal(pydicom.dcmread(io.BytesIO(orig)).pixel_array,
                              pydicom.dcmread(_dicom("MR_small.dcm")).pixel_array)
        assert len(blob) < 0.9 * os.path.getsize(os.path.join(GOLDEN, "tessel-s1-dicom16.lcodec"))
    else:  # reference reader: numpy
        want = skdata.camera()[300:340, 120:168].astype(np.int32) * -97 + np.random.default_rng(5).integers(-300, 300, (40, 48))
        assert np.array_equal(np.load(io.BytesIO(orig)), want.astype("<i2"))


@pytest.mark.parametrize("name", GOLDEN_STRUCTURE)
def test_golden_structure_containers_decode_exactly(name):
    """The model file with the structure stage (tessel-tiny-structure.lcmodel: the tiny
    networks plus activity and structure counts): its containers decode to the original
    bytes (pixels as pydicom / Pillow read them), as modelled image frames, and today's
    encoder writes the same bytes, with 1 and 2 decoding threads."""
    model = os.path.join(GOLDEN, "tessel-tiny-structure.lcmodel")
    assert load_model(model).inner.params["structure"]["blend"] == 1
    # moon2x is exactly 2x2-replicated: made before replication was detected, today's encoder
    # writes the payload-version-2 container tessel-r2-moon2x instead (same original bytes)
    blob, orig = _golden_image_round_trip(model, name, "tessel-r2-moon2x" if name.endswith("moon2x") else None)
    if name.endswith("dicom16"):  # reference reader: pydicom
        assert np.array_equal(pydicom.dcmread(io.BytesIO(orig)).pixel_array,
                              pydicom.dcmread(_dicom("MR_small.dcm")).pixel_array)
    else:  # reference reader: Pillow
        want = skdata.moon()[200:240, 100:148] if name.endswith("moon2x") else None
        got = np.asarray(PIL.open(io.BytesIO(orig)))
        if want is not None:
            assert np.array_equal(got, want)


# -- exact block replication (payload version 2) -----------------------------------------------
GOLDEN_REPLICATED = sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("tessel-r2-") and f.endswith(".lcodec"))


def test_golden_replicated_vectors_exist():
    assert GOLDEN_REPLICATED == ["tessel-r2-moon2x", "tessel-r2-rgb3x2"]


@pytest.mark.parametrize("name", GOLDEN_REPLICATED)
def test_golden_replicated_containers_decode_exactly(name):
    """Containers of block-replicated images (tessel-tiny-structure.lcmodel): payload version
    2 with the factors, decoded (1 and 2 threads) to the original bytes, whose pixels Pillow
    reads as the scikit-image crop repeated by numpy; today's encoder writes the same bytes;
    moon's archive is at least 15% smaller than its version-1 container (tessel-s1-moon2x)."""
    model = os.path.join(GOLDEN, "tessel-tiny-structure.lcmodel")
    blob, orig = _golden_image_round_trip(model, name)
    frame = lcodec.info(blob)["frames"][0]["image"]
    got = np.asarray(PIL.open(io.BytesIO(orig)))  # reference reader: Pillow
    if name.endswith("moon2x"):
        assert frame["replicated"] == [2, 2]
        assert np.array_equal(got, skdata.moon()[200:240, 100:148])
        assert len(blob) < 0.85 * os.path.getsize(os.path.join(GOLDEN, "tessel-s1-moon2x.lcodec"))  # 475 vs 585
    else:
        assert frame["replicated"] == [3, 2] and frame["channels"] == 3
        assert np.array_equal(got, np.repeat(np.repeat(skdata.coffee()[150:162, 250:270], 3, 0), 2, 1))
    from lcodec.format.container import read_container
    (fr,) = read_container(blob).frames
    assert fr.payload[0] == 2  # REPLICATED_VERSION


def test_replication_factors():
    """`replication`: the largest exact factors per axis (up to 16, dividing the size), checked
    against numpy's repeat; one changed sample, or a size the factor does not divide, is none."""
    from lcodec.inputs.layout import replication
    rng = np.random.default_rng(5)
    for fr, fc, ch in [(2, 2, 1), (3, 2, 3), (1, 4, 1), (5, 1, 2), (16, 16, 1), (7, 3, 4)]:
        base = rng.integers(0, 256, (4, 5, ch)).astype(np.uint8)
        v = np.repeat(np.repeat(base, fr, 0), fc, 1)
        assert replication(v) == (fr, fc), (fr, fc)
        if fr * fc > 1:
            w = v.copy()
            w[-1, -1, -1] ^= 1  # the last block no longer constant
            assert replication(w) in {(1, fc), (fr, 1), (1, 1)} and replication(w) != (fr, fc)
    assert replication(np.zeros((6, 9, 1), np.uint8)) == (6, 9)  # constant: the largest dividing factors
    assert replication(np.zeros((17, 1, 3), np.uint16)) == (1, 1)  # 17 is prime and above 16
    assert replication(np.zeros((1, 1, 1), np.uint8)) == (1, 1)
    a = np.repeat(rng.integers(0, 65536, (3, 3, 1)).astype(np.uint16), 2, 0)[:5]  # 5 rows: 2 does not divide
    assert replication(a) == (1, 1)


@pytest.mark.parametrize("kind", ["grey8", "rgb8", "npy16", "signed16"])
def test_replicated_images_round_trip(kind, model_file):
    """Block-replicated images of every depth: the archive says which factors it found,
    codes fewer bits than the same image with one sample changed, and unpacks byte for
    byte (pixels read back by Pillow or numpy equal the originals)."""
    rng = np.random.default_rng(11)
    if kind == "grey8":
        a = np.repeat(np.repeat(_sample("camera", 20, 24), 2, 0), 3, 1)
    elif kind == "rgb8":
        a = np.repeat(_sample("astronaut", 16, 18), 4, 0)
    else:
        a = np.repeat(np.repeat((_sample("coins", 12, 16).astype(np.int32) * 200 - 20000), 2, 0), 2, 1)
        a = a.astype(np.int16) if kind == "signed16" else (a + 30000).astype(np.uint16)
    w = a.copy()
    w[(rng.integers(0, a.shape[0]), rng.integers(0, a.shape[1])) + ((0,) if a.ndim == 3 else ())] ^= 1

    def data_of(x):
        if x.dtype == np.uint8:
            return _pgm(x)
        buf = io.BytesIO()
        np.save(buf, x)
        return buf.getvalue()

    blob, inf, out = _roundtrip(data_of(a), model_file)
    assert out == data_of(a)
    got = np.asarray(PIL.open(io.BytesIO(out))) if a.dtype == np.uint8 else np.load(io.BytesIO(out))
    assert np.array_equal(got, a)  # reference readers: Pillow, numpy
    want = {"grey8": [2, 3], "rgb8": [4, 1], "npy16": [2, 2], "signed16": [2, 2]}[kind]
    assert inf["frames"][0]["image"]["replicated"] == want
    blob_w, inf_w, out_w = _roundtrip(data_of(w), model_file)
    assert out_w == data_of(w) and "replicated" not in inf_w["frames"][0]["image"]
    assert len(blob) < len(blob_w)


@pytest.mark.parametrize("factors, why", [((1, 1), "1 x 1"), ((0, 2), "impossible"), ((17, 1), "impossible"),
                                          ((3, 1), "impossible")])
def test_replicated_descriptor_refused(factors, why):
    """A version-2 descriptor with factors that are 1 x 1, zero, above 16 or do not divide the
    size: the frame is reported damaged, never decoded."""
    from lcodec.format.container import uvarint
    from lcodec.errors import DataError
    from lcodec.inputs.layout import read_descriptor
    head = bytes([2]) + b"".join(uvarint(x) for x in (0, 4, 6, 1, 1, 0) + factors)
    with pytest.raises(DataError, match="image frame damaged.*" + why):
        read_descriptor(head + bytes(8), 24)
    ok = bytes([2]) + b"".join(uvarint(x) for x in (0, 4, 6, 1, 1, 0, 2, 3))
    lay, pos = read_descriptor(ok + bytes(8), 24)
    assert (lay.rep_rows, lay.rep_cols, pos) == (2, 3, len(ok))
    with pytest.raises(DataError, match="unknown image payload version"):  # 3 is banded (test_image_bands.py)
        read_descriptor(bytes([4]) + ok[1:] + bytes(8), 24)


# -- pixel models on the one pipeline: every runner, streaming, --resume, --per-file ------------
def _lc(*args):
    return subprocess.run([sys.executable, "-m", "lcodec", *map(str, args)], capture_output=True, timeout=300)


def test_cli_pack_unpack_verify_with_threads(model_file, tmp_path):
    """The CLI's streaming pack (pack_to) with a pixel model: the PNG is a pixel record,
    rebuilt on unpack (read back with Pillow), with 1 and 2 threads."""
    d = _folder(tmp_path)
    arch = tmp_path / "plates.lcodec"
    r = _lc("pack", d, "-o", arch, "-m", model_file)
    assert r.returncode == 0, r.stderr
    assert b"images as pixels" in r.stderr
    assert arch.read_bytes() == api.pack_paths([str(d)], model=model_file)[0]
    for threads in ("1", "2"):
        out = tmp_path / f"out{threads}"
        r = _lc("unpack", arch, "-o", out, "-m", model_file, "--threads", threads)
        assert r.returncode == 0, r.stderr
        for n in ("a.pgm", "c.dcm", "notes.txt"):
            assert (out / "plates" / n).read_bytes() == (d / n).read_bytes()
        assert np.array_equal(np.asarray(PIL.open(out / "plates" / "b.png")), _sample("coins"))
        r = _lc("verify", arch, "-m", model_file, "--against", d, "--threads", threads)
        assert r.returncode == 0, r.stderr
        assert b"pixel-exact image" in r.stdout and b"byte-exact image" in r.stdout
    r = _lc("info", arch)
    assert r.returncode == 0 and b"pixel-exact" in r.stdout
    one = tmp_path / "coins.png"
    one.write_bytes(_png(_sample("coins")))
    r = _lc("pack", one, "-o", tmp_path / "coins.lcodec", "-m", model_file)
    assert r.returncode == 0, r.stderr
    r = _lc("unpack", tmp_path / "coins.lcodec", "-o", tmp_path / "back.png", "-m", model_file)
    assert r.returncode == 0, r.stderr
    assert np.array_equal(np.asarray(PIL.open(tmp_path / "back.png")), _sample("coins"))


def _plates(tmp_path, n=6):
    """A folder of several images of two formats (scikit-image's bundled samples as the
    pixels; Pillow writes the PNGs) and a text file."""
    d = _folder(tmp_path)
    for i, name in enumerate(("page", "text", "moon", "camera", "coins", "page")[:n]):
        a = _sample(name, 20 + 4 * i, 26 + 2 * i)
        (d / f"extra-{i}.{'png' if i % 2 else 'pgm'}").write_bytes(_png(a) if i % 2 else _pgm(a))
    return d


def _same_images(out, d):
    """Restored files against the originals: byte-exact ones byte for byte, PNGs (pixel-exact)
    by their pixels as Pillow reads them."""
    for f in sorted(d.iterdir()):
        back = out / f.name
        if f.suffix == ".png":
            assert np.array_equal(np.asarray(PIL.open(back)), np.asarray(PIL.open(f))), f.name
        else:
            assert back.read_bytes() == f.read_bytes(), f.name


def test_pixel_model_gives_the_same_archive_on_every_runner(model_file, tmp_path):
    """Image frames go through the one pipeline: --jobs 2 (worker processes) makes the
    --jobs 1 archive byte for byte, streaming to a file or in memory, and decodes (unpack,
    verify against the originals, decode_stream) in worker processes to the same files."""
    d = _plates(tmp_path)
    one, stats = api.pack_paths([str(d)], model=model_file)
    assert len(stats.images) == 9 and {f["method"] for f in lcodec.info(one)["frames"]} >= {"modelled/image"}
    two, stats2 = api.pack_paths([str(d)], model=model_file, jobs=2)
    assert two == one and stats2.images == stats.images
    api.pack_to([str(d)], str(tmp_path / "j2.lcodec"), model=model_file, jobs=2)
    assert (tmp_path / "j2.lcodec").read_bytes() == one
    out = tmp_path / "out"
    api.unpack_to_dir(one, str(out), model=model_file, jobs=2)
    _same_images(out / "plates", d)
    rep = api.verify(one, model=model_file, against=str(d), jobs=2)
    assert rep.ok, rep.problems
    assert rep.guarantees == {"pixel-exact image": 4, "byte-exact image": 5}
    rep = api.verify(one, model=model_file, against=str(d))  # one process: the same report
    assert rep.ok and rep.guarantees == {"pixel-exact image": 4, "byte-exact image": 5}
    # one image alone: a single-file archive, the PNG rebuilt from its pixel record
    png = d / "b.png"
    blob = api.pack(png.read_bytes(), model=model_file, jobs=2)
    assert blob == api.pack(png.read_bytes(), model=model_file)
    back = tmp_path / "back.png"
    api.unpack_to_file(blob, str(back), model=model_file, jobs=2)
    assert np.array_equal(np.asarray(PIL.open(back)), _sample("coins"))
    assert api.unpack(blob, model=model_file, jobs=2) == back.read_bytes()

    class Files(api.Sink):
        def __init__(self):
            self.got = {}

        def data(self, mem, raw, n):
            self.got[mem.path] = self.got.get(mem.path, b"") + raw

    sink = Files()
    api.decode_stream(one, sink, model_file, jobs=2)
    assert sink.got["plates/a.pgm"] == (d / "a.pgm").read_bytes()
    assert np.array_equal(np.asarray(PIL.open(io.BytesIO(sink.got["plates/b.png"]))), _sample("coins"))


def test_pixel_model_on_the_command_line_with_jobs_and_per_file(model_file, tmp_path):
    d = _plates(tmp_path, n=2)
    arch = tmp_path / "plates.lcodec"
    r = _lc("pack", d, "-o", arch, "-m", model_file, "--jobs", "2")
    assert r.returncode == 0, r.stderr
    assert b"images as pixels" in r.stderr
    assert arch.read_bytes() == api.pack_paths([str(d)], model=model_file)[0]
    r = _lc("unpack", arch, "-o", tmp_path / "out", "-m", model_file, "--jobs", "2")
    assert r.returncode == 0, r.stderr
    _same_images(tmp_path / "out" / "plates", d)
    r = _lc("verify", arch, "-m", model_file, "--jobs", "2", "--against", d)
    assert r.returncode == 0 and b"pixel-exact image" in r.stdout, r.stderr
    r = _lc("pack", d, "-o", tmp_path / "each", "-m", model_file, "--per-file", "--jobs", "2")
    assert r.returncode == 0, r.stderr
    for f in d.iterdir():
        assert (tmp_path / "each" / "plates" / (f.name + ".lcodec")).read_bytes() == \
            api.pack(f.read_bytes(), model=model_file), f.name


def test_local_dask_cluster_gives_the_same_pixel_archive(model_file, tmp_path):
    distributed = pytest.importorskip("distributed")
    d = _plates(tmp_path, n=2)
    local, _ = api.pack_paths([str(d)], model=model_file)
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        addr = cluster.scheduler_address
        api.pack_to([str(d)], str(tmp_path / "c.lcodec"), model=model_file, cluster=addr)
        assert (tmp_path / "c.lcodec").read_bytes() == local
        rep = api.verify(local, model=model_file, against=str(d), cluster=addr)
        assert rep.ok and rep.guarantees.get("pixel-exact image") == 2, rep.problems


def test_per_file_job_with_a_pixel_model_writes_what_pack_writes_and_resumes(model_file, tmp_path):
    d = _plates(tmp_path, n=2)
    out = tmp_path / "each"
    man = api.pack_each([str(d)], str(out), model=model_file, jobs=2)
    assert man["packed"] == len(man["members"]) == 6 and man["kept"] == 0
    for e in man["members"]:
        orig = tmp_path / e["path"]
        arch = (out / e["archive"]).read_bytes()
        assert arch == api.pack(orig.read_bytes(), model=model_file)  # the same bytes as packing it alone
        # the manifest describes the original (hashlib), whatever the archive holds
        assert e["sha256"] == hashlib.sha256(orig.read_bytes()).hexdigest() and e["bytes"] == orig.stat().st_size
        back = tmp_path / "back" / e["path"]
        back.parent.mkdir(parents=True, exist_ok=True)
        api.unpack_to_file(arch, str(back), model=model_file)
    assert {e["guarantee"] for e in man["members"] if e["path"].endswith(".png")} == {"pixel-exact"}
    _same_images(tmp_path / "back" / "plates", d)
    # resume: every member is still good and kept; an edited image is coded again
    (d / "extra-0.pgm").write_bytes(_pgm(_sample("moon", 22, 22)))
    man2 = api.pack_each([str(d)], str(out), model=model_file, resume=True)
    status = {e["path"]: e["status"] for e in man2["members"]}
    assert status.pop("plates/extra-0.pgm") == "packed" and set(status.values()) == {"kept"}
    assert (out / "plates" / "extra-0.pgm.lcodec").read_bytes() == api.pack((d / "extra-0.pgm").read_bytes(),
                                                                              model=model_file)


def test_an_interrupted_pixel_job_resumes_with_the_same_bytes(model_file, tmp_path, monkeypatch):
    """--resume with a pixel model: a job stopped after some frames keeps its partial
    archive and journal; the rerun codes only the rest and writes the uninterrupted bytes.
    An image changed in between is refused."""
    from lcodec.archive import runners, write
    monkeypatch.setattr(runners, "BATCH_FRAMES", 1)  # a task (and a journal point) per frame
    monkeypatch.setattr(write, "JOURNAL_EVERY_S", 0.0)
    d = _plates(tmp_path)
    out = tmp_path / "plates.lcodec"
    journal = tmp_path / ".plates.lcodec.lcodec-journal"
    coded = []

    def stop_after_five(n):
        coded.append(n)
        if len(coded) == 5:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        api.pack_to([str(d)], str(out), model=model_file, resume=True, progress=stop_after_five)
    assert not out.exists() and journal.exists()
    import json
    done = json.loads(journal.read_text())["frames_done"]
    assert done == 4
    stats = api.pack_to([str(d)], str(out), model=model_file, resume=True)
    fresh, all_stats = api.pack_paths([str(d)], model=model_file)
    assert out.read_bytes() == fresh
    assert stats.kept_frames == done and stats.frames == all_stats.frames - done
    assert not journal.exists()
    # interrupted again, then an image that was already coded changes its pixels: refused
    out.unlink()
    coded.clear()
    with pytest.raises(KeyboardInterrupt):
        api.pack_to([str(d)], str(out), model=model_file, resume=True, progress=stop_after_five)
    a = _sample("camera").copy()
    a[3, 4] ^= 1
    st = os.stat(d / "a.pgm")
    (d / "a.pgm").write_bytes(_pgm(a))
    os.utime(d / "a.pgm", ns=(st.st_atime_ns, st.st_mtime_ns))  # same size and time: only the pixels differ
    from lcodec.errors import UsageError
    with pytest.raises(UsageError, match="changed since the interrupted run"):
        api.pack_to([str(d)], str(out), model=model_file, resume=True)


def test_threads_on_byte_archives(tmp_path):
    """--threads also decodes byte-model archives (threads of one process): same bytes;
    it does not combine with --jobs."""
    src = tmp_path / "log.txt"
    src.write_bytes(b"".join(b"bay %d: plate %d scanned, exposure %d ms\n" % (i % 7, i, 40 + i % 13)
                             for i in range(6000)))
    arch = tmp_path / "log.lcodec"
    assert _lc("pack", src, "-o", arch, "--frame-size", "20000").returncode == 0
    assert len(lcodec.info(arch.read_bytes())["frames"]) > 4
    r = _lc("unpack", arch, "-o", tmp_path / "back.txt", "--threads", "3")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "back.txt").read_bytes() == src.read_bytes()
    r = _lc("verify", arch, "--against", src, "--threads", "2")
    assert r.returncode == 0, r.stderr
    assert api.unpack(arch.read_bytes(), workers=2) == src.read_bytes()
    assert b"".join(api.decode(arch.read_bytes(), workers=2).frames) == src.read_bytes()
    r = _lc("unpack", arch, "-o", tmp_path / "x.txt", "--threads", "2", "--jobs", "2")
    assert r.returncode == 2 and b"not both" in r.stderr and not (tmp_path / "x.txt").exists()


def test_decoders_keep_blas_on_one_thread(model_file, tmp_path):
    """Decoding image frames (1 or 2 threads) puts BLAS on one thread and leaves it there,
    also when the caller had set 2 meanwhile: restoring it after each decode made OpenBLAS
    change its thread count back and forth, and the next threaded decode collapsed
    (docs/notes/model-tessel.md, "Decoding threads"). threadpoolctl reports the setting."""
    from threadpoolctl import threadpool_info, threadpool_limits
    d = tmp_path / "plates"
    d.mkdir()
    for i, n in enumerate(("camera", "coins", "page", "text")):
        (d / f"{n}.pgm").write_bytes(_pgm(_sample(n, 40 + 3 * i, 48)))
    blob, _ = api.pack_paths([str(d)], model=model_file)
    assert {f["method"] for f in lcodec.info(blob)["frames"]} == {"modelled/image"}

    def blas():
        return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]

    for workers in (1, 2, 1, 2):
        threadpool_limits(limits=2, user_api="blas")
        assert len(api.decode(blob, model=model_file, workers=workers).frames) >= 4
        assert blas() == [1] * len(blas()), (workers, threadpool_info())


def test_blas_guard_holds_across_interleaved_decoders():
    """The interleaving that broke per-call limits, as `--threads` runs it (the calling thread
    holds the guard, decoding threads ask for it too): decoder A enters, B enters, A leaves,
    B is still running (BLAS must stay on one thread), B leaves, the caller leaves: still one
    thread. threadpoolctl reports the setting."""
    import threading
    from threadpoolctl import threadpool_info, threadpool_limits
    from lcodec.models.tessel import one_blas_thread

    def blas():
        return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]

    seen = {}
    a_in, b_in, a_out = threading.Event(), threading.Event(), threading.Event()

    def dec_a():
        with one_blas_thread():
            a_in.set()
            b_in.wait(10)
        a_out.set()

    def dec_b():
        a_in.wait(10)
        with one_blas_thread():
            b_in.set()
            a_out.wait(10)
            seen["b_after_a_left"] = blas()

    threadpool_limits(limits=2, user_api="blas")
    n = len(blas())
    with one_blas_thread():
        assert blas() == [1] * n
        ts = [threading.Thread(target=dec_a), threading.Thread(target=dec_b)]
        for t in ts:
            t.start()
        for t in ts:
            t.join(20)
        assert seen == {"b_after_a_left": [1] * n}
    assert blas() == [1] * n


def test_a_pixel_job_killed_mid_run_resumes_with_the_same_bytes(model_file, tmp_path):
    """`lcodec pack --resume --jobs 2` with a pixel model, SIGKILLed (with its workers) once
    its journal records finished frames: the rerun codes only the rest and writes the
    bytes an uninterrupted run writes (as tests/test_scale.py does for byte models)."""
    import json
    import signal
    import time
    d = tmp_path / "plates"
    d.mkdir()
    for i in range(24):  # enough frames that the job is still running when the journal has some
        a = _sample(("camera", "moon", "page", "coins")[i % 4], 150 + i, 160)
        a = [a, a[::-1], a[:, ::-1], a[::-1, ::-1]][(i // 4) % 4]
        (d / f"plate-{i:02d}.pgm").write_bytes(_pgm(np.ascontiguousarray(a)))
    out = tmp_path / "plates.lcodec"
    journal = tmp_path / ".plates.lcodec.lcodec-journal"
    args = ["pack", d, "-o", out, "-m", model_file, "--resume", "--jobs", "2"]

    def frames_done():
        try:
            return json.loads(journal.read_text())["frames_done"]
        except (OSError, ValueError, KeyError):
            return 0

    p = subprocess.Popen([sys.executable, "-m", "lcodec", *map(str, args)], stdout=subprocess.DEVNULL,
                         stderr=subprocess.PIPE, start_new_session=True)
    killed, t0 = False, time.monotonic()
    while p.poll() is None and time.monotonic() - t0 < 300:
        if frames_done() >= 2:
            os.killpg(p.pid, signal.SIGKILL)  # the job and its worker processes
            killed = True
            break
        time.sleep(0.02)
    p.wait()
    assert killed, "the job ended before it could be interrupted"
    assert not out.exists() and (tmp_path / ".plates.lcodec.lcodec-partial").exists()
    done = frames_done()
    r = _lc(*args)
    assert r.returncode == 0, r.stderr
    fresh, stats = api.pack_paths([str(d)], model=model_file)
    assert out.read_bytes() == fresh
    assert f"({done} more kept from the interrupted run)".encode() in r.stderr, r.stderr
    assert not journal.exists()
