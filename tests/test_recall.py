"""The corpus memory (lcodec/models/recall.py, braid model files with `memory`): the
predictor against a Python-integer reference, encoder pass == decoder pass with repeats
across lane, frame and memory boundaries, round trips, hostile model files, the memory's
deduplication, and the coded size of verbatim copies against the information in them."""
import math
import os
import random

import numpy as np
import pytest

import lcodec
from lcodec import modelfile
from lcodec.braid_build import CHUNK_MAX, build, memory_text
from lcodec.braid_train import nll_bits, recall_prior
from lcodec.errors import ModelError
from lcodec.models import load_model
from lcodec.models import recall as R
from lcodec.models import strata as S
from lcodec.models.braid import Braid
from support import stdlib_file, step_tables, teacher_tables, v3_twin

# reference: modules of the Python standard library (real source files)
CORPUS = ["argparse.py", "ast.py", "configparser.py", "csv.py", "dataclasses.py", "difflib.py", "enum.py"]
M64 = (1 << 64) - 1


# -- a Python-integer reference of the predictor ----------------------------------------------
def py_hash(lo, hi, n):
    if n < 8:
        lo &= (1 << (8 * n)) - 1
        hi = 0
    elif n < 16:
        hi &= (1 << (8 * (n - 8))) - 1
    x = ((lo + n) * int(S._M1)) & M64
    x ^= x >> 29
    x = ((x + hi * int(R._K)) * int(S._M2)) & M64
    return x ^ (x >> 32)


def py_index(text, n):
    bits = R.index_bits(len(text))
    index = [0] * (1 << bits)
    lo = hi = 0
    for i, c in enumerate(text):
        if i >= n and i % R.STEP == 0:
            index[py_hash(lo, hi, n) >> (64 - bits)] = i
        hi = ((hi << 8) | (lo >> 56)) & M64
        lo = ((lo << 8) | c) & M64
    return index, 64 - bits


def py_run_class(n):
    if n < 16:
        return n
    k = n.bit_length() - 1
    return min(16 + 2 * (k - 4) + ((n >> (k - 1)) & 1), R.RUN_CLASSES - 1)


def py_level(pe, total):
    """16 levels by halvings, from the fractions themselves (exact rationals)."""
    from fractions import Fraction

    q = Fraction(pe, total)
    if q >= Fraction(1, 2):
        rest = 1 - q  # level 8 + j where rest is below 2**-(j + 1) ... at most 15
        j = 0
        while j < 7 and rest < Fraction(1, 2 ** (j + 2)):
            j += 1
        return 8 + j
    j = 7  # level j where q >= 2**(j - 8), down to 0
    while j > 0 and q < Fraction(1, 2 ** (9 - j)):
        j -= 1
    return j


