"""The learned model: integer-exact tables from every pass and backend, the masked
property, training's quantisation loss, and the committed golden model + container."""
import hashlib
import os
import subprocess
import sys

import numpy as np
import pytest

import lcodec
from lcodec.format import container as C
from lcodec.format import modelfile
from lcodec.models import load_model
from lcodec.errors import ModelError
from lcodec.models.weft import FNV_PRIME, GOLDEN_MIX, PAD, Weft, context_rows
from support import step_tables, teacher_tables, v3_twin

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")


HASHED = {"hash_orders": [2, 3, 6], "hash_bits": 9, "hash_embed": 5}


def random_weft(seed=0, W=8, E=8, H=32, hashed=False):
    """An untrained model with random integer weights: enough to exercise every path
    (hashed: with hashed-context tables too)."""
    rng = np.random.default_rng(seed)
    extra = HASHED if hashed else {}
    K, D = len(extra.get("hash_orders", ())), extra.get("hash_embed", 0)
    arrays = {
        "emb": rng.integers(-127, 128, (257, E)).astype(np.int8),
        "w1": rng.integers(-127, 128, (W * E + K * D, H)).astype(np.int8),
        "b1": rng.integers(-5000, 5000, H).astype(np.int32),
        "w2": rng.integers(-127, 128, (H, 256)).astype(np.int8),
        "b2": rng.integers(-20000, 20000, 256).astype(np.int32),
        "lut": np.maximum(1, np.round((1 << 20) * np.exp(-np.arange(768) / 32))).astype(np.int32),
    }
    if hashed:
        arrays["hemb"] = rng.integers(-127, 128, (K << extra["hash_bits"], D)).astype(np.int8)
    params = {"window": W, "embed": E, "hidden": H, "m1": 1 << 10, "s1": 20, "mo": 1 << 12, "so": 20, **extra}
    return Weft(params, arrays)


@pytest.mark.parametrize("hashed", [False, True])
@pytest.mark.parametrize("lanes", [1, 5, 64])
def test_parallel_pass_equals_step_pass(stdlib_text, lanes, hashed):
    m = random_weft(hashed=hashed)
    data = stdlib_text[:6000]
    a = teacher_tables(m, data, lanes, chunk=37)  # several chunks
    assert np.array_equal(a, teacher_tables(m, data, lanes))  # chunking changes nothing
    assert np.array_equal(a, step_tables(m, data, lanes))
    assert (a >= 1).all() and (a == np.floor(a)).all()


@pytest.mark.parametrize("hashed", [False, True])
def test_numpy_and_torch_backends_agree(stdlib_text, hashed):
    pytest.importorskip("torch")
    m = random_weft(1, hashed=hashed)
    a = teacher_tables(m, stdlib_text[:5000], 7)
    m.set_backend("torch")
    b = teacher_tables(m, stdlib_text[:5000], 7)
    assert np.array_equal(a, b)
    assert np.array_equal(step_tables(m, stdlib_text[:800], 3),
                          teacher_tables(random_weft(1, hashed=hashed), stdlib_text[:800], 3))


@pytest.mark.parametrize("hashed", [False, True])
def test_masked_property(hashed):
    # reference: the masked-autoencoder property (Germain et al., 2015): the distribution
    # at position i depends only on inputs before i
    m = random_weft(2, hashed=hashed)
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


@pytest.mark.parametrize("hashed", [False, True])
def test_chunks_split_over_two_threads_give_the_same_tables(stdlib_text, hashed, monkeypatch):
    from lcodec.models import weft

    m = random_weft(3, hashed=hashed)
    a = teacher_tables(m, stdlib_text[:6000], 3)  # chunks of 4096 rows: two threads
    monkeypatch.setattr(weft, "PAR_MIN_ROWS", 1 << 30)
    assert np.array_equal(a, teacher_tables(m, stdlib_text[:6000], 3))


def test_context_rows_match_the_hash_written_out():
    """context_rows against the hash computed with Python's unbounded integers, mod 2**64
    (reference: the FNV-1 64-bit prime 0x100000001B3 of Fowler, Noll and Vo, and
    multiplicative hashing by 2**64/phi, Knuth, TAOCP vol. 3, section 6.4)."""
    assert int(FNV_PRIME) == 0x100000001B3 and int(GOLDEN_MIX) == 0x9E3779B97F4A7C15
    rng = np.random.default_rng(5)
    ctx = rng.integers(0, 257, (50, 8))
    ctx[:5, :4] = PAD
    orders, bits = [1, 2, 5, 8], 11
    rows = context_rows(ctx, orders, bits)
    for n in range(len(ctx)):
        for k, o in enumerate(orders):
            h = 0
            for j in range(1, o + 1):  # newest byte first
                h = (h * 0x100000001B3 + int(ctx[n, 8 - j]) + 1) % 2 ** 64
            want = ((h * 0x9E3779B97F4A7C15) % 2 ** 64 >> (64 - bits)) + (k << bits)
            assert rows[n, k] == want


