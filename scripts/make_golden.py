#!/usr/bin/env python3
"""Write the golden containers in tests/golden/ (every format version). Run only when adding a vector:
existing vectors are never regenerated (see the format-change rules in DEVELOPERS.md)."""
import os
import random
import sys

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
import lcodec  # noqa: E402

HERE = os.path.join(os.path.dirname(__file__), "..", "tests", "golden")


def sample_text(seed: int, n: int) -> bytes:
    """Log-like lines from a fixed generator (invented stations of the demo scenario)."""
    rng = random.Random(seed)
    stations = ["kestrel-ridge", "mount-orrin", "vale-of-tess", "harrow-peak"]
    kinds = ["wind", "pressure", "tremor", "battery", "link"]
    out, t = [], 1_700_000_000
    while sum(map(len, out)) < n:
        t += rng.randint(1, 90)
        out.append(f"{t} {rng.choice(stations)} {rng.choice(kinds)}={rng.gauss(50, 12):.2f} "
                   f"q={rng.randint(0, 3)}\n")
    return "".join(out).encode()[:n]


def write_vector(name: str, data: bytes, **pack_args) -> None:
    """Write tests/golden/NAME.orig and NAME.lcodec, unless the container exists already."""
    arc, orig = os.path.join(HERE, name + ".lcodec"), os.path.join(HERE, name + ".orig")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    with open(orig, "wb") as f:
        f.write(data)
    with open(arc, "wb") as f:
        f.write(lcodec.pack(data, **pack_args))
    print(f"wrote {arc}")


def golden_learned(kind: str, preset: str, n_files: int, file_bytes: int, seed0: int, data_seed: int,
                   time_limit: float, container: str, model_name: str | None = None):
    """A tiny model of `kind`, trained on generated log lines, and a container made with it."""
    from lcodec.training import train as T

    mpath = os.path.join(HERE, model_name or f"{kind}-tiny.lcmodel")
    arc = os.path.join(HERE, container + ".lcodec")
    if os.path.exists(arc):  # (the model is trained only for a new vector)
        print(f"keep {arc}")
        return
    import tempfile
    with tempfile.TemporaryDirectory() as d:
        for i in range(n_files):
            with open(os.path.join(d, f"log{i}.txt"), "wb") as f:
                f.write(sample_text(seed0 + i, file_bytes))
        T.train([d], mpath, time_limit=time_limit, preset=preset, seed=0, echo=print)
    write_vector(container, sample_text(data_seed, 12_000), model=mpath, frame_size=4096)


def golden_weft():
    """The weft (neural) model and container (needs torch)."""
    golden_learned("weft", "tiny", 8, 30_000, 100, 9, 20, "weft-v1-text")
    # with hashed contexts: named by its SHA-256 alone, so a version-2 container
    golden_learned("weft", "tiny-hashed", 8, 30_000, 300, 29, 15, "weft-v2-hashed", "weft-hashed-tiny.lcmodel")


def golden_braid():
    """The braid model (corpus tables) and a version-2 container."""
    golden_learned("braid", "braid-lean", 10, 6_000, 200, 19, 5, "braid-v2-text")


def golden_braid_mixed():
    """A braid model of the current default preset (escape weights with a fitted starting
    table, lanes with their own tables) and a version-2 container whose first frame has
    two lanes."""
    mpath = os.path.join(HERE, "braid-mixed-tiny.lcmodel")
    arc = os.path.join(HERE, "braid-v2-mixed.lcodec")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    train_on(mpath, [sample_text(500 + i, 5_000) for i in range(8)], memory=0)  # (made before the memory)
    write_vector("braid-v2-mixed", sample_text(59, 150_000), model=mpath, frame_size=140_000)


def train_on(mpath: str, texts: list, **options) -> None:
    """Train the default braid preset for 5 s on `texts`, each a file of its own."""
    import tempfile

    from lcodec.training import train as T

    with tempfile.TemporaryDirectory() as d:
        for i, text in enumerate(texts):
            with open(os.path.join(d, f"log{i}.txt"), "wb") as f:
                f.write(text)
        T.train([d], mpath, time_limit=5, preset="braid", seed=0, echo=print, **options)


