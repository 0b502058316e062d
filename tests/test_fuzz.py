"""A fast subset of scripts/fuzz.py (2,000 malformed archives and model files), and
checks that the harness itself notices crashes, hangs and wrong outputs.

The full run (100,000 inputs, a few minutes) is `python scripts/fuzz.py`; its figures
are in DEVELOPERS.md ("Benchmarks"). The seeds' originals are the Python standard
library's own sources (located with sysconfig) and bytes the harness invents; the
SHA-256 trailers of resealed model files are computed with hashlib, the reference
implementation the model-file format names.
"""
from __future__ import annotations

import importlib.util
import os
import time

import pytest

from lcodec import api

HERE = os.path.dirname(os.path.abspath(__file__))


def load_fuzz():
    spec = importlib.util.spec_from_file_location("lcodec_fuzz_script", os.path.join(HERE, "..", "scripts", "fuzz.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def fuzz():
    return load_fuzz()


def test_two_thousand_malformed_inputs(fuzz, tmp_path):
    s = fuzz.run(n=2000, rng_seed=11, budget=20.0, salvage_every=2, out_dir=str(tmp_path / "found"))
    detail = fuzz.format_summary(s)
    assert s["inputs"] == 2000
    assert s["crashes"] == 0, detail
    assert s["hangs"] == 0, detail
    assert s["wrong_outputs"] == 0, detail
    assert s["verify_decode_disagreements"] == 0, detail
    # every kind of input was made, and most were refused at a checksum
    ops = s["by_operator"]
    for op in ("flip", "insert", "delete", "truncate", "extend", "zero", "splice", "crafted"):
        assert ops.get(op, 0) > 0, ops
    assert any(k.startswith("resealed-") for k in ops)
    assert s["model_files"] > 100 and s["crafted"] > 100 and s["salvage_runs"] > 500
    assert s["refused"] > 0.9 * s["inputs"]
    assert not os.path.exists(tmp_path / "found")  # nothing was saved: nothing was found


def test_harness_counts_a_crash(fuzz, monkeypatch):
    real = api.info

    def buggy(blob):
        if len(blob) % 7 == 3:
            raise IndexError("planted")
        return real(blob)

    monkeypatch.setattr(api, "info", buggy)
    s = fuzz.run(n=150, rng_seed=5, budget=20.0, salvage_every=1000)
    assert s["crashes"] > 0 and "IndexError" in s["crash_list"][0]["key"]


def test_harness_counts_a_wrong_output(fuzz, monkeypatch):
    real = api.decode

    def lying(blob, *a, **k):  # accepts everything it can parse, with its first frame changed
        d = real(blob, *a, **{**k, "keep_going": True})
        d.problems = []
        if d.frames and d.frames[0]:
            d.frames[0] = bytes(len(d.frames[0]))
        d.frames = [f if f is not None else b"" for f in d.frames]
        return d

    monkeypatch.setattr(api, "decode", lying)
    s = fuzz.run(n=300, rng_seed=5, budget=20.0, salvage_every=1000)
    assert s["wrong_outputs"] > 0


def test_harness_counts_a_hang(fuzz, monkeypatch):
    real = api.info
    calls = []

    def slow(blob):
        calls.append(1)
        if len(calls) == 3:
            time.sleep(3)  # interrupted by the harness's alarm after the budget
        return real(blob)

    monkeypatch.setattr(api, "info", slow)
    s = fuzz.run(n=40, rng_seed=5, budget=0.5, salvage_every=1000)
    assert s["hangs"] >= 1


def test_replaying_one_input_is_deterministic(fuzz, tmp_path):
    seeds, models = fuzz.make_seeds(str(tmp_path))
    a = fuzz.one_input(123, 9, seeds, models)
    b = fuzz.one_input(123, 9, seeds, models)
    assert a[:5] == b[:5]
