"""Model files are data only: nothing in them can run code, and every allocation is
bounded by the file's real size. Crafted files (huge, negative and ill-typed shapes, bad
dtypes, truncated, trailing bytes, oversized metadata, a pickle renamed as a model
file) are refused with lcodec.errors.ModelError, and through the CLI (`lcodec info FILE`,
`lcodec unpack -m FILE`) with exit 1 and one line, no traceback.

Outside references: the SHA-256 trailers of crafted files are computed with hashlib;
the source is inspected with the standard library's ast module; the pickle payload is
made with the standard library's pickle module (its __reduce__ protocol would create a
marker file if anything unpickled it); allocation is measured with tracemalloc.
"""
from __future__ import annotations

import ast
import glob
import hashlib
import json
import os
import pickle
import struct
import subprocess
import sys
import tracemalloc

import numpy as np
import pytest
from click.testing import CliRunner

from lcodec import api
from lcodec.format import modelfile
from lcodec.cli import main as cli_group
from lcodec.errors import ModelError
from lcodec.models import load_model
from lcodec.models.strata import Strata

HERE = os.path.dirname(os.path.abspath(__file__))
PKG = os.path.join(HERE, "..", "lcodec")
ARCH = {"name": "strata", "params": Strata(max_order=3, hash_log2=12).params}


def seal(body: bytes) -> bytes:
    return body + hashlib.sha256(body).digest()  # reference: hashlib's SHA-256


def model_bytes(meta, body: bytes = b"", version: int = 1, mlen: int | None = None) -> bytes:
    text = meta if isinstance(meta, bytes) else json.dumps(meta).encode()
    head = modelfile.MAGIC + struct.pack("<HHI", version, 0, len(text) if mlen is None else mlen)
    return seal(head + text + body)


def arrays_meta(*specs):
    return {"architecture": ARCH, "arrays": [{"name": n, "dtype": d, "shape": s} for n, d, s in specs]}