def golden_braid_fork(name: str = "fork", fork: dict | None = None, seed: int = 61):
    """The braid-tree preset (braid plus the tree refinement): braid-mixed-tiny.lcmodel's tables and
    parameters with the refinement's parameters added, and a version-2 container of text
    with indented lines (so the column context is exercised) whose first frame has two
    lanes. `fork`: the refinement as first released (braid-fork-tiny, braid-v2-fork) unless
    given (braid-fork2-tiny, braid-v2-fork2: the preset with its later parts)."""
    from lcodec.format import modelfile
    from lcodec.training.braid_train import TREE_V1

    mpath = os.path.join(HERE, f"braid-{name}-tiny.lcmodel")
    arc = os.path.join(HERE, f"braid-v2-{name}.lcodec")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    meta, arrays, _ = modelfile.load(os.path.join(HERE, "braid-mixed-tiny.lcmodel"))
    params = {**meta["architecture"]["params"], **(fork or TREE_V1)}
    modelfile.dump(mpath, {"name": "braid", "params": params}, arrays)
    text = sample_text(seed, 150_000).decode("latin-1").splitlines()
    data = "\n".join(("    " * (i % 4)) + line for i, line in enumerate(text)).encode("latin-1")[:150_000]
    write_vector(f"braid-v2-{name}", data, model=mpath, frame_size=140_000)


def golden_braid_fork2():
    from lcodec.training.braid_train import PRESETS

    golden_braid_fork("fork2", PRESETS["braid-tree"]["fork"], seed=62)


# Lines that recur from day to day in the stations' logs: what a corpus memory is for.
RECURRING = [
    "kestrel-ridge relay 4: link budget recomputed after antenna re-point, margin nominal\n",
    "mount-orrin housekeeping: battery heater cycle complete, enclosure humidity within limits\n",
    "vale-of-tess gateway: nightly checksum sweep of the sample archive finished without findings\n",
    "harrow-peak seismometer: self-test passed (mass centring, calibration coil, digitiser clock)\n",
    "all stations: time sync against the valley reference within 2 ms, next sync in 6 h\n",
]


def recurring_text(seed: int, n: int) -> bytes:
    """sample_text's lines with, now and then, one of the RECURRING lines between them."""
    rng = random.Random(seed + 7)
    out = []
    for line in sample_text(seed, n).decode().splitlines(keepends=True):
        out.append(line)
        if rng.random() < 0.15:
            out.append(rng.choice(RECURRING))
    return "".join(out).encode()[:n]


def golden_braid_memory():
    """A braid model of the default preset with its corpus memory (the training text
    itself, lcodec/models/recall.py), trained on log lines of which some recur, and a
    version-2 container (first frame in two lanes) of new lines of the same kind."""
    from lcodec.format import modelfile

    mpath = os.path.join(HERE, "braid-memory-tiny.lcmodel")
    arc = os.path.join(HERE, "braid-v2-memory.lcodec")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    train_on(mpath, [recurring_text(700 + i, 6_000) for i in range(8)])
    if "memory" not in modelfile.load(mpath)[1]:
        raise SystemExit("the memory golden's training did not keep the memory: change its data")
    write_vector("braid-v2-memory", recurring_text(79, 150_000), model=mpath, frame_size=140_000)


def golden_braid_memtree():
    """The braid-tree preset with a corpus memory: braid-memory-tiny.lcmodel plus the tree
    refinement's parameters (the repeat byte the refinement is told of may then come from
    the memory), and a version-2 container of indented lines."""
    from lcodec.format import modelfile
    from lcodec.training.braid_train import PRESETS

    mpath = os.path.join(HERE, "braid-memtree-tiny.lcmodel")
    arc = os.path.join(HERE, "braid-v2-memtree.lcodec")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    meta, arrays, _ = modelfile.load(os.path.join(HERE, "braid-memory-tiny.lcmodel"))
    params = {**meta["architecture"]["params"], **PRESETS["braid-tree"]["fork"]}
    modelfile.dump(mpath, {"name": "braid", "params": params}, arrays)
    text = recurring_text(80, 150_000).decode("latin-1").splitlines()
    data = "\n".join(("    " * (i % 4)) + line for i, line in enumerate(text)).encode("latin-1")[:150_000]
    write_vector("braid-v2-memtree", data, model=mpath, frame_size=140_000)


