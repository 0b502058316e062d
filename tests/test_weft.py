"""The learned model: integer-exact tables from every pass and backend, the masked
property, training's quantisation loss, and the committed golden model + container."""
import hashlib
import os
import subprocess
import sys

import numpy as np
import pytest

import lcodec
from lcodec import modelfile
from lcodec.models import load_model
from lcodec.models.weft import PAD, Weft
from support import step_tables, teacher_tables

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")


def random_weft(seed=0, W=8, E=8, H=32):
    """An untrained model with random integer weights: enough to exercise every path."""
    rng = np.random.default_rng(seed)
    arrays = {
        "emb": rng.integers(-127, 128, (257, E)).astype(np.int8),
        "w1": rng.integers(-127, 128, (W * E, H)).astype(np.int8),
        "b1": rng.integers(-5000, 5000, H).astype(np.int32),
        "w2": rng.integers(-127, 128, (H, 256)).astype(np.int8),
        "b2": rng.integers(-20000, 20000, 256).astype(np.int32),
        "lut": np.maximum(1, np.round((1 << 20) * np.exp(-np.arange(768) / 32))).astype(np.int32),
    }
    params = {"window": W, "embed": E, "hidden": H, "m1": 1 << 10, "s1": 20, "mo": 1 << 12, "so": 20}
    return Weft(params, arrays)


@pytest.mark.parametrize("lanes", [1, 5, 64])
def test_parallel_pass_equals_step_pass(stdlib_text, lanes):
    m = random_weft()
    data = stdlib_text[:6000]
    a = teacher_tables(m, data, lanes, chunk=37)  # several chunks
    assert np.array_equal(a, teacher_tables(m, data, lanes))  # chunking changes nothing
    assert np.array_equal(a, step_tables(m, data, lanes))
    assert (a >= 1).all() and (a == np.floor(a)).all()


def test_numpy_and_torch_backends_agree(stdlib_text):
    pytest.importorskip("torch")
    m = random_weft(1)
    a = teacher_tables(m, stdlib_text[:5000], 7)
    m.set_backend("torch")
    b = teacher_tables(m, stdlib_text[:5000], 7)
    assert np.array_equal(a, b)
    assert np.array_equal(step_tables(m, stdlib_text[:800], 3), teacher_tables(random_weft(1), stdlib_text[:800], 3))


def test_masked_property():
    # reference: the masked-autoencoder property (Germain et al., 2015): the distribution
    # at position i depends only on inputs before i
    m = random_weft(2)
    rng = np.random.default_rng(0)
    data = rng.integers(0, 256, 400).astype(np.uint8)
    base = teacher_tables(m, data.tobytes(), 1)
    for i in (0, 1, 9, 200, 399):
        changed = data.copy()
        changed[i:] = rng.integers(0, 256, len(data) - i)
        other = teacher_tables(m, changed.tobytes(), 1)
        assert np.array_equal(base[: i + 1], other[: i + 1])  # tables up to and including i
    ctx = np.full((1, m.window), PAD)
    assert m.tables(ctx).shape == (1, 256)


def _golden_paths():
    return os.path.join(GOLDEN, "weft-tiny.lcmodel"), os.path.join(GOLDEN, "weft-v1-text.lcodec"), \
        os.path.join(GOLDEN, "weft-v1-text.orig")


def test_golden_model_and_container_decode_exactly():
    mpath, apath, opath = _golden_paths()
    blob, orig = open(apath, "rb").read(), open(opath, "rb").read()
    assert lcodec.unpack(blob, model=mpath) == orig
    assert lcodec.pack(orig, model=mpath, frame_size=lcodec.info(blob)["frame_size"]) == blob


SNIPPET = r"""
import sys, hashlib, lcodec, torch
torch.set_num_threads(int(sys.argv[3]))
from lcodec.models import load_model
m = load_model(sys.argv[2])
if sys.argv[4] == "torch":
    m.inner.set_backend("torch")
print(hashlib.sha256(lcodec.pack(open(sys.argv[1], 'rb').read(), model=m)).hexdigest())
"""


def test_same_archive_across_threads_and_backends(tmp_path, stdlib_text):
    pytest.importorskip("torch")
    mpath = _golden_paths()[0]
    src = tmp_path / "in.bin"
    src.write_bytes(stdlib_text[:40_000])
    digests = set()
    for threads, backend in (("1", "numpy"), ("2", "numpy"), ("1", "torch"), ("2", "torch")):
        env = dict(os.environ, OMP_NUM_THREADS=threads, OPENBLAS_NUM_THREADS=threads, MKL_NUM_THREADS=threads)
        out = subprocess.run([sys.executable, "-c", SNIPPET, str(src), mpath, threads, backend],
                             env=env, capture_output=True, text=True, check=True)
        digests.add(out.stdout.strip())
    assert len(digests) == 1


def test_training_integer_model_close_to_float(tmp_path, stdlib_text):
    pytest.importorskip("torch")
    from lcodec import train as T

    corpus = tmp_path / "corpus"
    corpus.mkdir()
    for i in range(10):
        (corpus / f"f{i}.py").write_bytes(stdlib_text[i * 25_000:(i + 1) * 25_000])
    res = T.train([str(corpus)], str(tmp_path / "m.lcmodel"), time_limit=8, preset="tiny", echo=lambda m: None)
    assert abs(res["integer_bpb"] - res["float_bpb"]) <= 0.02 * res["float_bpb"]
    assert res["integer_bpb"] < 8.0  # learned something (uniform is 8)
    meta, arrays, sha = modelfile.load(str(tmp_path / "m.lcmodel"))
    assert meta["validation"]["integer_bpb"] == round(res["integer_bpb"], 4)
    assert meta["learning_curve"] and sha == hashlib.sha256((tmp_path / "m.lcmodel").read_bytes()).hexdigest()
    m = load_model(str(tmp_path / "m.lcmodel"))
    data = stdlib_text[250_000:260_000]
    assert lcodec.unpack(lcodec.pack(data, model=m), model=m) == data