class PyRecall:
    """The predictor of one lane, in Python integers, written from the module's docstring."""

    def __init__(self, text, min_len, long_len):
        self.text, self.min_len, self.long_len = bytes(text), min_len, long_len
        self.short, self.sshift = py_index(self.text, min_len)
        self.long, self.lshift = py_index(self.text, long_len)
        self.ptr, self.run, self.misses, self.older = -1, 0, 0, 0
        self.cells = [[0, 0] for _ in range(R.CELLS)]
        self.cell = self.pred = -1

    def predict(self, p, repeat_byte):
        self.cell = self.pred = -1
        if self.ptr < 0:
            return p
        e = self.text[self.ptr]
        self.pred = e
        total, pe = sum(p), p[e]
        if total - pe < 1024:
            return p
        agree = 0 if repeat_byte < 0 else (1 if repeat_byte == e else 2)
        cell = ((py_run_class(self.run) * R.AGREE + agree) * R.MISS_CLASSES + min(self.misses, R.MISS_CLASSES - 1)) \
            * R.LEVELS + py_level(pe, total)
        self.cell = cell
        hits, trials = self.cells[cell]
        k = max(R.SHRINK - trials, 0)
        target = min(max((hits * total + k * pe) // (trials + k), 1), total - 1024)
        f = ((total - target) << 20) // (total - pe)
        out = [(x * f) >> 20 for x in p]
        out[e] = target
        return out

    def update(self, buf, start, t, sym, before):
        cur = start + t
        if self.cell >= 0:
            st = self.cells[self.cell]
            st[0] += self.pred == sym
            st[1] += 1
            if st[1] > R.LIMIT:
                st[0], st[1] = (st[0] + 1) >> 1, (st[1] + 1) >> 1
        self.older = ((self.older << 8) | (before >> 56)) & M64
        hist = ((before << 8) | sym) & M64
        q = self.ptr
        if q >= 0:
            if self.text[q] == sym:
                self.run += 1
            elif self.run >= R.RECOVER_RUN and self.misses < R.MAX_MISSES:
                self.run, self.misses = 0, self.misses + 1
            else:
                q = -1
            if q >= 0:
                q += 1
                if q >= len(self.text):
                    q = -1
            self.ptr = q
            if q < 0:
                self.run = self.misses = 0
        if q >= 0 and self.run >= self.long_len:
            return
        for n, index, shift in ((self.long_len, self.long, self.lshift), (self.min_len, self.short, self.sshift)):
            if t + 1 < n:
                continue
            c = index[py_hash(hist, self.older, n) >> shift]
            if c == 0 or c >= len(self.text):
                continue
            v = 0
            while v < R.VERIFY and c - 1 - v >= 0 and cur - v >= start and self.text[c - 1 - v] == buf[cur - v]:
                v += 1
            if v >= n and (self.ptr < 0 or v > self.run):
                self.ptr, self.run, self.misses = c, v, 0
                return


def edited_copies(text: bytes, n: int, rng: random.Random) -> bytes:
    """n bytes made of pieces of `text` (10..400 bytes from random places), with now and then
    a byte changed, inserted or left out, and some random bytes between pieces."""
    out = bytearray()
    while len(out) < n:
        a = rng.randrange(len(text))
        piece = bytearray(text[a:a + rng.randrange(10, 400)])
        for _ in range(rng.randrange(3)):
            if piece:
                i = rng.randrange(len(piece))
                op = rng.randrange(3)
                if op == 0:
                    piece[i] = rng.randrange(256)
                elif op == 1:
                    piece.insert(i, rng.randrange(256))
                else:
                    del piece[i]
        out += piece
        if rng.random() < 0.3:
            out += bytes(rng.randrange(256) for _ in range(rng.randrange(1, 12)))
    return bytes(out[:n])


@pytest.mark.parametrize("kind", ["random", "repetitive"])
@pytest.mark.parametrize("lengths", [(8, 16), (4, 9), (6, 12)])
def test_predictor_matches_python_integers(kind, lengths):
    """The numba kernels (R.predict, R.update) against PyRecall on the same tables: every
    table, and the followed place after every byte, the same integers."""
    rng = random.Random(hash((kind, lengths)) & 0xFFFF)
    text = stdlib_file("difflib.py", 20_000)
    data = bytes(rng.randrange(256) for _ in range(3000)) if kind == "random" else edited_copies(text, 6000, rng)
    mem = np.frombuffer(text, np.uint8)
    mn, lg = lengths
    rc = R.new_state(mem, R.build_index(mem, mn), R.build_index(mem, lg), mn, lg, 1)
    assert list(rc.short) == py_index(text, mn)[0] and list(rc.long) == py_index(text, lg)[0]
    ref = PyRecall(text, mn, lg)
    buf = np.frombuffer(data, np.uint8)
    hist = 0
    followed = recovered = 0
    for t, sym in enumerate(data):
        p = np.array([rng.randrange(1, 1 << 13) for _ in range(256)], np.int64)
        if rng.random() < 0.05:  # a table nearly certain of one byte
            p[rng.randrange(256)] = 1 << 21
        r = rng.random()  # the in-frame repeat's byte: none, the same as the memory's, or another
        rb = -1 if r < 0.6 else (ref.text[ref.ptr] if r < 0.8 and ref.ptr >= 0 else rng.randrange(256))
        want = ref.predict([int(x) for x in p], rb)
        R.predict(rc, 0, p, rb)
        assert p.tolist() == want, t
        ref.update(data, 0, t, sym, hist)
        R.update(rc, 0, buf, 0, t, np.int64(sym), np.uint64(hist))
        hist = ((hist << 8) | sym) & M64
        assert (int(rc.ptr[0]), int(rc.run[0]), int(rc.misses[0])) == (ref.ptr, ref.run, ref.misses), t
        followed += ref.ptr >= 0
        recovered += ref.misses > 0
    assert rc.cells.tolist() == ref.cells
    if kind == "repetitive":
        assert followed > 0.6 * len(data)  # the copies are found and followed
        assert recovered > 0  # and some are followed past a miss


def test_levels_against_fractions():
    rng = random.Random(4)
    cases = [(1, 1 << 20), (1 << 19, 1 << 20), ((1 << 20) - 1, 1 << 20), (3, 8), (1, 4), (3, 4), (7, 8)]
    cases += [(rng.randrange(1, t), t) for t in (rng.randrange(2, 1 << 22) for _ in range(3000))]
    for pe, total in cases:
        assert R.level_of(pe, total) == py_level(pe, total), (pe, total)
    assert [R.level_of(x, 256) for x in (0, 1, 2, 32, 63, 64, 127, 128, 191, 192, 255)] == [0, 1, 2, 6, 6, 7, 7, 8, 8, 8, 14]


def test_run_classes():
    assert [R.run_class(n) for n in range(16)] == list(range(16))
    assert [R.run_class(n) for n in (16, 23, 24, 31, 32, 47, 48, 64, 767, 768, 10**6)] == \
        [16, 16, 17, 17, 18, 18, 19, 20, 26, 27, 27]
    assert all(R.run_class(n) == py_run_class(n) for n in range(5000))


# -- a braid model with a memory ----------------------------------------------------------------
def params(order, **extra):
    p = {"corpus_order": order, **S.PRESETS["o6m"], "mix_shift": 16, "lane_tables": 1, "sse_bits": 8, **extra}
    p["discount"] = [list(r) for r in p["discount"]]
    return p


@pytest.fixture(scope="module")
def corpus():
    return [stdlib_file(f) for f in CORPUS]


@pytest.fixture(scope="module")
def tiny_memory(tmp_path_factory, corpus):
    """Tables of orders 0-3 from a few standard-library modules, and those modules as the
    memory, its cells fitted on two other modules (as training writes it)."""
    arrays = build(corpus, 3, 2)
    text, _ = memory_text(corpus, 1 << 20)
    p = params(3, recall_min=8, recall_long=16, memory_bytes=len(text))
    arrays["memory"] = text
    prior = recall_prior(Braid(p, arrays), [stdlib_file("calendar.py"), stdlib_file("shlex.py")])
    assert prior is not None
    arrays["recall_prior"] = prior
    path = str(tmp_path_factory.mktemp("recall") / "tiny-memory.lcmodel")
    modelfile.dump(path, {"name": "braid", "params": p}, arrays)
    return path


@pytest.fixture(scope="module")
def tiny_plain(tmp_path_factory, corpus):
    path = str(tmp_path_factory.mktemp("recall") / "tiny-plain.lcmodel")
    modelfile.dump(path, {"name": "braid", "params": params(3)}, build(corpus, 3, 2))
    return path


def boundary_data(corpus) -> bytes:
    """A frame whose long copies of the memory straddle the lanes' boundaries (16 lanes of
    2,000 bytes: copies of 700 bytes at every 1,650th byte) and the memory's own ends (its
    first and last 300 bytes), between edited copies."""
    text = b"".join(corpus)
    rng = random.Random(5)
    out = bytearray(edited_copies(text, 32_000, rng))
    for a in range(1650, 31_000, 1650):
        src = rng.randrange(len(text) - 700)
        out[a:a + 700] = text[src:src + 700]
    out[:300] = text[:300]
    out[-300:] = text[-300:]
    return bytes(out)


def test_parallel_pass_equals_step_pass_across_boundaries(tiny_memory, corpus):
    m = load_model(tiny_memory)
    data = boundary_data(corpus)
    for lanes in (1, 3, 16):
        a = teacher_tables(m, data, lanes, chunk=37)
        assert np.array_equal(a, teacher_tables(m, data, lanes))
        assert np.array_equal(a, step_tables(m, data, lanes)), lanes
        assert (a == np.floor(a)).all() and (a >= 1).all()


def test_tables_depend_only_on_earlier_bytes(tiny_memory, corpus):
    m = load_model(tiny_memory)
    data = bytearray(boundary_data(corpus)[:4000])
    a = teacher_tables(m, bytes(data), 1)
    data[2500:] = bytes(reversed(data[2500:]))
    b = teacher_tables(m, bytes(data), 1)
    assert np.array_equal(a[:2501], b[:2501])


def test_round_trips_frames_threads_processes(tiny_memory, corpus, tmp_path):
    data = boundary_data(corpus) * 2
    ref = None
    for frame in (5_000, 40_000, 1 << 20):  # repeats across frame boundaries too
        blob = lcodec.pack(data, model=tiny_memory, frame_size=frame)
        assert lcodec.unpack(blob, model=tiny_memory) == data
        assert lcodec.unpack(blob, model=tiny_memory, workers=2) == data
        if frame == 40_000:
            ref = blob
    assert lcodec.pack(data, model=tiny_memory, frame_size=40_000, jobs=2) == ref
    assert lcodec.unpack(ref, model=tiny_memory, jobs=2) == data


def test_memory_pays_on_repeats_and_costs_nothing_without(tiny_memory, tiny_plain, corpus):
    """On a file that repeats the memory (edited copies) the memory model is far smaller; on
    files that share no long strings with it (other standard-library modules) it costs at
    most 1% more than the same model without a memory."""
    with_mem, plain = load_model(tiny_memory), load_model(tiny_plain)
    rep = edited_copies(b"".join(corpus), 40_000, random.Random(9))
    assert nll_bits(with_mem, rep) < 0.6 * nll_bits(plain, rep)
    for name in ("heapq.py", "textwrap.py", "fractions.py"):
        d = stdlib_file(name, 30_000)
        assert nll_bits(with_mem, d) <= 1.01 * nll_bits(plain, d), name


def test_verbatim_copies_cost_about_their_offsets(tmp_path):
    """Outside reference: a file made of k verbatim copies of L bytes from uniformly random
    places of a memory of N random bytes holds k * log2(N - L + 1) bits of information (the
    copies' offsets; L and k are fixed), which is what a coder that names each copy by its
    place, as in Ziv and Lempel's 1977 scheme ("A universal algorithm for sequential data
    compression"), would pay, plus the lengths.

    lcodec names a copy by its first bytes instead: the predictor needs recall_min bytes of a
    copy (plus up to STEP - 1 while the index catches up) before it finds the place, and
    random bytes cost 8 bits each under any model; then every byte of the copy is one hit
    of its cell, and the copy's end costs one miss. So per copy

        8 * (recall_min + STEP - 1) + L * h + c_miss,

    where h is the cost of a hit once the cells have learned (hit rates near the cells'
    limit: the table gives e at most 1 - 2**-10 of its mass, about 0.0015 bits) and c_miss
    the cost of the byte after the copy (at most about 20 bits: 8 for the byte, 12 for the
    mass taken from the predicted byte). The cells start from hit rates fitted on other
    copies of the same memory, as `lcodec train` fits them on held-out files. Bound checked:
    coded bits <= k * (8 * (recall_min + STEP - 1) + 0.02 * L + 24) + 400 (the cells still
    learning), and never below the information in the offsets."""
    rng = np.random.default_rng(3)
    N, L, k = 1 << 16, 2000, 20

    def copies(n):
        return b"".join(mem[o:o + L].tobytes() for o in rng.integers(0, N - L + 1, n))

    mem = rng.integers(0, 256, N, dtype=np.uint8)
    data = copies(k)
    arrays = build([mem[:4096].tobytes()], 1, 2)  # tables know nothing useful: random bytes
    p = params(1, recall_min=8, recall_long=16, memory_bytes=N)
    arrays["recall_prior"] = recall_prior(Braid(p, {**arrays, "memory": mem}), [copies(k) for _ in range(3)])
    path = str(tmp_path / "random-memory.lcmodel")
    modelfile.dump(path, {"name": "braid", "params": p}, {**arrays, "memory": mem})
    m = load_model(path)
    bits = nll_bits(m, data)
    info = k * math.log2(N - L + 1)
    bound = k * (8 * (8 + R.STEP - 1) + 0.02 * L + 24) + 400
    assert info <= bits <= bound, (info, bits, bound)
    coded = 8 * len(lcodec.pack(data, model=path))
    assert coded <= bits + 8 * 200  # the container adds its header and records, nothing per byte
    assert lcodec.unpack(lcodec.pack(data, model=path), model=path) == data


def test_memory_is_deduplicated_and_budgeted():
    a = stdlib_file("argparse.py")
    b = stdlib_file("csv.py")
    text, s = memory_text([a, b, a, b + a], 1 << 22)
    # b + a repeats pieces already kept: only the pieces around the seam can be new
    assert s["unique_bytes"] == len(text) <= len(a) + len(b) + 2 * CHUNK_MAX
    assert len(text) >= len(a) + len(b)
    assert bytes(text).startswith(a)
    small, s2 = memory_text([a, b], 5000)
    assert len(small) == 5000 and s2["stored_bytes"] == 5000
    none, s3 = memory_text([a, b], 0)
    assert len(none) == 0 and s3["stored_bytes"] == 0


@pytest.mark.parametrize("damage", ["bytes_mismatch", "no_params", "no_memory", "bad_dtype", "bad_min", "bad_long",
                                    "prior_shape", "prior_hits", "prior_negative", "prior_over_limit",
                                    "prior_without_memory", "two_dims"])
def test_hostile_memory_model_files_are_refused(tiny_memory, tmp_path, damage):
    meta, arrays, _ = modelfile.load(tiny_memory)
    p = dict(meta["architecture"]["params"])
    arrays = {k: np.array(v) for k, v in arrays.items()}
    if damage == "bytes_mismatch":
        p["memory_bytes"] += 1
    elif damage == "no_params":
        for k in ("recall_min", "recall_long", "memory_bytes"):
            p.pop(k)
    elif damage == "no_memory":
        arrays.pop("memory")
    elif damage == "bad_dtype":
        arrays["memory"] = arrays["memory"].astype(np.int16)
    elif damage == "bad_min":
        p["recall_min"] = 3
    elif damage == "bad_long":
        p["recall_long"] = 40
    elif damage == "prior_shape":
        arrays["recall_prior"] = arrays["recall_prior"][:-1]
    elif damage == "prior_hits":
        arrays["recall_prior"][0] = [50, 40]
    elif damage == "prior_negative":
        arrays["recall_prior"][0] = [-1, 40]
    elif damage == "prior_over_limit":
        arrays["recall_prior"][0] = [0, R.LIMIT + 1]
    elif damage == "prior_without_memory":
        for k in ("recall_min", "recall_long", "memory_bytes"):
            p.pop(k)
        arrays.pop("memory")
    elif damage == "two_dims":
        arrays["memory"] = arrays["memory"][: (len(arrays["memory"]) // 2) * 2].reshape(-1, 2)
        p["memory_bytes"] = int(arrays["memory"].size)
    bad = str(tmp_path / "bad.lcmodel")
    modelfile.dump(bad, {"name": "braid", "params": p}, arrays)
    with pytest.raises(ModelError, match="bad parameters"):
        load_model(bad)


def test_model_file_is_mapped_not_copied(tiny_memory):
    meta, arrays, _ = modelfile.load(tiny_memory)
    mem = arrays["memory"]
    assert not mem.flags.writeable and not mem.flags.owndata  # a view of the mapping
    m = load_model(tiny_memory)
    assert np.shares_memory(m.inner.memory[0], m.inner.arrays["memory"])


def test_info_and_train_say_what_the_file_holds(tiny_memory, tiny_plain):
    from click.testing import CliRunner

    from lcodec.cli import main

    out = CliRunner().invoke(main, ["info", tiny_memory])
    assert out.exit_code == 0 and "bytes of the training text itself" in out.output
    out = CliRunner().invoke(main, ["info", tiny_plain])
    assert out.exit_code == 0 and "no training text" in out.output


def test_kernel_cache_forgets_when_a_called_module_changes(tmp_path):
    """numba keeps a module's compiled kernels while its own source is unchanged; braid's
    kernels inline recall's and strata's, so their sources are stamped beside braid's cache."""
    from lcodec.models.kernel_cache import forget_if_changed

    mod, dep = tmp_path / "mod.py", tmp_path / "dep.py"
    mod.write_text("x = 1\n")
    dep.write_text("y = 1\n")
    cache = tmp_path / "__pycache__"
    cache.mkdir()
    kept = cache / "mod._kernel-10.py311.nbi"
    other = cache / "dep._other-3.py311.nbi"
    kept.write_bytes(b"")
    other.write_bytes(b"")
    forget_if_changed(str(mod), [str(dep)])  # no stamp yet: forget, stamp
    assert not kept.exists() and other.exists()
    kept.write_bytes(b"")
    forget_if_changed(str(mod), [str(dep)])  # same sources: keep
    assert kept.exists()
    dep.write_text("y = 2\n")
    forget_if_changed(str(mod), [str(dep)])  # the called module changed: forget
    assert not kept.exists() and other.exists()
    import lcodec.models.braid as B
    stamp = os.path.join(os.path.dirname(B.__file__), "__pycache__", "braid.kernel-deps")
    assert os.path.exists(stamp)


GOLDEN = os.path.join(os.path.dirname(__file__), "golden")


@pytest.mark.parametrize("name,model", [("braid-v2-memory", "braid-memory-tiny"), ("braid-v2-memtree", "braid-memtree-tiny"),
                                        ("braid-v2-cut", "braid-cut-tiny")])
def test_golden_memory_models_and_containers(name, model):
    """The default preset with a corpus memory, braid-tree with one, and the default preset
    with its chain cut short (made by scripts/make_golden.py from log lines of which some
    recur): the containers (first frame in two lanes) decode, also in two threads, and
    re-encode byte for byte."""
    from lcodec.container import read_container

    model = os.path.join(GOLDEN, model + ".lcmodel")
    blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
    meta, arrays, _ = modelfile.load(model)
    p = meta["architecture"]["params"]
    assert (p["recall_min"], p["recall_long"], p["memory_bytes"]) == (8, 16, len(arrays["memory"]))
    assert "recall_prior" in arrays
    assert read_container(blob).frames[0].lanes == 2
    assert lcodec.unpack(blob, model=model) == orig
    assert lcodec.unpack(blob, model=model, workers=2) == orig
    assert lcodec.pack(orig, model=model, frame_size=140_000) == v3_twin(name)


def test_train_memory_option(tmp_path):
    """`lcodec train --memory`: the default keeps the training text (the held-out files joining
    it at the end), a size caps it, 0 keeps none, and a bad size is a usage error. The
    files share a long block (a licence header, as source trees do), so the memory pays."""
    import subprocess
    import sys

    corpus = tmp_path / "corpus"
    corpus.mkdir()
    head = stdlib_file("heapq.py", 3000)
    for name in CORPUS + ["calendar.py", "shlex.py", "textwrap.py"]:
        (corpus / name).write_bytes(head + stdlib_file(name, 12_000))

    def train(*extra):
        out = tmp_path / f"m{len(extra)}{extra[-1] if extra else ''}.lcmodel"
        r = subprocess.run([sys.executable, "-m", "lcodec", "train", str(corpus), "-o", str(out), "--time-limit", "5",
                            *extra], capture_output=True, text=True, timeout=600)
        return r, out

    r, out = train()
    assert r.returncode == 0, r.stderr
    assert "bytes of the training text itself" in r.stderr
    meta, arrays, _ = modelfile.load(str(out))
    mem = bytes(arrays["memory"])
    assert meta["corpus_memory"]["held_out_files_added"] == 1 and meta["corpus_memory"]["stored_bytes"] == len(mem)
    assert all(stdlib_file(n, 12_000)[:2000] in mem for n in CORPUS)  # every file's own text, the held-out one too
    assert mem.count(head[:2000]) == 1  # the shared block once
    r, out = train("--memory", "20K")
    assert r.returncode == 0, r.stderr
    assert len(modelfile.load(str(out))[1]["memory"]) <= 20 << 10
    r, out = train("--memory", "0")
    assert r.returncode == 0 and "no training text" in r.stderr
    assert "memory" not in modelfile.load(str(out))[1]
    r, out = train("--memory", "lots")
    assert r.returncode == 2 and "--memory takes a size" in r.stderr
