"""The heddle runtime (lcodec/models/heddle.py) without torch: every op against a
Python-integer reference on random graphs, parallel pass == step pass across BLAS threads
and batch shapes, the golden containers, decoding where torch cannot be imported, the
probe command, and hostile model files refused with a clear message."""
import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest

import lcodec
from lcodec.errors import ModelError
from lcodec.format import modelfile
from lcodec.models import heddle_audit, load_model
from lcodec.models.heddle import Graph
from support import markov_chain, v3_twin

HERE = os.path.dirname(__file__)
GOLDEN = os.path.join(HERE, "golden")
DIGITS = os.path.join(GOLDEN, "heddle-digits-tiny.lcmodel")
PIXELS = os.path.join(GOLDEN, "heddle-pixels-tiny.lcmodel")


def cli(*args, timeout=300):
    return subprocess.run([sys.executable, "-m", "lcodec", *map(str, args)], capture_output=True, timeout=timeout)


def lut():
    return np.maximum(1, np.round((1 << 24) * np.exp(-np.arange(540) / 32))).astype(np.int32)


def random_graph(kind: str, H=3, W=4, A=5, seed=0):
    """A small random causal graph exercising `kind` (conv, linear, add), with its arrays."""
    rng = np.random.default_rng(seed)
    P, E = H * W, 3
    ops = [{"op": "embed", "shifts": [[0, -1], [-1, 0], [-1, 1]]}]
    arrays = {"0.table": rng.integers(-127, 128, (A + 1, E)).astype(np.int8), "lut": lut()}
    C = 3 * E

    def weights(i, shape, act, mask=None):
        w = rng.integers(-127, 128, shape)
        if mask is not None:
            w = w * mask
        arrays[f"{i}.w"] = w.astype(np.int8)
        cols = shape[0] if len(shape) == 4 else shape[1]
        arrays[f"{i}.b"] = rng.integers(-3000, 3000, cols).astype(np.int32)
        if act == "relu":
            arrays[f"{i}.m"] = rng.integers(1, 1 << 12, cols).astype(np.int32)

    if kind in ("conv", "add"):
        mask = np.ones((2, 3))
        mask[1, 2] = 0  # the centre is included: the embed already sees only earlier symbols
        ops.append({"op": "conv", "in": 0, "act": "relu", "shift": 18})
        weights(1, (4, C, 2, 3), "relu", mask)
        last = 1
        if kind == "add":
            ops.append({"op": "conv", "in": 1, "act": "relu", "shift": 16})
            weights(2, (4, 4, 2, 3), "relu", mask)
            ops.append({"op": "add", "in": [1, 2], "ma": 3000, "mb": 5000, "shift": 12})
            last = 3
        ops.append({"op": "conv", "in": last, "act": "logits", "shift": 1})
        weights(len(ops) - 1, (A, 4, 1, 1), "logits")
    else:
        din = np.repeat(np.arange(1, P + 1), C)
        dh = 1 + np.arange(10) % (P - 1)
        ops.append({"op": "linear", "in": 0, "act": "relu", "shift": 20})
        weights(1, (P * C, 10), "relu", (dh[None, :] >= din[:, None] - 0))
        dout = np.repeat(np.arange(1, P + 1), A)
        ops.append({"op": "linear", "in": 1, "act": "logits", "shift": 1})
        weights(2, (10, P * A), "logits", (dout[None, :] > dh[:, None]))
    ops.append({"op": "head", "in": len(ops) - 1, "mo": 9000, "so": 16})
    return {"record": [H, W], "alphabet": A, "ops": ops}, arrays


