"""braid: corpus tables braided with per-file adaptation. Integer tables, encoder pass ==
decoder pass, round trips with a model file, hostile model files refused, the golden
model + container, and the mixed model against its two halves."""
import hashlib
import os
import subprocess
import sys

import numpy as np
import pytest

import lcodec
from lcodec import modelfile
from lcodec.braid_build import build
from lcodec.braid_train import nll_bits
from lcodec.errors import ModelError
from lcodec.models import load_model
from lcodec.models import strata as S
from lcodec.models import braid as B
from lcodec.models.braid import Braid
from support import stdlib_file, step_tables, teacher_tables, v3_twin

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")
# reference: modules of the Python standard library (real source files)
CORPUS = ["argparse.py", "ast.py", "configparser.py", "csv.py", "dataclasses.py", "difflib.py", "enum.py"]
HELD_OUT = ["calendar.py", "shlex.py", "textwrap.py"]


def params(order):
    p = {"corpus_order": order, **S.PRESETS["o6m"]}
    p["discount"] = [list(r) for r in p["discount"]]
    return p


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """A braid model file counted from a few standard-library modules (orders 0-4)."""
    files = [stdlib_file(f) for f in CORPUS]
    arrays = build(files, 4, 2)
    path = str(tmp_path_factory.mktemp("braid") / "tiny.lcmodel")
    modelfile.dump(path, {"name": "braid", "params": params(4)}, arrays)
    return path


def test_parallel_pass_equals_step_pass(tiny):
    m = load_model(tiny)
    data = stdlib_file("shlex.py", 30_000)
    for lanes in (1, 3, 16):
        a = teacher_tables(m, data, lanes, chunk=53)
        assert np.array_equal(a, teacher_tables(m, data, lanes))  # chunking changes nothing
        assert np.array_equal(a, step_tables(m, data, lanes))
        assert (a == np.floor(a)).all() and (a >= 1).all()


def test_tables_depend_only_on_earlier_bytes(tiny):
    # the causal property: changing byte i and later leaves the tables of 0..i unchanged
    m = load_model(tiny)
    data = bytearray(stdlib_file("textwrap.py", 3000))
    a = teacher_tables(m, bytes(data), 1)
    data[1500:] = bytes(reversed(data[1500:]))
    b = teacher_tables(m, bytes(data), 1)
    assert np.array_equal(a[:1501], b[:1501])
    assert not np.array_equal(a[1501:], b[1501:])


def test_round_trip_and_wrong_model(tiny, tmp_path):
    data = stdlib_file("calendar.py")
    blob = lcodec.pack(data, model=tiny, frame_size=20_000)
    assert lcodec.unpack(blob, model=tiny) == data
    assert len(blob) < len(lcodec.pack(data, frame_size=20_000))  # the corpus helps
    with pytest.raises(ModelError, match="needs the braid model file"):
        lcodec.unpack(blob)
    other = str(tmp_path / "other.lcmodel")
    modelfile.dump(other, {"name": "braid", "params": params(3)}, build([stdlib_file("csv.py")], 3, 2))
    with pytest.raises(ModelError, match="wrong model"):
        lcodec.unpack(blob, model=other)


def test_frames_decoded_in_threads(tiny):
    """Frames decoded side by side in threads (unpack workers=2) share the corpus tables but
    not their scratch: each frame's probe results are its own (they were shared once, and
    frames then decoded each other's contexts)."""
    data = b"".join(stdlib_file(n) for n in ("calendar.py", "shlex.py", "textwrap.py", "heapq.py"))
    blob = lcodec.pack(data, model=tiny, frame_size=16_000)
    for _ in range(3):
        assert lcodec.unpack(blob, model=tiny, workers=2) == data


def test_same_archive_across_processes_and_thread_settings(tiny, tmp_path):
    src = tmp_path / "in.py"
    src.write_bytes(stdlib_file("textwrap.py") * 3)
    code = ("import sys, hashlib, lcodec; d = open(sys.argv[1], 'rb').read(); "
            "print(hashlib.sha256(lcodec.pack(d, model=sys.argv[2], frame_size=40000)).hexdigest())")
    digests = {hashlib.sha256(lcodec.pack(src.read_bytes(), model=tiny, frame_size=40000)).hexdigest()}
    for threads in ("1", "2"):
        env = dict(os.environ, NUMBA_NUM_THREADS=threads, OMP_NUM_THREADS=threads)
        out = subprocess.run([sys.executable, "-c", code, str(src), tiny], env=env, capture_output=True, text=True, check=True)
        digests.add(out.stdout.strip())
    assert len(digests) == 1


def test_mixed_never_worse_than_its_better_half(tiny):
    """On held-out files the braid costs at most 1% more than the better of its halves:
    the corpus tables alone (prior only) and strata alone (adaptive only)."""
    meta, arrays, _ = modelfile.load(tiny)
    mixed = load_model(tiny)
    prior = Braid(meta["architecture"]["params"], arrays, prior_only=True)
    for name in HELD_OUT:
        data = stdlib_file(name)
        b_mixed, b_prior, b_adapt = nll_bits(mixed, data), nll_bits(prior, data), nll_bits(S.Strata(), data)
        assert b_mixed <= 1.01 * min(b_prior, b_adapt), (name, b_mixed, b_prior, b_adapt)