def golden_braid_cut():
    """The default preset as it now trains, with the chain cut short (chain_cut 10):
    braid-memory-tiny.lcmodel plus the cut, and a version-2 container of new log lines."""
    from lcodec.format import modelfile
    from lcodec.training.braid_train import PRESETS

    mpath = os.path.join(HERE, "braid-cut-tiny.lcmodel")
    arc = os.path.join(HERE, "braid-v2-cut.lcodec")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    meta, arrays, _ = modelfile.load(os.path.join(HERE, "braid-memory-tiny.lcmodel"))
    params = {**meta["architecture"]["params"], "chain_cut": PRESETS["braid"]["chain_cut"]}
    modelfile.dump(mpath, {"name": "braid", "params": params}, arrays)
    write_vector("braid-v2-cut", recurring_text(81, 150_000), model=mpath, frame_size=140_000)


def golden_tessel():
    """A tiny trained pixel model (8- and 16-bit networks) and three image containers made
    with it: an 8-bit PGM (byte-exact), a PNG with a text chunk (pixel-exact) and pydicom's
    16-bit MR_small.dcm (byte-exact). Needs torch, scikit-image and pydicom."""
    import io
    import tempfile
    import warnings

    import numpy as np
    import skimage.data as skd
    from PIL import Image, PngImagePlugin
    from pydicom.data import get_testdata_file

    from lcodec.training import train as T

    mpath = os.path.join(HERE, "tessel-tiny.lcmodel")
    names = ["tessel-v1-pgm", "tessel-v1-png", "tessel-v1-dicom16"]
    if all(os.path.exists(os.path.join(HERE, n + ".lcodec")) for n in names):
        print("keep tessel-v1-*")
        return
    warnings.simplefilter("ignore")
    if not os.path.exists(mpath):
        with tempfile.TemporaryDirectory() as d:
            for n in ("brick", "grass", "clock", "text"):
                a = getattr(skd, n)()[:96, :96]
                with open(os.path.join(d, n + ".pgm"), "wb") as f:
                    f.write(b"P5\n96 96\n255\n" + a.tobytes())
            for n in ("moon", "camera"):
                a = getattr(skd, n)()[:96, :96].astype("<u2") * 4
                np.save(os.path.join(d, n + "16.npy"), a)
            T.train_image([d], mpath, time_limit=25, preset="tiny", seed=0, echo=print)
    cam = skd.camera()[100:132, 200:240]
    pgm = b"P5\n# bay-3 plate 1\n40 32\n255\n" + cam.tobytes()
    info = PngImagePlugin.PngInfo()
    info.add_text("Station", "kestrel-ridge scanner 2")
    buf = io.BytesIO()
    Image.fromarray(skd.coins()[50:80, 60:100]).save(buf, "PNG", pnginfo=info)
    dcm = open(get_testdata_file("MR_small.dcm"), "rb").read()
    for name, data in zip(names, (pgm, buf.getvalue(), dcm)):
        write_vector(name, data, model=mpath)


