"""Determinism contract: encoder pass == decoder pass, across lanes, processes and thread settings;
committed golden containers decode byte-exactly forever."""
import hashlib
import os
import subprocess
import sys

import numpy as np
import pytest

import lcodec
from lcodec.models.strata import Strata
from support import step_tables, teacher_tables, v3_twin

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")


@pytest.mark.parametrize("lanes", [1, 5, 64])
def test_parallel_pass_equals_step_pass(stdlib_text, lanes):
    data = stdlib_text[:20_000]
    for params in ({}, {"max_order": 3, "hash_log2": 12, "discount": [[4, 6, 8], [8, 12, 16], [12, 16, 20], [15, 20, 30]], "match_min": 0}):
        a = teacher_tables(Strata(**params), data, lanes, chunk=97)
        b = step_tables(Strata(**params), data, lanes)
        assert a.dtype == b.dtype == np.float64
        assert np.array_equal(a, b)
        assert (a == np.floor(a)).all() and (a >= 1).all()  # integer tables, every symbol codable


def test_chunking_does_not_change_tables(stdlib_text):
    data = stdlib_text[:8000]
    assert np.array_equal(teacher_tables(Strata(), data, 8, 1), teacher_tables(Strata(), data, 8, 1000))


SNIPPET = r"""
import sys, hashlib, lcodec
data = open(sys.argv[1], 'rb').read()
print(hashlib.sha256(lcodec.pack(data, frame_size=50000)).hexdigest())
"""


def test_same_archive_across_processes_and_thread_settings(tmp_path, stdlib_text):
    src = tmp_path / "in.bin"
    src.write_bytes(stdlib_text[:120_000])
    digests = set()
    for threads in ("1", "2"):
        env = dict(os.environ, NUMBA_NUM_THREADS=threads, OMP_NUM_THREADS=threads, OPENBLAS_NUM_THREADS=threads)
        out = subprocess.run([sys.executable, "-c", SNIPPET, str(src)], env=env, capture_output=True, text=True, check=True)
        digests.add(out.stdout.strip())
    digests.add(hashlib.sha256(lcodec.pack(src.read_bytes(), frame_size=50000)).hexdigest())
    assert len(digests) == 1


@pytest.mark.parametrize("name", sorted(f[:-7] for f in os.listdir(GOLDEN) if f.startswith("strata-") and f.endswith(".lcodec")))
def test_golden_containers_decode_exactly(name):
    blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
    assert lcodec.unpack(blob) == orig
    # and today's encoder, given the recorded parameters, still writes the same bytes
    ident = lcodec.info(blob)
    model = Strata.from_identity(ident["model"])
    assert lcodec.pack(orig, model=model, frame_size=ident["frame_size"]) == v3_twin(name)