class Unpickled:
    """Unpickling this creates the marker file (pickle's __reduce__ protocol)."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (open, (self.marker, "w"))


def crafted(tmp_path):
    good = model_bytes({"architecture": ARCH, "arrays": []})
    marker = str(tmp_path / "pickle-ran")
    cases = {
        "huge shape": model_bytes(arrays_meta(("w", "u1", [1 << 40])), b"\0" * 8),
        "huge product": model_bytes(arrays_meta(("w", "i8", [1 << 20, 1 << 20])), b"\0" * 8),
        "zero beside huge": model_bytes(arrays_meta(("w", "u1", [0, 10 ** 30]))),
        "negative shape": model_bytes(arrays_meta(("w", "u1", [-1])), b"\0"),
        "float shape": model_bytes(arrays_meta(("w", "u1", [1.5])), b"\0"),
        "string shape": model_bytes(arrays_meta(("w", "u1", ["3"])), b"\0" * 3),
        "boolean shape": model_bytes(arrays_meta(("w", "u1", [True])), b"\0"),
        "too many dimensions": model_bytes(arrays_meta(("w", "u1", [1] * 40)), b"\0"),
        "shape not a list": model_bytes(arrays_meta(("w", "u1", 7)), b"\0" * 7),
        "float dtype": model_bytes(arrays_meta(("w", "f4", [1])), b"\0" * 4),
        "object dtype": model_bytes(arrays_meta(("w", "O", [1])), pickle.dumps(Unpickled(marker))),
        "byte-order dtype": model_bytes(arrays_meta(("w", "<u1", [1])), b"\0"),
        "void dtype": model_bytes(arrays_meta(("w", "V8", [1])), b"\0" * 8),
        "missing dtype": model_bytes(arrays_meta(("w", None, [1])), b"\0"),
        "name not a string": model_bytes(arrays_meta((5, "u1", [1])), b"\0"),
        "name twice": model_bytes(arrays_meta(("w", "u1", [1]), ("w", "u1", [1])), b"\0\0"),
        "arrays not a list": model_bytes({"architecture": ARCH, "arrays": "w"}),
        "metadata not an object": model_bytes([1, 2]),
        "metadata not JSON": model_bytes(b"{architecture: strata}"),
        "metadata nested too deep": model_bytes(b"[" * 200000 + b"]" * 200000),
        "metadata longer than the file": model_bytes({"architecture": ARCH, "arrays": []}, mlen=1 << 19),
        "metadata over the cap": model_bytes(json.dumps({"architecture": ARCH, "arrays": [],
                                                         "pad": "x" * (modelfile.MAX_META + 10)}).encode()),
        "trailing bytes (resealed)": seal(good[:-32] + b"extra"),
        "trailing bytes": good + b"extra",
        "array short": model_bytes(arrays_meta(("w", "i4", [4])), b"\0" * 15),
        "unknown version": model_bytes({"architecture": ARCH, "arrays": []}, version=2),
        "damaged trailer": good[:-1] + bytes([good[-1] ^ 1]),
        "empty": b"",
        "pickle renamed": pickle.dumps(Unpickled(marker)),
        "numpy file renamed": b"\x93NUMPY\x01\x00" + b"{'descr': '|O', 'fortran_order': False, 'shape': (1,), }" + b" " * 70,
    }
    # Well-formed files whose contents a model refuses when it is built: `info` may
    # describe them, loading (unpack -m, pack -m) refuses them.
    cases.update(LOAD_ONLY := {
        "unknown architecture": model_bytes({"architecture": {"name": "nonesuch"}, "arrays": []}),
        "bad parameters": model_bytes({"architecture": {"name": "strata", "params": {"max_order": 6.0}}, "arrays": []}),
        "weft with a huge window": model_bytes({"architecture": {"name": "weft", "params": {
            "window": 10 ** 12, "embed": 0, "hidden": 1, "m1": 1, "mo": 1, "s1": 1, "so": 1}}, "arrays": [
            {"name": "emb", "dtype": "i1", "shape": [257, 0]}, {"name": "w1", "dtype": "i1", "shape": [0, 1]},
            {"name": "b1", "dtype": "i4", "shape": [1]}, {"name": "w2", "dtype": "i1", "shape": [1, 256]},
            {"name": "b2", "dtype": "i4", "shape": [256]}, {"name": "lut", "dtype": "i4", "shape": [2]}]},
            b"\0" * (4 + 256 + 1024) + struct.pack("<ii", 1 << 20, 1)),
    })
    cases["_load_only"] = set(LOAD_ONLY)
    for cut in (8, 15, 16, 40, len(good) - 33, len(good) - 1):
        cases[f"truncated at {cut}"] = good[:cut]
    load_only = cases.pop("_load_only")
    return cases, marker, load_only


def test_no_code_can_run_from_a_model_file():
    """The model-file reader and the model loaders use no pickle, marshal, eval or exec,
    and no numpy/torch loader that can unpickle."""
    files = [os.path.join(PKG, "modelfile.py")] + sorted(glob.glob(os.path.join(PKG, "models", "*.py")))
    banned_modules = {"pickle", "cPickle", "marshal", "shelve", "dill", "joblib", "cloudpickle"}
    banned_calls = {"eval", "exec", "compile", "__import__"}
    for path in files:
        tree = ast.parse(open(path, encoding="utf-8").read(), path)  # reference: the ast module
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                assert not {a.name.split(".")[0] for a in node.names} & banned_modules, (path, node.lineno)
            elif isinstance(node, ast.ImportFrom):
                assert (node.module or "").split(".")[0] not in banned_modules, (path, node.lineno)
            elif isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in banned_calls, (path, node.lineno)
            elif isinstance(node, ast.Attribute):
                assert node.attr != "allow_pickle", (path, node.lineno)
                if node.attr in ("load", "loads") and isinstance(node.value, ast.Name):  # json.loads is fine
                    assert node.value.id not in ("np", "numpy", "torch", "pickle", "marshal"), (path, node.lineno)
            elif isinstance(node, ast.keyword):
                assert node.arg != "allow_pickle", (path, node.lineno)
    assert set(modelfile.DTYPES) == {"u1", "i1", "i2", "u2", "i4", "u4", "i8"}  # plain integers only: no object arrays


def test_crafted_model_files_are_refused(tmp_path):
    cases, marker, load_only = crafted(tmp_path)
    for name, blob in cases.items():
        if name not in load_only:
            with pytest.raises(ModelError):
                modelfile.parse(blob)
        p = tmp_path / "x.lcm"
        p.write_bytes(blob)
        with pytest.raises(ModelError) as ei:
            load_model(str(p))  # modelfile.load and the architecture's own checks
        assert "model file" in str(ei.value), (name, str(ei.value))
    assert not os.path.exists(marker)  # nothing was unpickled


def test_crafted_model_files_through_the_cli(tmp_path):
    cases, marker, load_only = crafted(tmp_path)
    good = tmp_path / "good.lcm"
    modelfile.dump(str(good), ARCH)
    arc = tmp_path / "a.lcodec"  # made with a model file, so unpack must load the one given
    arc.write_bytes(api.pack(b"02:00 VK-7 wind 4.1 m/s\n" * 10, model=str(good)))
    plain = tmp_path / "plain.lcodec"  # made with the built-in model: a bad -m is refused all the same
    plain.write_bytes(api.pack(b"02:00 VK-7 wind 4.1 m/s\n" * 10))
    runner = CliRunner()
    for name, blob in cases.items():
        p = tmp_path / "bad.lcm"
        p.write_bytes(blob)
        runs = [["unpack", str(a), "-o", str(tmp_path / "out"), "-m", str(p)] for a in (arc, plain)]
        if name not in load_only:
            runs.append(["info", str(p)])
        for argv in runs:
            r = runner.invoke(cli_group, argv)
            assert r.exit_code == 1, (name, argv[0], r.exit_code, r.stderr)
            assert "Traceback" not in r.output + r.stderr and len(r.stderr.strip().splitlines()) == 1, (name, r.stderr)
        assert not (tmp_path / "out").exists()
    assert not os.path.exists(marker)
    # and the real entry point, for the pickle
    p = tmp_path / "pickle.lcm"
    p.write_bytes(cases["pickle renamed"])
    for argv in (["info", str(p)], ["unpack", str(arc), "-o", str(tmp_path / "out"), "-m", str(p)]):
        r = subprocess.run([sys.executable, "-m", "lcodec", *argv], capture_output=True, timeout=120)
        assert r.returncode == 1 and b"Traceback" not in r.stderr, r.stderr
    assert not os.path.exists(marker)


def test_parse_allocates_nothing_a_file_does_not_hold(tmp_path):
    # A 300-byte file claiming a 1 GiB array: refused before anything of that size exists.
    blob = model_bytes(arrays_meta(("w", "u1", [1 << 30])), b"\0" * 64)
    tracemalloc.start()  # reference: the standard library's allocation tracer
    try:
        with pytest.raises(ModelError):
            modelfile.parse(blob)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 1 << 20, peak


def test_a_valid_file_still_loads(tmp_path):
    p = tmp_path / "ok.lcm"
    arrays = {"w": np.arange(6, dtype=np.int16).reshape(2, 3)}
    sha = modelfile.dump(str(p), ARCH, arrays)
    meta, got, sha2 = modelfile.load(str(p))
    assert sha == sha2 == hashlib.sha256(p.read_bytes()).hexdigest()
    assert got["w"].dtype == np.int16 and got["w"].tolist() == [[0, 1, 2], [3, 4, 5]]