def test_learned_hit_rates_round_trip(tiny, tmp_path):
    """A model whose repeat-model cells start from held-out hit rates (as training writes
    them) codes and decodes exactly, and its cells differ from the default."""
    from lcodec.braid_train import match_prior

    meta, arrays, _ = modelfile.load(tiny)
    prior = match_prior(load_model(tiny).inner, [stdlib_file(n) for n in HELD_OUT])
    assert prior is not None and prior.shape == (S.MATCH_LENGTHS * S.MATCH_LEVELS, 2)
    path = str(tmp_path / "prior.lcmodel")
    modelfile.dump(path, meta["architecture"], {**arrays, "match_prior": prior})
    m = load_model(path)
    data = stdlib_file("textwrap.py")
    assert np.array_equal(teacher_tables(m, data[:9000], 2), step_tables(m, data[:9000], 2))
    assert lcodec.unpack(lcodec.pack(data, model=path), model=path) == data
    assert not np.array_equal(teacher_tables(m, data[:9000], 1), teacher_tables(load_model(tiny), data[:9000], 1))


def test_counts_follow_the_recipe():
    # order 1 after b"ab" * 3 + b"ac": raw counts at the top order; continuation counts below
    arrays = build([b"abababac"], 1, 1)
    Braid(params(1), arrays)  # the tables pass the loader's checks
    tags, start, sym, cnt = arrays["tags"], arrays["start"], arrays["sym"], arrays["cnt"]
    rows = {}
    base = 0
    for k, size in enumerate(arrays["sizes"].tolist()):
        for j in range(base, base + size):
            if tags[j]:
                rows.setdefault(k, []).append(dict(zip(sym[start[j]:start[j + 1]].tolist(), cnt[start[j]:start[j + 1]].tolist())))
        base += size
    # order 1: after 'a' came b three times and c once; after 'b' came a three times; at
    # the start (context 0) came 'a' once
    assert sorted(map(sorted, (r.items() for r in rows[1]))) == sorted([[(97, 1)], [(98, 3), (99, 1)], [(97, 3)]])
    # order 0: each byte counted once per distinct order-1 context it followed: a after
    # {start, b}, b after {a}, c after {a}
    assert rows[0] == [{97: 2, 98: 1, 99: 1}]


@pytest.mark.parametrize("damage", ["sizes", "start", "no_empty_slot", "zero_count", "discount", "match_prior"])
def test_hostile_model_files_are_refused(tiny, tmp_path, damage):
    meta, arrays, _ = modelfile.load(tiny)
    arrays = {k: v.copy() for k, v in arrays.items()}
    if damage == "sizes":
        arrays["sizes"][0] += 1
    elif damage == "start":
        arrays["start"][-1] += 5
    elif damage == "no_empty_slot":
        arrays["tags"][:arrays["sizes"][0]] = 7
    elif damage == "zero_count":
        arrays["cnt"][3] = 0
    elif damage == "discount":
        arrays["corpus_discount"][0, 0] = 99
    else:
        arrays["match_prior"] = np.full((S.MATCH_LENGTHS * S.MATCH_LEVELS, 2), [40, 32], np.int32)  # hits > trials
    bad = str(tmp_path / "bad.lcmodel")
    modelfile.dump(bad, meta["architecture"], arrays)
    with pytest.raises(ModelError, match="bad parameters"):
        load_model(bad)


