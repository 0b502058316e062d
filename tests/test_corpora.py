"""Fast checks of corpora/: the invented demo corpus and the on-machine open-data loaders."""

from __future__ import annotations

import hashlib
import math
import os
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from corpora import open_data  # noqa: E402
from lcodec.demo import corpus as make_demo  # noqa: E402

SMALL = 0.05


def _tree(root: Path) -> dict:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def demo_pair(tmp_path_factory):
    a = tmp_path_factory.mktemp("demo_a")
    b = tmp_path_factory.mktemp("demo_b")
    return make_demo.generate(a, scale=SMALL), a, make_demo.generate(b, scale=SMALL), b


def test_demo_is_byte_identical_across_runs(demo_pair):
    sa, a, sb, b = demo_pair
    ta, tb = _tree(a), _tree(b)
    assert ta == tb
    assert sa == sb
    assert len(ta) > 20


def test_demo_split_disjoint_nonempty_and_covers_kinds(demo_pair):
    summary, a, _, _ = demo_pair
    train = {p.name for p in (a / "train").iterdir()}
    test = {p.name for p in (a / "test").iterdir()}
    assert train and test and not (train & test)
    assert summary["train"]["files"] == len(train) and summary["test"]["files"] == len(test)
    for kind, k in summary["kinds"].items():
        assert k["train_files"] >= 1 and k["test_files"] >= 1, kind
    # the split is about 80/20 by file
    assert 0.12 <= len(test) / (len(train) + len(test)) <= 0.28


def test_demo_manifest_matches_files(demo_pair):
    _, a, _, _ = demo_pair
    lines = (a / make_demo.MANIFEST_NAME).read_text(encoding="utf-8").splitlines()
    assert lines[0].split("\t") == ["split", "name", "kind", "bytes", "sha256"]
    for line in lines[1:]:
        split, name, _, size, digest = line.split("\t")
        data = (a / split / name).read_bytes()
        assert len(data) == int(size) and hashlib.sha256(data).hexdigest() == digest


def test_demo_rerun_replaces_own_files_and_refuses_foreign(tmp_path):
    make_demo.generate(tmp_path, scale=0.02)
    before = _tree(tmp_path)
    make_demo.generate(tmp_path, scale=0.02)
    assert _tree(tmp_path) == before
    (tmp_path / "train" / "stray.bin").write_bytes(b"x")
    with pytest.raises(FileExistsError):
        make_demo.generate(tmp_path, scale=0.02)


def test_demo_default_size_and_file_sizes():
    files = make_demo.build_files(make_demo.DEFAULT_SEED, 1.0)
    test = make_demo.split_names(make_demo.DEFAULT_SEED, files)
    train_b = sum(len(d) for _, n, d in files if n not in test)
    test_b = sum(len(d) for _, n, d in files if n in test)
    assert 2.5e6 <= train_b <= 3.5e6
    assert 0.45e6 <= test_b <= 0.9e6
    for _, name, data in files:
        assert 4_000 <= len(data) <= 220_000, name
        data.decode("utf-8")  # all text


def test_demo_sin_helper_close_to_libm():
    # sin_ exists so the demo does not depend on the C library's last bit; it must still
    # be a sine. Reference: math.sin.
    for i in range(-400, 401):
        x = i * 0.173
        assert abs(make_demo.sin_(x) - math.sin(x)) < 1e-9


def test_stdlib_split_deterministic_and_disjoint():
    tr1, te1 = open_data.python_stdlib()
    tr2, te2 = open_data.python_stdlib()
    assert (tr1, te1) == (tr2, te2)
    assert tr1 and te1 and not set(tr1) & set(te1)
    assert all(os.path.isabs(p) and p.endswith(".py") for p in tr1 + te1)
    assert not any("site-packages" in p.split(os.sep) for p in tr1 + te1)
    assert 0.07 <= len(te1) / (len(tr1) + len(te1)) <= 0.13
    # no exact copy of a test file sits in train (contents are de-duplicated)
    digest = lambda p: hashlib.sha256(Path(p).read_bytes()).digest()  # noqa: E731
    assert not {digest(p) for p in tr1} & {digest(p) for p in te1}
    # another seed gives another split of the same files
    tr3, te3 = open_data.python_stdlib(seed=1)
    assert sorted(tr3 + te3) == sorted(tr1 + te1) and te3 != te1


def test_stdlib_limit_bytes_subset(tmp_path):
    limit = 300_000
    tr, te = open_data.python_stdlib(limit_bytes=limit)
    assert (tr, te) == open_data.python_stdlib(limit_bytes=limit)
    assert tr and te and sum(os.path.getsize(p) for p in tr + te) <= limit
    summary = open_data.materialise("python_stdlib", tmp_path, limit_bytes=limit)
    names_tr = sorted(p.name for p in (tmp_path / "train").iterdir())
    names_te = sorted(p.name for p in (tmp_path / "test").iterdir())
    assert len(names_tr) == len(tr) == summary["train"]["files"]
    assert len(names_te) == len(te) == summary["test"]["files"]
    assert all("/" not in n for n in names_tr + names_te)
    assert not set(names_tr) & set(names_te)
    # copies are exact
    for line in (tmp_path / open_data.MANIFEST_NAME).read_text(encoding="utf-8").splitlines()[1:]:
        split, name, size, digest, source = line.split("\t")
        assert (tmp_path / split / name).read_bytes() == Path(source).read_bytes()


def test_flat_name():
    assert open_data.flat_name("asyncio/base_events.py") == "asyncio__base_events.py"
    long = "/".join(["d" * 40] * 8) + "/x.h"
    assert len(open_data.flat_name(long)) <= 200


# SHA-256 of manifest.tsv for the demo at scale 0.05 and the default seed, recorded on the
# machine where the generator was written (CPython 3.11.7, Debian 12, x86-64). The
# manifest lists every file's SHA-256, so this pins the whole corpus: a failure on
# another machine means the output is not machine-independent; after an intended change
# to make_demo.py, record the new value here.
DEMO_FINGERPRINT_SMALL = "daafd1b9eac107b792562eea372620d02bd2c5e911d4f03d9013e9527d964fb9"


def test_demo_fingerprint(demo_pair):
    _, a, _, _ = demo_pair
    got = hashlib.sha256((a / make_demo.MANIFEST_NAME).read_bytes()).hexdigest()
    assert got == DEMO_FINGERPRINT_SMALL