@pytest.mark.parametrize("bad, why", [
    ({"hash_orders": [2, 9]}, "within the window"),
    ({"hash_orders": [3, 2]}, "increasing"),
    ({"hash_embed": "4"}, "hash_embed"),
    ({"hash_bits": 40}, "hash_bits"),
])
def test_hostile_hash_parameters_are_refused(tmp_path, bad, why):
    m = random_weft(hashed=True)
    path = str(tmp_path / "bad.lcmodel")
    modelfile.dump(path, {"name": "weft", "params": {**m.params, **bad}}, m.arrays)
    with pytest.raises(ModelError, match=why):
        load_model(path)


def _golden_paths(model="weft-tiny", container="weft-v1-text"):
    return os.path.join(GOLDEN, model + ".lcmodel"), os.path.join(GOLDEN, container + ".lcodec"), \
        os.path.join(GOLDEN, container + ".orig")


@pytest.mark.parametrize("golden", [("weft-tiny", "weft-v1-text"), ("weft-hashed-tiny", "weft-v2-hashed")])
def test_golden_model_and_container_decode_exactly(golden):
    mpath, apath, opath = _golden_paths(*golden)
    blob, orig = open(apath, "rb").read(), open(opath, "rb").read()
    assert lcodec.unpack(blob, model=mpath) == orig
    assert lcodec.pack(orig, model=mpath, frame_size=lcodec.info(blob)["frame_size"]) == v3_twin(golden[1])


SNIPPET = r"""
import sys, hashlib, lcodec, torch
torch.set_num_threads(int(sys.argv[3]))
from lcodec.models import load_model
m = load_model(sys.argv[2])
if sys.argv[4] == "torch":
    m.inner.set_backend("torch")
print(hashlib.sha256(lcodec.pack(open(sys.argv[1], 'rb').read(), model=m)).hexdigest())
"""


@pytest.mark.parametrize("model", ["weft-tiny", "weft-hashed-tiny"])
def test_same_archive_across_threads_and_backends(tmp_path, stdlib_text, model):
    pytest.importorskip("torch")
    mpath = _golden_paths(model)[0]
    src = tmp_path / "in.bin"
    src.write_bytes(stdlib_text[:40_000])
    digests = set()
    for threads, backend in (("1", "numpy"), ("2", "numpy"), ("1", "torch"), ("2", "torch")):
        env = dict(os.environ, OMP_NUM_THREADS=threads, OPENBLAS_NUM_THREADS=threads, MKL_NUM_THREADS=threads)
        out = subprocess.run([sys.executable, "-c", SNIPPET, str(src), mpath, threads, backend],
                             env=env, capture_output=True, text=True, check=True)
        digests.add(out.stdout.strip())
    assert len(digests) == 1


@pytest.mark.parametrize("preset", ["tiny", "tiny-hashed"])
def test_training_integer_model_close_to_float(tmp_path, stdlib_text, preset):
    pytest.importorskip("torch")
    from lcodec.training import train as T

    corpus = tmp_path / "corpus"
    corpus.mkdir()
    for i in range(10):
        (corpus / f"f{i}.py").write_bytes(stdlib_text[i * 25_000:(i + 1) * 25_000])
    res = T.train([str(corpus)], str(tmp_path / "m.lcmodel"), time_limit=8, preset=preset, echo=lambda m: None)
    assert abs(res["integer_bpb"] - res["float_bpb"]) <= 0.02 * res["float_bpb"]
    assert res["integer_bpb"] < 8.0  # learned something (uniform is 8)
    meta, arrays, sha = modelfile.load(str(tmp_path / "m.lcmodel"))
    assert meta["validation"]["integer_bpb"] == round(res["integer_bpb"], 4)
    assert meta["learning_curve"] and sha == hashlib.sha256((tmp_path / "m.lcmodel").read_bytes()).hexdigest()
    m = load_model(str(tmp_path / "m.lcmodel"))
    data = stdlib_text[250_000:260_000]
    blob = lcodec.pack(data, model=m)
    assert lcodec.unpack(blob, model=m) == data
    if preset == "tiny-hashed":  # named by its SHA-256 alone: the binary identity (version 3 keeps it)
        assert blob[4] == 3 and C.read_header(blob)[0]["identity"] == {"model": "weft", "sha256": sha}
        assert b"m.lcmodel" not in blob