def test_golden_model_and_container():
    model = os.path.join(GOLDEN, "braid-tiny.lcmodel")
    blob = open(os.path.join(GOLDEN, "braid-v2-text.lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, "braid-v2-text.orig"), "rb").read()
    assert lcodec.unpack(blob, model=model) == orig
    assert lcodec.pack(orig, model=model, frame_size=4096) == v3_twin("braid-v2-text")


def test_golden_mixed_model_and_container():
    """The default preset since the escape weights (made by scripts/make_golden.py): its
    parameters name every new part, and the container (first frame in two lanes) still
    decodes and re-encodes byte for byte."""
    from lcodec.container import read_container

    model = os.path.join(GOLDEN, "braid-mixed-tiny.lcmodel")
    blob = open(os.path.join(GOLDEN, "braid-v2-mixed.lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, "braid-v2-mixed.orig"), "rb").read()
    p = modelfile.load(model)[0]["architecture"]["params"]
    assert p["mix_shift"] == 16 and p["lane_tables"] == 1 and p["sse_bits"] == 10
    assert read_container(blob).frames[0].lanes == 2
    assert lcodec.unpack(blob, model=model) == orig
    assert lcodec.pack(orig, model=model, frame_size=140_000) == v3_twin("braid-v2-mixed")


def test_golden_fork_model_and_container():
    """The braid-tree preset (braid plus the tree refinement; made by scripts/make_golden.py): its
    parameters name the refinement, and the container (first frame in two lanes) still
    decodes and re-encodes byte for byte; decoding it in two threads agrees."""
    from lcodec.container import read_container

    model = os.path.join(GOLDEN, "braid-fork-tiny.lcmodel")
    blob = open(os.path.join(GOLDEN, "braid-v2-fork.lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, "braid-v2-fork.orig"), "rb").read()
    p = modelfile.load(model)[0]["architecture"]["params"]
    assert (p["fork_shift"], p["fork_mix_shift"], p["fork_cut"]) == (3, 15, 7) and p["mix_shift"] == 16
    assert read_container(blob).frames[0].lanes == 2
    assert lcodec.unpack(blob, model=model) == orig
    assert lcodec.unpack(blob, model=model, workers=2) == orig
    assert lcodec.pack(orig, model=model, frame_size=140_000) == v3_twin("braid-v2-fork")


def test_golden_fork2_model_and_container():
    """The braid-tree preset with the refinement's later parts (context-picked weight sets,
    two more inputs, the final stage): the container decodes and re-encodes byte for byte,
    also in two threads, and is smaller than the first refinement's on the same model."""
    from lcodec.braid_train import PRESETS

    model = os.path.join(GOLDEN, "braid-fork2-tiny.lcmodel")
    blob = open(os.path.join(GOLDEN, "braid-v2-fork2.lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, "braid-v2-fork2.orig"), "rb").read()
    p = modelfile.load(model)[0]["architecture"]["params"]
    assert {k: p[k] for k in PRESETS["braid-tree"]["fork"]} == PRESETS["braid-tree"]["fork"]
    assert lcodec.unpack(blob, model=model) == orig
    assert lcodec.unpack(blob, model=model, workers=2) == orig
    assert lcodec.pack(orig, model=model, frame_size=140_000) == v3_twin("braid-v2-fork2")
    assert len(blob) < len(lcodec.pack(orig, model=os.path.join(GOLDEN, "braid-fork-tiny.lcmodel"), frame_size=140_000))


def test_train_cli_default_preset_is_braid(tmp_path):
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    for name in CORPUS:
        (corpus / name).write_bytes(stdlib_file(name))
    out = tmp_path / "m.lcmodel"
    r = subprocess.run([sys.executable, "-m", "lcodec", "train", str(corpus), "-o", str(out), "--time-limit", "5"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert "exported braid model: validation" in r.stderr
    meta, _, _ = modelfile.load(str(out))
    assert meta["architecture"]["name"] == "braid" and meta["validation"]["integer_bpb"] > 0
    assert "fork_shift" not in meta["architecture"]["params"]  # the tree refinement is preset braid-tree's
    from lcodec.braid_train import PRESETS
    assert PRESETS["braid-tree"] == dict(PRESETS["braid"], fork=dict(fork_shift=3, fork_mix_shift=15, fork_cut=7,
                                                                     fork_sets=1, fork_inputs=1, fork_final=6))
    r2 = subprocess.run([sys.executable, "-m", "lcodec", "train", str(corpus), "-o", str(out)], capture_output=True, text=True)
    assert r2.returncode == 2 and "exists" in r2.stderr  # never overwritten without --force


def test_bare_model_object_cannot_pack(tiny):
    """Archives name a braid model by its file's SHA-256: an object not loaded from a file
    (for instance the prior-only one used for the ablation) must refuse to pack."""
    meta, arrays, _ = modelfile.load(tiny)
    with pytest.raises(ValueError, match="model file"):
        lcodec.pack(b"some bytes to pack", model=Braid(meta["architecture"]["params"], arrays, prior_only=True))


# -- the layers' learned escape weights, secondary estimation and lanes' own tables ------------
def mixed_params(order, **extra):
    return {**params(order), "mix_shift": 16, "lane_tables": 1, **extra}


@pytest.fixture(scope="module")
def tiny_mixed(tmp_path_factory):
    """The tiny model with the escape weights on, started from a table fitted on held-out
    files (as training writes it), lanes with their own tables and secondary estimation."""
    from lcodec.braid_train import mix_weights

    files = [stdlib_file(f) for f in CORPUS]
    arrays = build(files, 4, 2)
    p = mixed_params(4, sse_bits=8)
    init = mix_weights(Braid(p, arrays), [stdlib_file(n) for n in HELD_OUT])
    path = str(tmp_path_factory.mktemp("braidmix") / "tiny-mixed.lcmodel")
    modelfile.dump(path, {"name": "braid", "params": p}, {**arrays, "mix_init": init})
    return path


def test_odds_table_is_exact():
    """Every entry is floor(2**16 * 2**(i/64)): checked against Python's float power (the
    float result is within 1e-9 relative of the true value, far inside one unit here)."""
    from lcodec.models.braid import ODDS, WMAX

    i = np.arange(-WMAX, WMAX + 1)
    ref = np.floor(2.0 ** 16 * 2.0 ** (i / 64))
    assert ODDS.dtype == np.int64 and np.abs(ODDS - ref).max() <= 1
    assert ODDS[WMAX] == 1 << 16 and ODDS[WMAX + 64] == 1 << 17 and ODDS[0] == 1 << 8  # exact powers of two
    assert (np.diff(ODDS) > 0).all()


@pytest.mark.parametrize("which", ["tiny_mixed", "tiny_fork", "tiny_fork2", "tiny_cut"])
def test_mixed_and_fork_parallel_pass_equals_step_pass(which, request):
    """Escape weights (tiny_mixed), and with the tree refinement too (tiny_fork; tiny_fork2
    with its weight sets, extra inputs and final stage): the
    teacher pass in any chunking equals the decoder's step pass, for 1, 3 and 16 lanes."""
    m = load_model(request.getfixturevalue(which))
    data = stdlib_file("shlex.py", 30_000)
    for lanes in (1, 3, 16):
        a = teacher_tables(m, data, lanes, chunk=53)
        assert np.array_equal(a, teacher_tables(m, data, lanes))
        assert np.array_equal(a, step_tables(m, data, lanes)), lanes
        assert (a == np.floor(a)).all() and (a >= 1).all()


def test_escape_weights_move_and_are_integers(tiny_mixed):
    """The weights a frame leaves differ from where it started (they adapt), are integers
    within their clamp, and the same frame run twice leaves the same weights."""
    from lcodec.coding.coder import lane_layout
    from lcodec.models.braid import MIX_CLASSES, WFRAC, WMAX

    m = load_model(tiny_mixed).inner
    x = np.frombuffer(stdlib_file("textwrap.py", 20_000), np.uint8)
    starts, lengths = lane_layout(len(x), 3)
    runs = []
    for _ in range(2):
        w = m.mix_init.astype(np.int64)
        for _ in m.teacher_chunks(x, starts, lengths, mix_weights=w):
            pass
        runs.append(w)
    assert runs[0].dtype == np.int64 and runs[0].shape == (MIX_CLASSES,)
    assert np.array_equal(runs[0], runs[1]) and not np.array_equal(runs[0], m.mix_init)
    assert np.abs(runs[0]).max() <= WMAX << WFRAC


def test_mixed_round_trip_threads_and_wrong_model(tiny_mixed, tiny, tmp_path):
    data = stdlib_file("calendar.py") + stdlib_file("textwrap.py") * 4  # > 128 KiB: several lanes
    blob = lcodec.pack(data, model=tiny_mixed, frame_size=100_000)
    assert lcodec.unpack(blob, model=tiny_mixed) == data
    assert lcodec.unpack(blob, model=tiny_mixed, workers=2) == data
    with pytest.raises(ModelError, match="wrong model.*sha256"):
        lcodec.unpack(blob, model=tiny)
    src = tmp_path / "in.py"
    src.write_bytes(data)
    code = ("import sys, hashlib, lcodec; d = open(sys.argv[1], 'rb').read(); "
            "print(hashlib.sha256(lcodec.pack(d, model=sys.argv[2], frame_size=300000)).hexdigest())")
    digests = {hashlib.sha256(lcodec.pack(data, model=tiny_mixed, frame_size=300000)).hexdigest()}
    for threads in ("1", "2"):
        env = dict(os.environ, NUMBA_NUM_THREADS=threads, OMP_NUM_THREADS=threads)
        out = subprocess.run([sys.executable, "-c", code, str(src), tiny_mixed], env=env, capture_output=True,
                             text=True, check=True)
        digests.add(out.stdout.strip())
    assert len(digests) == 1


def test_mixed_never_worse_than_its_parts(tiny_mixed):
    """On held-out files the model with escape weights costs at most 1% more than the
    better of its parts: the plain chain (same tables, weights off) and strata alone."""
    meta, arrays, _ = modelfile.load(tiny_mixed)
    mixed = load_model(tiny_mixed)
    plain = Braid(params(4), {k: v for k, v in arrays.items() if k != "mix_init"})
    for name in ("calendar.py", "shlex.py", "textwrap.py", "heapq.py"):
        data = stdlib_file(name)
        b_mixed, b_plain, b_adapt = nll_bits(mixed, data), nll_bits(plain, data), nll_bits(S.Strata(), data)
        assert b_mixed <= 1.01 * min(b_plain, b_adapt), (name, b_mixed, b_plain, b_adapt)


@pytest.mark.parametrize("damage", ["mix_shift", "sse_bits", "lane_tables", "mix_init_range", "mix_init_shape"])
def test_hostile_mixed_model_files_are_refused(tiny_mixed, tmp_path, damage):
    meta, arrays, _ = modelfile.load(tiny_mixed)
    arch = {"name": "braid", "params": dict(meta["architecture"]["params"])}
    arrays = {k: v.copy() for k, v in arrays.items()}
    if damage == "mix_shift":
        arch["params"]["mix_shift"] = 3
    elif damage == "sse_bits":
        arch["params"]["sse_bits"] = 40
    elif damage == "lane_tables":
        arch["params"]["lane_tables"] = 2
    elif damage == "mix_init_range":
        arrays["mix_init"][5] = 1 << 30
    else:
        arrays["mix_init"] = arrays["mix_init"][:-1].copy()
    bad = str(tmp_path / "bad.lcmodel")
    modelfile.dump(bad, arch, arrays)
    with pytest.raises(ModelError, match="bad parameters"):
        load_model(bad)


# -- refinement on the byte's binary tree (model parameters fork_*) ----------------------------
FORK = {"fork_shift": 3, "fork_mix_shift": 15, "fork_cut": 10}  # (the preset cuts at 7; 10 refines more nodes)
FORK2 = {**FORK, "fork_sets": 1, "fork_inputs": 1, "fork_final": 6}


def _with_params(tmp_path_factory, base: str, name: str, extra: dict) -> str:
    """The model file `base` with `extra` added to its parameters, written as NAME.lcmodel."""
    meta, arrays, _ = modelfile.load(base)
    path = str(tmp_path_factory.mktemp(name) / f"{name}.lcmodel")
    modelfile.dump(path, {"name": "braid", "params": {**meta["architecture"]["params"], **extra}}, arrays)
    return path


@pytest.fixture(scope="module")
def tiny_fork(tmp_path_factory, tiny_mixed):
    """tiny_mixed with the tree refinement on."""
    return _with_params(tmp_path_factory, tiny_mixed, "tiny-fork", FORK)


@pytest.fixture(scope="module")
def tiny_fork2(tmp_path_factory, tiny_mixed):
    """tiny_mixed with the tree refinement and all its later parts on."""
    return _with_params(tmp_path_factory, tiny_mixed, "tiny-fork2", FORK2)


@pytest.mark.parametrize("which", ["tiny_fork", "tiny_fork2"])
def test_fork_tables_depend_only_on_earlier_bytes(which, request):
    m = load_model(request.getfixturevalue(which))
    data = bytearray(stdlib_file("textwrap.py", 3000))
    a = teacher_tables(m, bytes(data), 1)
    data[1500:] = bytes(reversed(data[1500:]))
    b = teacher_tables(m, bytes(data), 1)
    assert np.array_equal(a[:1501], b[:1501])


@pytest.mark.parametrize("which", ["tiny_fork", "tiny_fork2"])
def test_fork_round_trip_threads_and_processes(which, request, tiny_mixed, tmp_path):
    tiny_fork = request.getfixturevalue(which)
    data = stdlib_file("calendar.py") + stdlib_file("textwrap.py") * 4  # > 128 KiB: several lanes
    blob = lcodec.pack(data, model=tiny_fork, frame_size=100_000)
    assert lcodec.unpack(blob, model=tiny_fork) == data
    assert lcodec.unpack(blob, model=tiny_fork, workers=2) == data
    assert blob != lcodec.pack(data, model=tiny_mixed, frame_size=100_000)  # the refinement is on
    src = tmp_path / "in.py"
    src.write_bytes(data)
    code = ("import sys, hashlib, lcodec; d = open(sys.argv[1], 'rb').read(); "
            "print(hashlib.sha256(lcodec.pack(d, model=sys.argv[2], frame_size=300000)).hexdigest())")
    digests = {hashlib.sha256(lcodec.pack(data, model=tiny_fork, frame_size=300000)).hexdigest()}
    for threads in ("1", "2"):
        env = dict(os.environ, NUMBA_NUM_THREADS=threads, OMP_NUM_THREADS=threads)
        out = subprocess.run([sys.executable, "-c", code, str(src), tiny_fork], env=env, capture_output=True,
                             text=True, check=True)
        digests.add(out.stdout.strip())
    assert len(digests) == 1


def test_fork_never_worse_than_without(tiny_fork, tiny_fork2, tiny_mixed):
    """On held-out files the refinement costs at most 1% more than the same model without
    it and than strata alone; its later parts at most 1% more than the refinement without
    them (and less in total)."""
    on, on2, off = load_model(tiny_fork), load_model(tiny_fork2), load_model(tiny_mixed)
    t1 = t2 = 0.0
    for name in ("calendar.py", "shlex.py", "textwrap.py", "heapq.py"):
        data = stdlib_file(name)
        b_on, b_off, b_adapt = nll_bits(on, data), nll_bits(off, data), nll_bits(S.Strata(), data)
        b_on2 = nll_bits(on2, data)
        assert b_on <= 1.01 * min(b_off, b_adapt), (name, b_on, b_off, b_adapt)
        assert b_on2 <= 1.01 * min(b_on, b_off, b_adapt), (name, b_on2, b_on)
        t1, t2 = t1 + b_on, t2 + b_on2
    assert t2 < t1


def _fork_reference_tables():
    """The constant tables from their definitions, in Python integers only."""
    from math import isqrt

    from lcodec.models.braid import FORK_LIM, FORK_ONE

    def o30(i):
        q, j = divmod(i, 64)
        y = 1 << (64 * 60 + j)
        for _ in range(6):
            y = isqrt(y)
        return y >> (30 - q)

    odds = [o30(i) for i in range(-FORK_LIM, FORK_LIM + 1)]
    sq = [min(max((o << 16) // (o + (1 << 30)), 1), FORK_ONE - 1) for o in odds]
    return odds, sq


def test_fork_constant_tables_are_exact():
    """FORK_STRETCH and FORK_SQUASH against their definitions in Python integers (every
    entry of the squash; the stretch at its limits, every 97th q and around every grid
    point), and against floats within one step."""
    from lcodec.models.braid import FORK_GRID, FORK_LIM, FORK_ONE, FORK_SQUASH, FORK_STEP, FORK_STRETCH

    odds, sq = _fork_reference_tables()
    assert FORK_SQUASH.tolist() == sq and FORK_GRID.tolist() == sq[::FORK_STEP]

    def stretch(q):
        if q == 0:
            return -FORK_LIM
        t = (q << 30) // (FORK_ONE - q)
        best = -FORK_LIM
        for k, o in enumerate(odds):  # the largest step whose odds are <= t
            if o <= t:
                best = k - FORK_LIM
        return best

    qs = sorted({0, 1, 2, 3, FORK_ONE // 2 - 1, FORK_ONE // 2, FORK_ONE // 2 + 1, FORK_ONE - 2, FORK_ONE - 1,
                 *range(5, FORK_ONE, 97), *(s + d for s in sq for d in (-1, 0, 1) if 0 <= s + d < FORK_ONE)})
    assert all(int(FORK_STRETCH[q]) == stretch(q) for q in qs)
    q = np.arange(1, FORK_ONE)
    ref = np.clip(np.floor(64 * np.log2(q / (FORK_ONE - q))), -FORK_LIM, FORK_LIM)
    assert np.abs(FORK_STRETCH[1:] - ref).max() <= 1 and (np.diff(FORK_STRETCH) >= 0).all()


def _py_fork_predict(st, p, cut_shift, tabrows, wsum, grid, pre=None, expect=-1, finrows=None):
    """The refinement of one distribution in Python integers: tabrows[u][n] is table u's
    row for node n (the lane's contexts; stored share + 1, 0 = never read, set to the grid's
    share + 1 here as the kernel does), wsum[n] the node's mixer weights (the sum of its
    sets); pre: the distribution before the repeat model (fork_inputs), expect: the
    repeat's byte or -1, finrows[n]: the final stage's row (fork_final)."""
    from lcodec.models.braid import FORK_LIM, FORK_MASS, FORK_ONE, FORK_POINTS, FORK_REPEAT_X, FORK_SQUASH

    def sums(v):
        sub = [0] * 512
        for s in range(256):
            sub[256 + s] = int(v[s]) + 1
        for n in range(255, 0, -1):
            sub[n] = sub[2 * n] + sub[2 * n + 1]
        return sub

    def read(row, j, w):
        for g in (j, j + 1):
            if row[g] == 0:
                row[g] = int(grid[g]) + 1
        return min(max(((row[j] - 1) * (64 - w) + (row[j + 1] - 1) * w) >> 6, 1), FORK_ONE - 1)

    def place(i):
        j, w = i >> 6, i & 63
        return (FORK_POINTS - 2, 64) if j >= FORK_POINTS - 1 else (j, w)

    sub = sums(p)
    sub0 = sums(pre) if pre is not None else None
    out = [int(v) for v in p]
    mass = {1: FORK_MASS}
    pos, xin, pout, fpos = {}, {}, {}, {}
    cut = FORK_MASS >> cut_shift
    for n in range(1, 256):
        if n not in mass:
            continue
        m = mass[n]
        if m < cut:
            d = n.bit_length() - 1
            span = 256 >> d
            s0 = n * span - 256
            fac = (m << 24) // sub[n]
            for s in range(s0, s0 + span):
                out[s] = ((out[s] + 1) * fac) >> 24
            continue
        q = min(max((sub[2 * n + 1] << 16) // (sub[2 * n] + sub[2 * n + 1]), 1), FORK_ONE - 1)
        i = int(st[q]) + FORK_LIM
        pos[n] = i
        j, w = place(i)
        xs = [i - FORK_LIM] + [int(st[read(rows[n], j, w)]) for rows in tabrows]
        if sub0 is not None:
            q0 = min(max((sub0[2 * n + 1] << 16) // (sub0[2 * n] + sub0[2 * n + 1]), 1), FORK_ONE - 1)
            dep = n.bit_length() - 1
            bit = 0
            if expect >= 0 and (expect + 256) >> (8 - dep) == n:
                bit = FORK_REPEAT_X if (expect >> (7 - dep)) & 1 else -FORK_REPEAT_X
            xs += [int(st[q0]), bit]
        dot = sum(int(a) * b for a, b in zip(wsum[n], xs))
        d = min(max(dot >> 16, -FORK_LIM), FORK_LIM)
        f = int(FORK_SQUASH[d + FORK_LIM])
        xin[n], pout[n] = xs, f
        if finrows is not None:
            fpos[n] = d + FORK_LIM
            f = (f + read(finrows[n], *place(d + FORK_LIM))) >> 1
        hi = (m * f) >> 16
        if n < 128:
            mass[2 * n], mass[2 * n + 1] = m - hi, hi
        else:
            out[2 * n - 256], out[2 * n - 255] = m - hi, hi
    return out, pos, xin, pout, fpos


@pytest.mark.parametrize("more", [{}, {"fork_sets": 1, "fork_inputs": 1, "fork_final": 6}])
def test_fork_arithmetic_matches_python_integers(more):
    """_fork_predict and _fork_update against a Python-integer reimplementation, on
    distributions at the limits (one byte holding nearly all of 2**22, every byte at its
    largest, all zero, two bytes) and random ones, with trained-looking and never-read
    table points and mixer weights at their clamps; the kernel's state after the update
    is compared too. `more`: the refinement alone, and with its weight sets, extra inputs
    and final stage."""
    from lcodec.models.braid import (FORK_GRID, FORK_INPUTS, FORK_LIM, FORK_ONE, FORK_POINTS, FORK_SETS_A,
                                     FORK_SETS_B, FORK_STRETCH, FORK_TABLES, FORK_WMAX, _fork_predict, _fork_update)

    rng = np.random.default_rng(5)
    arrays = build([b"abc abd abe\n" * 40], 2, 2)
    m = Braid({**params(2), **FORK, **more}, arrays)
    full = bool(more)
    cases = []
    big = np.zeros(256, np.int64)
    big[65] = (1 << 22) - 300
    cases.append(big)
    cases.append(np.full(256, (1 << 14) - 1, np.int64))  # 256 * 2**14 = 2**22
    cases.append(np.zeros(256, np.int64))
    two = np.zeros(256, np.int64)
    two[0], two[255] = 1 << 21, (1 << 21) - 1
    cases.append(two)
    for _ in range(12):
        v = rng.integers(0, 1 << 14, 256) * (rng.random(256) < rng.random())
        v[rng.integers(0, 256)] += rng.integers(0, 1 << 21)
        cases.append(v.astype(np.int64))
    n_in = FORK_INPUTS if full else FORK_TABLES + 1
    for k, p in enumerate(cases):
        fork = m.new_fork(1)
        wts = fork[10]
        wts[:, :n_in] = rng.choice([-FORK_WMAX, FORK_WMAX, 1 << 14, -(1 << 12), 1 << 16], (len(wts), n_in))
        sets = [0]
        if full:
            sets = [int(rng.integers(0, FORK_SETS_A)) * 256, (FORK_SETS_A + int(rng.integers(0, FORK_SETS_B))) * 256]
            fork[15][0] = sets
            fork[14][:] = cases[(k + 5) % len(cases)]  # the distribution before the repeat model
        expect = int(np.argmax(p)) if k % 3 == 0 else (int(rng.integers(0, 256)) if k % 3 == 1 else -1)
        hist = np.uint64(int(rng.integers(0, 1 << 62)))
        buf = np.frombuffer(b"x = 1\n    y = 2\n   ", np.uint8).copy()
        cur = len(buf) - 1
        fork[5][0] = (6, 0)  # line starts: the current line at 6, the one before at 0
        pk = p.copy()
        # set the tables of the contexts this byte will read to extreme, random and unread points
        _fork_predict(fork, 0, hist, pk.copy(), buf, cur, expect)
        ctx = list(fork[6][0][:FORK_TABLES + (1 if full else 0)])
        for c in ctx:
            fork[0][c * 256:(c + 1) * 256] = rng.choice([0, 1, 2, FORK_ONE, FORK_ONE + 1, 778, 40001], (256, FORK_POINTS))
        tabrows = [[list(map(int, r)) for r in fork[0][c * 256:(c + 1) * 256]] for c in ctx]
        finrows = tabrows.pop() if full else None
        w0 = wts.copy()
        wsum = [sum(w0[s + n].astype(object) for s in sets)[:n_in].tolist() for n in range(256)]
        ref, pos, xin, pout, fpos = _py_fork_predict(FORK_STRETCH, p, 10, tabrows, wsum, FORK_GRID,
                                                     fork[14].copy() if full else None, expect, finrows)
        _fork_predict(fork, 0, hist, pk, buf, cur, expect)
        assert pk.tolist() == ref, k
        sym = int(rng.integers(0, 256)) if k % 2 else int(np.argmax(p))
        _fork_update(fork, 0, np.int64(sym), cur)
        # the update in Python integers
        n = 1
        for bit in range(7, -1, -1):
            if n not in pos:
                break
            y = (sym >> bit) & 1
            tgt = y << 16
            j, w = pos[n] >> 6, pos[n] & 63
            if j >= FORK_POINTS - 1:
                j, w = FORK_POINTS - 2, 64
            for rows in tabrows:
                row = rows[n]
                row[j] += ((tgt - row[j] + 1) * (64 - w)) >> 9
                row[j + 1] += ((tgt - row[j + 1] + 1) * w) >> 9
            if finrows is not None:
                row = finrows[n]
                j, w = fpos[n] >> 6, fpos[n] & 63
                if j >= FORK_POINTS - 1:
                    j, w = FORK_POINTS - 2, 64
                row[j] += ((tgt - row[j] + 1) * (64 - w)) >> 12
                row[j + 1] += ((tgt - row[j + 1] + 1) * w) >> 12
            err = tgt - pout[n]
            for s in sets:
                w0[s + n][:n_in] = [min(max(int(a) + ((x * err) >> 15), -FORK_WMAX), FORK_WMAX)
                                    for a, x in zip(w0[s + n][:n_in], xin[n])]
            n = 2 * n + y
        for rows, c in zip(tabrows + ([finrows] if full else []), ctx):
            assert fork[0][c * 256:(c + 1) * 256].tolist() == rows, (k, c)
        assert np.array_equal(wts, w0), k
        assert FORK_LIM < 1 << 10


@pytest.mark.parametrize("damage", ["partial", "shift", "cut", "kind", "sets", "inputs", "final", "alone"])
def test_hostile_fork_parameters_are_refused(tiny_fork, tmp_path, damage):
    meta, arrays, _ = modelfile.load(tiny_fork)
    p = dict(meta["architecture"]["params"])
    if damage == "partial":
        del p["fork_cut"]
    elif damage == "shift":
        p["fork_shift"] = 0
    elif damage == "cut":
        p["fork_cut"] = 40
    elif damage == "sets":
        p["fork_sets"] = 2  # would index weight sets that do not exist
    elif damage == "inputs":
        p["fork_inputs"] = True
    elif damage == "final":
        p["fork_final"] = 11
    elif damage == "alone":  # the later parts without the refinement
        for k in ("fork_shift", "fork_mix_shift", "fork_cut"):
            del p[k]
        p["fork_final"] = 6
    else:
        p["fork_mix_shift"] = 15.0
    bad = str(tmp_path / "bad.lcmodel")
    modelfile.dump(bad, {"name": "braid", "params": p}, arrays)
    with pytest.raises(ModelError, match="bad parameters"):
        load_model(bad)


def _ref_file_update(rows, slots, checks, sym, now):
    """Python-integer reference of the file's rows: a dict per row of its tag, counts, the
    bytes seen in order and the step it was last seen (the recipe in _file_update)."""
    for k in range(len(slots) - 1, -1, -1):
        r = rows.setdefault(slots[k], {"tag": None})
        if r["tag"] != checks[k]:
            r.update(tag=checks[k], cnt={}, seen=[], last=0)
        c = r["cnt"].get(sym, 0)
        if c >= S.COUNT_LIMIT:
            r["cnt"] = {s: ((v + 1) >> 1 if v > 1 else v) for s, v in r["cnt"].items()}
            c = r["cnt"][sym]
        r["cnt"][sym] = c + 1
        r["last"] = now
        if c == 0:
            r["seen"].append(sym)
        else:
            for k2 in range(k - 1, -1, -1):
                below = rows.get(slots[k2])
                if below is not None and below["tag"] == checks[k2]:
                    below["last"] = now
            break


def _ref_file_layer(r, disc, A):
    """p and the A left below for one file row, in Python integers (the _file_layer recipe)."""
    a1, a2, a3 = disc[0], disc[1] - disc[0], disc[2] - disc[1]
    cnt = r["cnt"]
    esc = sum(a1 + a2 * (c >= 2) + a3 * (c >= 3) for c in cnt.values())
    inv = (1 << B.INV_BITS) // (sum(cnt.values()) * S.F)
    p = [0] * 256
    for s, c in cnt.items():
        w = ((c * S.F - (a1 + a2 * (c >= 2) + a3 * (c >= 3))) * inv) >> (B.INV_BITS - 31)
        p[s] += (A * w) >> (62 - S.P_BITS)
    return p, (A * ((esc * inv) >> (B.INV_BITS - 31))) >> 31


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_file_rows_match_python_integers(seed):
    # The file's rows keep up to SMALL bytes in their own line, then move to a big row:
    # counts, totals, the step last seen and every layer's share must be those of the plain
    # recipe, through line-to-big-row moves, halvings at 255 (in either form) and rows
    # taken over by another context of the same slot.
    rng = np.random.default_rng(seed)
    n_rows, max_order, steps = 5, 2, 4000
    arrays, gen = B._pool_take(n_rows, (max_order + 1) * steps // (B.SMALL + 1) + 1)
    fs = (arrays[0], arrays[1], None, None, np.uint64(gen), None, np.zeros(2, np.int64), arrays[4])
    try:
        rows, halved = {}, [False]
        disc = np.array([10, 14, 20], np.int64)
        for t in range(steps):
            u = t % 2000  # many bytes (moves to big rows), one byte (halvings), a few
            phase = 0 if u < 400 else (1 if u < 1800 else 2)
            sym = int(rng.integers(0, 256) if phase == 0 else (7 if phase == 1 else rng.integers(60, 70)))
            slots = np.array(rng.choice(n_rows, max_order + 1, replace=False), np.int64)
            # each slot's own context, and now and then another one taking it over
            checks = np.array([(gen << 32) | (2 * int(r) + 1 + int(rng.random() < 0.002)) for r in slots], np.uint64)
            top = rows.get(int(slots[-1]))
            halved[0] |= bool(top and top["tag"] == checks[-1] and top["cnt"].get(sym, 0) >= S.COUNT_LIMIT)
            B._file_update(fs, slots[None], checks[None], 0, max_order, sym, t)  # lane 0 of one
            _ref_file_update(rows, slots.tolist(), checks.tolist(), sym, t)
            if t % 37 and t < steps - 1:
                continue
            meta = arrays[1]
            for r, ref in rows.items():
                chk = int(meta[r, B.TAG_LO]) | (int(meta[r, B.TAG_HI]) << 32)
                assert chk == ref["tag"]
                got = [int(B._file_count(fs, r, s)) for s in range(256)]
                assert got == [ref["cnt"].get(s, 0) for s in range(256)], (t, r)
                c = list(ref["cnt"].values())
                assert [int(meta[r, f]) for f in (B.TOT, B.N1, B.N2, B.N3, B.LAST)] == \
                       [sum(c), len(c), sum(v >= 2 for v in c), sum(v >= 3 for v in c), ref["last"]]
                A = int(rng.integers(1, 1 << 31))
                p = np.zeros(256, np.int64)
                below = B._file_layer(fs, r, disc, p, np.int64(A))
                ref_p, ref_below = _ref_file_layer(ref, disc.tolist(), A)
                assert p.tolist() == ref_p and int(below) == ref_below
        assert fs[6][1] > 3  # rows did move to big rows
        assert halved[0]
    finally:
        B._pool_give(fs)


# -- the chain cut short (model parameter chain_cut) -------------------------------------------
@pytest.fixture(scope="module")
def tiny_cut(tmp_path_factory, tiny_fork2):
    """tiny_fork2 with the chain stopping once less than 2**-6 of the mass is left below."""
    return _with_params(tmp_path_factory, tiny_fork2, "tiny-cut", {"chain_cut": 6})


def test_chain_cut_is_live_costs_little_and_round_trips(tiny_cut, tiny_fork2, tmp_path):
    cut, full = load_model(tiny_cut), load_model(tiny_fork2)
    data = stdlib_file("shlex.py", 30_000)
    a, b = teacher_tables(cut, data, 3), teacher_tables(full, data, 3)
    assert not np.array_equal(a, b)  # the cut changes the tables (a new model version) ...
    for name in ("calendar.py", "textwrap.py"):
        held = stdlib_file(name)
        assert nll_bits(cut, held) <= 1.03 * nll_bits(full, held)  # ... for a few percent at 2**-6
    blob = lcodec.pack(data, model=cut)
    assert lcodec.unpack(blob, model=cut) == data
    with pytest.raises(lcodec.LcodecError):
        lcodec.unpack(blob, model=full)  # archives name the model file they need


@pytest.mark.parametrize("value", [31, -1, "8", 2.0])
def test_hostile_chain_cut_is_refused(tiny_mixed, tmp_path, value):
    meta, arrays, _ = modelfile.load(tiny_mixed)
    bad = str(tmp_path / "bad.lcmodel")
    modelfile.dump(bad, {"name": "braid", "params": {**meta["architecture"]["params"], "chain_cut": value}}, arrays)
    with pytest.raises(ModelError, match="bad parameters"):
        load_model(bad)