def reference(params, arrays, rec):
    """The graph's tables for one record, in Python integers (nested lists), op by op."""
    H, W = params["record"]
    A = params["alphabet"]
    P = H * W
    x = [min(int(s), A) for s in rec]
    vals = []

    def at(t, p, c):  # grid tensor t at position p, channel c (0 outside)
        return 0 if p is None else t[p][c]

    def pos(p, dy, dx):
        r, c = divmod(p, W)
        r, c = r + dy, c + dx
        return r * W + c if 0 <= r < H and 0 <= c < W else None

    for i, op in enumerate(params["ops"]):
        k = op["op"]
        if k == "embed":
            tab = arrays["0.table"].tolist()
            vals.append([sum((tab[A if pos(p, dy, dx) is None else x[pos(p, dy, dx)]] for dy, dx in op["shifts"]), [])
                         for p in range(P)])
            continue
        if k == "add":
            a, b = vals[op["in"][0]], vals[op["in"][1]]
            s = op["shift"]
            vals.append([[min(max((u * op["ma"] + v * op["mb"] + (1 << (s - 1))) >> s, 0), 127)
                          for u, v in zip(ra, rb)] for ra, rb in zip(a, b)])
            continue
        if k == "head":
            lg = vals[op["in"]]
            lg = lg if isinstance(lg[0], list) else [lg[p * A:(p + 1) * A] for p in range(P)]
            tl = arrays["lut"].tolist()
            out = []
            for row in lg:
                mx = max(row)
                out.append([tl[min(((mx - v) * op["mo"] + (1 << (op["so"] - 1))) >> op["so"], len(tl) - 1)] for v in row])
            return out
        w = arrays[f"{i}.w"].astype(np.int64)
        b = arrays[f"{i}.b"].tolist()
        m = arrays[f"{i}.m"].tolist() if op["act"] == "relu" else None
        u = vals[op["in"]]

        def act(acc, j):
            acc += b[j]
            if m is None:
                return acc
            s = op["shift"]
            return min(max((acc * m[j] + (1 << (s - 1))) >> s, 0), 127)

        if k == "conv":
            cout, cin, kh, kw = w.shape
            wl = w.tolist()
            vals.append([[act(sum(wl[o][c][a][d] * at(u, pos(p, a - (kh - 1), d - kw // 2), c)
                                  for c in range(cin) for a in range(kh) for d in range(kw)), o)
                          for o in range(cout)] for p in range(P)])
        else:
            flat = sum(u, []) if isinstance(u[0], list) else u
            wl = w.tolist()
            vals.append([act(sum(wl[r][j] * flat[r] for r in range(len(flat))), j) for j in range(w.shape[1])])
    raise AssertionError("no head")


@pytest.mark.parametrize("kind", ["conv", "add", "linear"])
def test_every_op_equals_the_python_integer_reference(kind):
    params, arrays = random_graph(kind)
    g = Graph(params, arrays)
    recs = np.random.default_rng(5).integers(0, 6, (4, 12))  # symbol 5 is outside the alphabet (PAD row)
    got = g.parallel(recs, width=5)
    for b in range(len(recs)):
        assert got[b].astype(np.int64).tolist() == reference(params, arrays, recs[b])


@pytest.mark.parametrize("kind", ["conv", "add", "linear"])
def test_parallel_equals_step_across_threads_and_batches(kind):
    params, arrays = random_graph(kind, seed=3)
    g = Graph(params, arrays)
    recs = np.random.default_rng(1).integers(0, 5, (9, 12))
    par = g.parallel(recs, width=5)
    assert np.array_equal(heddle_audit.step_tables(g, recs, 3, 4), par)
    assert np.array_equal(heddle_audit.step_tables(g, recs[:1], 3, 4), par[:1])
    assert all(heddle_audit.thread_check(g, recs, 3, 4).values())


@pytest.mark.parametrize("name,model", [("heddle-v1-digits", DIGITS), ("heddle-v1-pixels", PIXELS)])
def test_golden_containers_decode_and_repack(name, model):
    blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
    want = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
    assert lcodec.unpack(blob, model=model) == want
    assert lcodec.unpack(blob, model=model, jobs=2) == want
    twin = v3_twin(name)  # today's encoder writes format version 3 (tests/golden/v3)
    assert lcodec.unpack(twin, model=model) == want
    assert lcodec.pack(want, model=model) == twin
    assert lcodec.pack(want, model=model, jobs=2) == twin


def test_decoding_works_where_torch_cannot_be_imported(tmp_path):
    code = ("import sys; sys.modules['torch'] = None; from lcodec.cli import main; "
            "sys.argv = ['lcodec'] + sys.argv[1:]\ntry:\n    main()\nexcept SystemExit as e:\n"
            "    assert sys.modules['torch'] is None; raise")
    for name, model in [("heddle-v1-digits", DIGITS), ("heddle-v1-pixels", PIXELS)]:
        out = tmp_path / name
        r = subprocess.run([sys.executable, "-c", code, "unpack", os.path.join(GOLDEN, name + ".lcodec"), "-m", model,
                            "-o", out], capture_output=True, timeout=300)
        assert r.returncode == 0, r.stderr
        orig = os.path.join(GOLDEN, name + ".orig")
        assert out.read_bytes() == open(orig, "rb").read()
        r = subprocess.run([sys.executable, "-c", code, "pack", orig, "-m", model, "-o", tmp_path / (name + ".x")],
                           capture_output=True, timeout=300)
        assert r.returncode == 0, r.stderr
        assert (tmp_path / (name + ".x")).read_bytes() == v3_twin(name)


def test_probe_command(tmp_path):
    r = cli("probe", DIGITS, "--records", os.path.join(GOLDEN, "heddle-v1-digits.orig"), "--json", tmp_path / "p.json")
    assert r.returncode == 0, r.stderr
    assert b"parallel pass == step pass: yes" in r.stdout
    rep = json.loads((tmp_path / "p.json").read_text())
    assert rep["ok"] and rep["causal"] and rep["integer_bits_per_symbol"] > 0
    r = cli("probe", PIXELS, "--shape", "6x7", "--count", "2")
    assert r.returncode == 0 and b"records of 6 x 7" in r.stdout
    # a broken graph: the probe names the pairs and exits 1
    params, arrays = random_graph("conv")
    params["ops"][0]["shifts"][0] = [0, 1]  # position p sees the symbol at p + 1
    path = tmp_path / "bad.lcmodel"
    modelfile.dump(str(path), {"name": "heddle", "params": params}, arrays)
    r = cli("probe", path)
    assert r.returncode == 1 and b"NO, broken pairs" in r.stdout and b"0<-1" in r.stdout


def test_bench_records(tmp_path):
    pytest.importorskip("imagecodecs")
    r = cli("bench", "--kind", "records", os.path.join(GOLDEN, "heddle-v1-digits.orig"), "-m", DIGITS,
            "--json", tmp_path / "b.json")
    assert r.returncode == 0, r.stderr
    row = json.loads((tmp_path / "b.json").read_text())
    assert row["records"] == 40 and set(row["codecs"]) >= {"png", "jpegls", "jpegxl", "xz-9e", "zstd-19", "ppmd-o8"}
    # the coded words are within 0.1% of the NLL (plus the coder's final word)
    assert 8 * row["payload_bytes"] <= row["nll_bits"] * 1.001 + 64
    r = cli("bench", "--kind", "records", os.path.join(GOLDEN, "heddle-v1-pixels.orig"), "-m", DIGITS)
    assert r.returncode == 2 and b"not a whole number" in r.stderr


def _hostile(tmp_path, edit):
    params, arrays = random_graph("add")
    arrays = dict(arrays)
    params = json.loads(json.dumps(params))
    edit(params, arrays)
    path = tmp_path / "h.lcmodel"
    modelfile.dump(str(path), {"name": "heddle", "params": params}, arrays)
    return str(path)


HOSTILE = {
    "unknown op": (lambda p, a: p["ops"].insert(1, {"op": "softmax2", "in": 0}), "unknown op 'softmax2'"),
    "cycle": (lambda p, a: p["ops"][1].update({"in": 3}), "not an earlier op"),
    "self loop": (lambda p, a: p["ops"][1].update({"in": 1}), "not an earlier op"),
    "wrong shape": (lambda p, a: a.update({"1.w": np.zeros((4, 8, 2, 3), np.int8)}), "array 1.w must be"),
    "wrong dtype": (lambda p, a: a.update({"1.b": np.zeros(4, np.int64)}), "array 1.b must be int32"),
    "overflowing bound": (lambda p, a: a.update({"0.table": np.ones((6, 100), np.int8),  # 300 channels x 6 taps
                                                 "1.w": np.full((4, 300, 2, 3), 127, np.int8)}), "2\\*\\*24"),
    "missing array": (lambda p, a: a.pop("2.m"), "array 2.m is missing"),
    "head not last": (lambda p, a: p["ops"].append({"op": "embed", "shifts": [[0, -1]]}), "last"),
    "not causal": (lambda p, a: p["ops"][0]["shifts"].__setitem__(0, [1, 0]), "not autoregressive"),
    "bad multiplier": (lambda p, a: p["ops"][3].update({"ma": 0}), "ma must be"),
    "extra key": (lambda p, a: p["ops"][1].update({"code": "print(1)"}), "needs exactly the keys"),
    "huge record": (lambda p, a: p.update({"record": [70000, 70000]}), "record must be"),
    "huge activations": (lambda p, a: (p.update({"record": [256, 256]}), a.update(  # 300 channels x 65,536 positions
        {"0.table": np.ones((6, 100), np.int8), "1.w": np.zeros((4, 300, 2, 3), np.int8)})), "activations"),
}


@pytest.mark.parametrize("case", list(HOSTILE))
def test_hostile_model_files_are_refused_clearly(tmp_path, case):
    edit, msg = HOSTILE[case]
    path = _hostile(tmp_path, edit)
    with pytest.raises(ModelError, match=msg):
        load_model(path)
    r = cli("pack", os.path.join(GOLDEN, "heddle-v1-digits.orig"), "-m", path, "-o", tmp_path / "x.lcodec")
    assert r.returncode == 1 and b"Traceback" not in r.stderr and b"bad parameters" in r.stderr


def test_lanes_are_bounded_by_the_activations():
    from lcodec.models.heddle import BATCH_ELEMENTS, Heddle, record_lanes

    m = load_model(DIGITS).inner
    assert m.lanes_for(64 * 360) == 360 and m.lanes_for(64 * 4097) == 241  # a divisor of 4097 = 17 * 241
    assert record_lanes(100, 64) == 1 and record_lanes(64 * 12, 64, cap=5) == 4
    params, arrays = random_graph("conv", H=64, W=64)
    big = Heddle(params, arrays)
    assert big.max_lanes() * big.graph.elements(big.R) <= BATCH_ELEMENTS
    with pytest.raises(ValueError, match="lanes"):
        big.stepper(np.ones(big.max_lanes() + 1, np.int64))


def test_damaged_model_files_are_refused(tmp_path):
    blob = bytearray(open(DIGITS, "rb").read())
    blob[200] ^= 1  # wrong SHA-256
    (tmp_path / "a.lcmodel").write_bytes(bytes(blob))
    with pytest.raises(ModelError, match="SHA-256"):
        load_model(str(tmp_path / "a.lcmodel"))
    raw = open(DIGITS, "rb").read()
    mlen = int.from_bytes(raw[12:16], "little")
    body = raw[:16] + b"[" + raw[17:16 + mlen] + raw[16 + mlen:-32]  # not JSON any more, SHA-256 made right
    import hashlib

    (tmp_path / "b.lcmodel").write_bytes(body + hashlib.sha256(body).digest())
    with pytest.raises(ModelError, match="metadata is not readable"):
        load_model(str(tmp_path / "b.lcmodel"))


def test_markov_source_codes_at_its_entropy_rate():
    """Outside reference: the entropy rate of a stationary Markov chain,
    H = -sum_i mu_i sum_j P_ij log2 P_ij (Cover and Thomas, Elements of Information Theory,
    ch. 4; the formula as recalled from memory). A heddle graph whose logits are log P of
    the previous symbol codes a long sample within 1% of H."""
    A = 4
    Pm, rate, x = markov_chain(7, A)
    n = len(x)
    unit = 1 / 16  # nats per logit unit
    table = np.zeros((A + 1, A), np.int8)
    table[np.arange(A), np.arange(A)] = 1  # one-hot of the previous symbol (PAD: zeros)
    w = np.clip(np.round(np.log(Pm.T) / unit), -127, 127).astype(np.int8)  # w[out, in]
    params = {"record": [1, 4096], "alphabet": A, "ops": [
        {"op": "embed", "shifts": [[0, -1]]},
        {"op": "conv", "in": 0, "act": "logits", "shift": 1},
        {"op": "head", "in": 1, "mo": int(round(unit * 32 * (1 << 20))), "so": 20}]}
    arrays = {"0.table": table, "1.w": w.reshape(A, A, 1, 1), "1.b": np.zeros(A, np.int32), "lut": lut()}
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "markov.lcmodel")
        modelfile.dump(path, {"name": "heddle", "params": params}, arrays)
        data = x.astype(np.uint8).tobytes()
        blob = lcodec.pack(data, model=path)
        assert lcodec.unpack(blob, model=path) == data
    bits = 8 * len(blob) / n
    assert abs(bits / rate - 1) < 0.01, (bits, rate)
    assert math.isfinite(rate) and rate > 0.5


def test_a_dask_cluster_gives_the_same_archive():
    """The cluster runner builds the heddle model in its workers from the file's bytes."""
    distributed = pytest.importorskip("distributed")
    want = open(os.path.join(GOLDEN, "heddle-v1-digits.orig"), "rb").read() * 3
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        addr = cluster.scheduler_address
        local = lcodec.pack(want, model=DIGITS, frame_size=2560)
        assert lcodec.pack(want, model=DIGITS, frame_size=2560, cluster=addr) == local
        assert lcodec.unpack(local, model=DIGITS, cluster=addr) == want