def golden_tessel_structure():
    """The tiny pixel model's networks with the per-image evidence of today's `train --kind
    image` (activity counts K 4096 blended with the network, structure counts k 32) as a
    second model file, and containers made with it: a 2x pixel-replicated crop of
    scikit-image's moon (PGM), a Bayer-like mosaic made from its astronaut (PGM) and
    pydicom's 16-bit MR_small.dcm."""
    import warnings

    import numpy as np
    import skimage.data as skd
    from pydicom.data import get_testdata_file

    mpath = os.path.join(HERE, "tessel-tiny-structure.lcmodel")
    names = ["tessel-s1-moon2x", "tessel-s1-mosaic", "tessel-s1-dicom16"]
    if all(os.path.exists(os.path.join(HERE, n + ".lcodec")) for n in names):
        print("keep tessel-s1-*")
        return
    warnings.simplefilter("ignore")
    def structure(params):
        roles = sorted(params["roles"])
        params["adapt"] = {r: 4096 for r in roles}
        params["structure"] = {"k": {r: 32 for r in roles}, "cap": 12, "decay": 0, "blend": 1}

    derive_tessel("tessel-tiny.lcmodel", mpath, structure)
    moon = skd.moon()[200:240, 100:148]
    rgb = skd.astronaut()[100:132, 200:240].astype(np.int32)
    r, c = np.meshgrid(np.arange(32), np.arange(40), indexing="ij")
    ch = np.where((r % 2 == 0) & (c % 2 == 0), 0, np.where((r % 2 == 1) & (c % 2 == 1), 2, 1))
    mosaic = np.take_along_axis(rgb, ch[:, :, None], 2)[:, :, 0].astype(np.uint8)
    datas = [b"P5\n# bay-3 plate 4, binned 2x2\n48 40\n255\n" + moon.tobytes(),
             b"P5\n# bay-3 colour sensor, raw mosaic\n40 32\n255\n" + mosaic.tobytes(),
             open(get_testdata_file("MR_small.dcm"), "rb").read()]
    for name, data in zip(names, datas):
        write_vector(name, data, model=mpath)


def golden_tessel_replicated():
    """Containers of exactly block-replicated images (payload version 2: one sample per
    block coded, the decoder repeats it), made with tessel-tiny-structure.lcmodel: the same
    2x2-replicated crop of scikit-image's moon as tessel-s1-moon2x (whose version-1
    container came from before replication was detected), and an RGB PPM of its coffee
    repeated over blocks of 3 rows x 2 columns."""
    import numpy as np
    import skimage.data as skd

    mpath = os.path.join(HERE, "tessel-tiny-structure.lcmodel")
    moon = skd.moon()[200:240, 100:148]
    rgb = np.repeat(np.repeat(skd.coffee()[150:162, 250:270], 3, axis=0), 2, axis=1)
    write_vector("tessel-r2-moon2x", b"P5\n# bay-3 plate 4, binned 2x2\n48 40\n255\n" + moon.tobytes(), model=mpath)
    write_vector("tessel-r2-rgb3x2", b"P6\n# bay-3 colour plate, zoomed 3x2\n40 36\n255\n" + rgb.tobytes(), model=mpath)


def derive_tessel(src: str, dst: str, edit, edit_arrays=None, **meta_extra) -> None:
    """Write dst (unless it exists): the pixel model file tests/golden/SRC with its
    parameters changed in place by edit(params), its arrays by edit_arrays(arrays) (a dict of
    writable copies; None: kept) and its other metadata kept, plus meta_extra."""
    from lcodec.format import modelfile

    if os.path.exists(dst):
        return
    meta, arrays, _ = modelfile.load(os.path.join(HERE, src))
    arch = meta.pop("architecture")
    meta.pop("arrays")
    edit(arch["params"])
    if edit_arrays is not None:
        arrays = {k: v.copy() for k, v in arrays.items()}
        edit_arrays(arrays)
    modelfile.dump(dst, arch, arrays, **meta, **meta_extra)


def golden_tessel_law():
    """The structure model file plus today's law stage of 16-bit samples (`train --kind image`
    writes limit 255, cap 12) as a third model file, and containers made with it: pydicom's
    MR_small.dcm (16 bits, noisy) and a signed 16-bit NPY with wide residuals (a crop of
    scikit-image's camera times -97, plus a fixed pseudo-random texture)."""
    import io
    import warnings

    import numpy as np
    import skimage.data as skd
    from pydicom.data import get_testdata_file

    mpath = os.path.join(HERE, "tessel-tiny-law.lcmodel")
    names = ["tessel-l1-dicom16", "tessel-l1-signed16"]
    if all(os.path.exists(os.path.join(HERE, n + ".lcodec")) for n in names):
        print("keep tessel-l1-*")
        return
    warnings.simplefilter("ignore")
    derive_tessel("tessel-tiny-structure.lcmodel", mpath, lambda params: params.update(law={"limit": 255, "cap": 12}))
    a = skd.camera()[300:340, 120:168].astype(np.int32) * -97 + np.random.default_rng(5).integers(-300, 300, (40, 48))
    buf = io.BytesIO()
    np.save(buf, a.astype("<i2"))
    for name, data in zip(names, (open(get_testdata_file("MR_small.dcm"), "rb").read(), buf.getvalue())):
        write_vector(name, data, model=mpath)


def _tessel_variant(model_name: str, edit, raster_name: str, raster: bytes, npy_name: str, npy) -> None:
    """A model file derived from the law model file by `edit` (its params), and two
    containers made with it: an 8-bit raster file and a 16-bit NPY of the array `npy`."""
    import io

    import numpy as np

    mpath = os.path.join(HERE, model_name)
    derive_tessel("tessel-tiny-law.lcmodel", mpath, edit)
    buf = io.BytesIO()
    np.save(buf, npy)
    write_vector(raster_name, raster, model=mpath)
    write_vector(npy_name, buf.getvalue(), model=mpath)


def golden_tessel_colour():
    """The law model file with colour mode rct (RGB coded as G, B - G, R - G; lcodec/models/colour.py)
    as a fourth model file, and containers made with it: an 8-bit PPM crop of scikit-image's
    coffee and a 16-bit RGB NPY (a crop of its astronaut times 251, plus 7)."""
    import numpy as np
    import skimage.data as skd

    ppm = b"P6\n# bay-3 colour plate 7\n40 32\n255\n" + skd.coffee()[120:152, 300:340].tobytes()
    _tessel_variant("tessel-tiny-rct.lcmodel", lambda params: params.update(colour="rct"), "tessel-c1-ppm", ppm,
                    "tessel-c1-rgb16", skd.astronaut()[200:224, 180:210].astype(np.uint16) * 251 + 7)


def golden_tessel_gap():
    """The law model file with predictor gap (gradient-adjusted prediction under the network) as
    a fifth model file, and containers made with it: an 8-bit PGM crop of scikit-image's camera
    and a 16-bit NPY (a crop of its moon times 53, plus 1000)."""
    import numpy as np
    import skimage.data as skd

    pgm = b"P5\n# bay-3 plate 9\n40 32\n255\n" + skd.camera()[220:252, 300:340].tobytes()
    _tessel_variant("tessel-tiny-gap.lcmodel", lambda params: params.update(predictor="gap"), "tessel-g1-pgm", pgm,
                    "tessel-g1-npy16", skd.moon()[60:92, 100:140].astype(np.uint16) * 53 + 1000)


def golden_tessel_light():
    """The gap model file with a light 16-bit high byte, as `train --kind image` writes 16-bit
    models since 2026-12-05: the high byte's network keeps 8 of its 16 hidden units (role
    parameter hidden), the high byte has no adaptive counts and the law stage leaves it alone
    (law high_byte 0); the file is named by its SHA-256 alone in archives. Containers made
    with it: a 16-bit NPY (a crop of scikit-image's coins times 43, plus 2000, with a fixed
    pseudo-random texture) and pydicom's CT_small.dcm."""
    import io
    import warnings

    import numpy as np
    import skimage.data as skd
    from pydicom.data import get_testdata_file

    mpath = os.path.join(HERE, "tessel-tiny-light.lcmodel")
    names = ["tessel-h1-npy16", "tessel-h1-dicom16"]
    if all(os.path.exists(os.path.join(HERE, n + ".lcodec")) for n in names):
        print("keep tessel-h1-*")
        return
    warnings.simplefilter("ignore")

    def light(p):
        p["roles"]["r16h"]["hidden"] = 8
        p["adapt"].pop("r16h")
        p["structure"]["k"].pop("r16h")
        p["law"]["high_byte"] = 0

    def first_eight(arrays):
        arrays["r16h.w1"] = np.ascontiguousarray(arrays["r16h.w1"][:, :8])
        arrays["r16h.b1"] = np.ascontiguousarray(arrays["r16h.b1"][:8])
        arrays["r16h.w2"] = np.ascontiguousarray(arrays["r16h.w2"][:8])

    derive_tessel("tessel-tiny-gap.lcmodel", mpath, light, first_eight, archives_name_file=False)
    a = skd.coins()[150:190, 200:236].astype(np.int32) * 43 + 2000 + np.random.default_rng(7).integers(-60, 60, (40, 36))
    buf = io.BytesIO()
    np.save(buf, a.astype("<u2"))
    write_vector(names[0], buf.getvalue(), model=mpath)
    write_vector(names[1], open(get_testdata_file("CT_small.dcm"), "rb").read(), model=mpath)


def golden_tessel_nets_only():
    """The light model file with stages_min_gain 10000 (the stages would have to save every
    bit), so that every image is coded with the networks alone (image flag FLAG_NETS_ONLY, as
    the encoder chooses since 2026-12-05 when a model file's stages save too little): an
    8-bit PGM crop of scikit-image's camera and a 16-bit NPY (a crop of its moon times 71,
    plus 300)."""
    import io

    import numpy as np
    import skimage.data as skd

    mpath = os.path.join(HERE, "tessel-tiny-netsonly.lcmodel")
    names = ["tessel-n1-pgm", "tessel-n1-npy16"]
    if all(os.path.exists(os.path.join(HERE, n + ".lcodec")) for n in names):
        print("keep tessel-n1-*")
        return
    derive_tessel("tessel-tiny-light.lcmodel", mpath, lambda params: params.update(stages_min_gain=10000))
    write_vector(names[0], b"P5\n# bay-6 plate 1\n36 28\n255\n" + skd.camera()[140:168, 200:236].tobytes(), model=mpath)
    buf = io.BytesIO()
    np.save(buf, skd.moon()[300:330, 40:72].astype(np.uint16) * 71 + 300)
    write_vector(names[1], buf.getvalue(), model=mpath)


def golden_heddle():
    """Two heddle model files made with the layer kit (needs torch, scikit-learn,
    scikit-image) and their containers: a tiny masked autoencoder over 8x8 digits (records;
    40 of scikit-learn's bundled digits), and a tiny masked-convolution pixel model (a 24 x 20
    crop of scikit-image's camera as a PGM)."""
    import io

    import numpy as np
    import torch
    from lcodec.training import kit

    arc = os.path.join(HERE, "heddle-v1-digits.lcodec")
    if not os.path.exists(arc):
        from sklearn.datasets import load_digits

        torch.manual_seed(0)
        digits = torch.from_numpy(load_digits().images.astype(np.int64)[:200])
        din, dh = kit.mask_degrees(64, 32)
        net = kit.HeddleNet((8, 8), 17, kit.SymbolEmbed(17, 2), [
            kit.DegreeLinear(kit.grid_degrees(din, 2), dh), kit.Residual(kit.DegreeLinear(dh, dh)),
            kit.DegreeLinear(dh, din.repeat_interleave(17), act="logits", strict=True)])
        opt = torch.optim.Adam(net.parameters(), 3e-3)
        for _ in range(60):
            opt.zero_grad()
            kit.nll(net, digits).backward()
            opt.step()
        mpath = os.path.join(HERE, "heddle-digits-tiny.lcmodel")
        kit.export(net, mpath)
        write_vector("heddle-v1-digits", digits[160:200].numpy().astype(np.uint8).tobytes(), model=mpath)
    else:
        print(f"keep {arc}")
    arc = os.path.join(HERE, "heddle-v1-pixels.lcodec")
    if not os.path.exists(arc):
        import skimage.data
        from PIL import Image

        torch.manual_seed(0)
        cam = skimage.data.camera()
        net = kit.HeddleNet((0, 0), 256, kit.SymbolEmbed(256, 2), [
            kit.RasterConv(2, 6, (2, 3), include_centre=False),
            kit.Residual(kit.RasterConv(6, 6, (2, 3), include_centre=True)),
            kit.RasterConv(6, 256, (1, 1), act="logits")])
        x = torch.from_numpy(cam[100:164, 100:164].astype(np.int64))[None]
        opt = torch.optim.Adam(net.parameters(), 3e-3)
        for _ in range(40):
            opt.zero_grad()
            kit.nll(net, x).backward()
            opt.step()
        mpath = os.path.join(HERE, "heddle-pixels-tiny.lcmodel")
        kit.export(net, mpath)
        buf = io.BytesIO()
        Image.fromarray(cam[300:324, 200:220]).save(buf, "PPM")
        write_vector("heddle-v1-pixels", buf.getvalue(), model=mpath)
    else:
        print(f"keep {arc}")


def main():
    os.makedirs(HERE, exist_ok=True)
    vectors = {"strata-v1-text": sample_text(1, 20_000), "strata-v1-binary": bytes(random.Random(2).randbytes(3000)) + bytes(range(256)) * 8}
    for name, data in vectors.items():
        write_vector(name, data, frame_size=8192)
    golden_weft()
    golden_braid()
    golden_braid_mixed()
    golden_braid_fork()
    golden_braid_fork2()
    golden_braid_memory()
    golden_braid_memtree()
    golden_braid_cut()
    golden_tessel()
    golden_tessel_structure()
    golden_tessel_law()
    golden_tessel_replicated()
    golden_tessel_colour()
    golden_tessel_gap()
    golden_tessel_light()
    golden_tessel_nets_only()
    golden_heddle()
    golden_v3_twins()
    golden_tessel_bands()


def golden_v3_twins():
    """Container version 3 (records carry their frame number and the archive identity; coded
    words carry sub-frame checks): for every older golden container NAME, the container
    today's encoder writes for NAME.orig with the same model and frame size, as
    tests/golden/v3/NAME.lcodec. The old container must keep decoding; the twin is what
    today's encoder must keep writing (tests compare both)."""
    import glob
    import hashlib

    from lcodec.format import container as C

    out_dir = os.path.join(HERE, "v3")
    os.makedirs(out_dir, exist_ok=True)
    models = {}
    for mp in glob.glob(os.path.join(HERE, "*.lcmodel")):
        with open(mp, "rb") as f:
            models[hashlib.sha256(f.read()).hexdigest()] = mp
    for arc in sorted(glob.glob(os.path.join(HERE, "*.lcodec"))):
        name = os.path.basename(arc)[:-7]
        twin = os.path.join(out_dir, name + ".lcodec")
        if os.path.exists(twin):
            print(f"keep {twin}")
            continue
        with open(arc, "rb") as f:
            blob = f.read()
        cont = C.read_container(blob)
        if cont.version == C.VERSION_BOUND:
            continue
        ident = cont.identity
        model = models[ident["sha256"]] if "sha256" in ident else None
        if model is None:
            from lcodec.models.strata import Strata
            model = Strata.from_identity(ident)
        with open(os.path.join(HERE, name + ".orig"), "rb") as f:
            orig = f.read()
        with open(twin, "wb") as f:
            f.write(lcodec.pack(orig, model=model, frame_size=cont.frame_size))
        print(f"wrote {twin}")


def golden_tessel_bands():
    """Image frames in bands (payload version 3), with the encoder's band rule lowered (256
    samples and 8 rows a band) so that small crops get several bands: an 8-bit PGM crop of
    scikit-image's camera (structure model), an 8-bit PPM crop of its coffee (rct model) and
    a 16-bit NPY (a camera crop times 61, plus 900; law model). The test applies the same
    rule before it re-encodes them."""
    import io

    import numpy as np
    import skimage.data as skd

    from lcodec.inputs import layout

    keep = layout.BAND_SAMPLES, layout.BAND_MIN_ROWS
    layout.BAND_SAMPLES, layout.BAND_MIN_ROWS = 256, 8
    try:
        pgm = b"P5\n# bay-5 plate 2, banded\n30 40\n255\n" + skd.camera()[260:300, 40:70].tobytes()
        write_vector("tessel-b3-pgm", pgm, model=os.path.join(HERE, "tessel-tiny-structure.lcmodel"))
        ppm = b"P6\n# bay-5 colour plate 3, banded\n24 32\n255\n" + skd.coffee()[60:92, 420:444].tobytes()
        write_vector("tessel-b3-ppm", ppm, model=os.path.join(HERE, "tessel-tiny-rct.lcmodel"))
        buf = io.BytesIO()
        np.save(buf, skd.camera()[100:148, 380:404].astype(np.uint16) * 61 + 900)
        write_vector("tessel-b3-npy16", buf.getvalue(), model=os.path.join(HERE, "tessel-tiny-law.lcmodel"))
    finally:
        layout.BAND_SAMPLES, layout.BAND_MIN_ROWS = keep


if __name__ == "__main__":
    main()
