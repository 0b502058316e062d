"""Scale: --jobs N, --cluster (dask), streaming pack/unpack/verify, corpus jobs and resume.

Every archive made in parallel (worker processes, a dask LocalCluster) must be the same
bytes as the one made in one process, and decode to the original. Outside references:
the inputs are the Python standard library's own sources (tests/support.py
stdlib_file); archives are compared byte for byte with each other and originals with
the restored files; the golden containers (tests/golden) must decode to their committed
originals through the streaming, parallel decoder too; manifests are read with the
standard library's json and checked against hashlib.sha256 of the files.
"""
from __future__ import annotations

import hashlib
import json
import os
import re
import signal
import subprocess
import sys
import time

import pytest

from lcodec import api
from lcodec.archive import plan as P, read as R, runners as scale, write as W
from lcodec.format import container as C
from lcodec.errors import DataError, UsageError
from lcodec.models.strata import Strata
from support import stdlib_file, v3_twin

HERE = os.path.dirname(__file__)
GOLDEN = os.path.join(HERE, "golden")
WEFT = os.path.join(GOLDEN, "weft-tiny.lcmodel")
FILES = ["json/decoder.py", "json/encoder.py", "json/scanner.py", "shlex.py", "textwrap.py", "colorsys.py",
         "bisect.py", "keyword.py", "this.py", "csv.py"]


def cli(*args, timeout=180):
    return subprocess.run([sys.executable, "-m", "lcodec", *map(str, args)], capture_output=True, timeout=timeout)


@pytest.fixture
def tree(tmp_path):
    """A folder of real files (and an empty one, and an empty folder)."""
    root = tmp_path / "station-src"
    for rel in FILES:
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(stdlib_file(rel))
    (root / "empty.txt").write_bytes(b"")
    (root / "nothing-here").mkdir()
    return root


@pytest.fixture(scope="module")
def big():
    """About 300 KB of real text: many frames at a small frame size."""
    return b"".join(stdlib_file(rel) for rel in ["argparse.py", "textwrap.py", "shlex.py"])[:300_000]


# -- --jobs N == --jobs 1 -----------------------------------------------------------------------
def test_jobs2_equals_jobs1_for_a_folder(tree, tmp_path):
    one, _ = api.pack_paths([str(tree)], jobs=1)
    two, _ = api.pack_paths([str(tree)], jobs=2)
    assert one == two
    api.pack_to([str(tree)], str(tmp_path / "s.lcodec"), jobs=2)  # streamed to a file: the same bytes
    assert (tmp_path / "s.lcodec").read_bytes() == one
    out = tmp_path / "restored"
    api.unpack_to_dir(one, str(out), jobs=2)
    for rel in FILES + ["empty.txt"]:
        assert (out / "station-src" / rel).read_bytes() == (tree / rel).read_bytes()
    assert (out / "station-src" / "nothing-here").is_dir()


def test_jobs2_equals_jobs1_for_one_large_multi_frame_file(big, tmp_path):
    one = api.pack(big, frame_size=16384, jobs=1)
    two = api.pack(big, frame_size=16384, jobs=2)
    assert one == two and len(C.read_container(one).frames) == -(-len(big) // 16384)
    assert api.unpack(two, jobs=2) == big
    rep = api.verify(two, jobs=2)
    assert rep.ok and rep.frames == len(C.read_container(one).frames)


def test_jobs2_equals_jobs1_with_a_learned_model_file(big, monkeypatch):
    # workers read the model file's bytes (weft's thread pool makes this process unsafe to fork)
    monkeypatch.setattr(scale, "may_fork", lambda: False)
    data = big[:40_000]
    one = api.pack(data, model=WEFT, frame_size=8192, jobs=1)
    assert api.pack(data, model=WEFT, frame_size=8192, jobs=2) == one
    assert api.unpack(one, model=WEFT, jobs=2) == data


FORKED = """
import sys
from lcodec import api
from lcodec.archive import runners
assert runners.may_fork(), "a fresh process should fork its workers"
model, data = sys.argv[1], open(sys.argv[2], "rb").read()
two = api.pack(data, model=model, frame_size=8192, jobs=2)  # forked workers: the parent's built model
assert api.unpack(two, model=model, jobs=2) == data
assert two == api.pack(data, model=model, frame_size=8192, jobs=1)
print("ok")
"""


def test_forked_workers_give_the_same_archive(big, tmp_path):
    src = tmp_path / "mast.log"
    src.write_bytes(big[:40_000])
    r = subprocess.run([sys.executable, "-c", FORKED, os.path.join(GOLDEN, "braid-memory-tiny.lcmodel"), str(src)],
                       capture_output=True, timeout=300)
    assert r.returncode == 0 and r.stdout.strip() == b"ok", r.stderr.decode()[-2000:]


def test_forking_needs_a_single_threaded_parent():
    import threading

    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        assert not scale.may_fork()  # another thread could hold a lock the children would copy
    finally:
        stop.set()
        t.join()


def test_golden_containers_decode_through_the_parallel_streaming_path(tmp_path):
    for name, model in [("strata-v1-text", None), ("strata-v1-binary", None), ("weft-v1-text", WEFT)]:
        blob = open(os.path.join(GOLDEN, name + ".lcodec"), "rb").read()
        want = open(os.path.join(GOLDEN, name + ".orig"), "rb").read()
        out = tmp_path / name
        api.unpack_to_file(blob, str(out), model=model, jobs=2)
        assert out.read_bytes() == want
        # and re-packing the original in parallel gives the committed bytes again
        frame_size = C.read_container(blob).frame_size
        assert api.pack(want, model=model, frame_size=frame_size, jobs=2) == v3_twin(name)


def test_parallel_verify_names_the_damaged_frame(big):
    blob = bytearray(api.pack(big, frame_size=16384))
    fr = C.read_container(bytes(blob)).frames[5]
    blob[fr.payload_offset + 3] ^= 0x10
    rep = api.verify(bytes(blob), jobs=2)
    assert not rep.ok and any("frame 5 damaged" in p for p in rep.problems)
    with pytest.raises(DataError, match="frame 5"):
        api.unpack(bytes(blob), jobs=2)


def test_jobs_option_is_validated(tree, tmp_path):
    for bad in ("abc", "-2", "1.5"):
        r = cli("pack", tree, "-o", tmp_path / "x.lcodec", "--jobs", bad)
        assert r.returncode == 2 and b"--jobs" in r.stderr and b"Traceback" not in r.stderr
    r = cli("pack", tree, "-o", tmp_path / "x.lcodec", "--jobs", "2", "--cluster", "tcp://127.0.0.1:1")
    assert r.returncode == 2 and b"not both" in r.stderr
    assert scale.parse_jobs("auto") == scale.parse_jobs("0") == scale.available_cores() >= 1
    assert scale.parse_jobs("3") == 3
    r = cli("pack", tree, "-o", tmp_path / "x.lcodec", "--jobs", "0", "-q")
    assert r.returncode == 0
    assert (tmp_path / "x.lcodec").read_bytes() == api.pack_paths([str(tree)])[0]


def test_a_model_object_workers_cannot_rebuild_is_refused(monkeypatch):
    class Odd(Strata):  # not a built-in model by its type: a worker could not rebuild it
        pass

    monkeypatch.setattr(scale, "may_fork", lambda: False)
    with pytest.raises(UsageError, match="cannot be rebuilt"):
        api.pack(b"x" * 1000, model=Odd(), jobs=2)


def test_unreachable_cluster_is_a_usage_error(tree, tmp_path, monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(scale, "CONNECT_TIMEOUT_S", 1)
    with pytest.raises(UsageError, match="cannot reach the dask scheduler at tcp://127.0.0.1:9"):
        api.pack_to([str(tree)], str(tmp_path / "x.lcodec"), cluster="tcp://127.0.0.1:9")
    assert not (tmp_path / "x.lcodec").exists() and os.listdir(tmp_path) == ["station-src"]


# -- a dask cluster --------------------------------------------------------------------------------
def test_local_dask_cluster_gives_the_same_archive(tree, big, tmp_path):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        addr = cluster.scheduler_address
        local, _ = api.pack_paths([str(tree)])
        api.pack_to([str(tree)], str(tmp_path / "c.lcodec"), cluster=addr)
        assert (tmp_path / "c.lcodec").read_bytes() == local
        rep = api.verify(local, cluster=addr, against=str(tree))
        assert rep.ok, rep.problems
        data = big[:40_000]
        assert api.pack(data, model=WEFT, frame_size=8192, cluster=addr) == api.pack(data, model=WEFT, frame_size=8192)
        # through the command line too, verify included
        r = cli("verify", tmp_path / "c.lcodec", "--cluster", addr, "--against", tree)
        assert r.returncode == 0 and b"identical to" in r.stdout
        out = tmp_path / "out.txt"
        blob = api.pack(big, frame_size=32768)
        (tmp_path / "b.lcodec").write_bytes(blob)
        r = cli("unpack", tmp_path / "b.lcodec", "-o", out, "--cluster", addr)
        assert r.returncode == 0 and out.read_bytes() == big


# -- streaming: bounded windows, never the whole input or output -------------------------------
def test_pack_reads_input_only_a_bounded_window_ahead_of_what_it_wrote(big, tmp_path, monkeypatch):
    src = tmp_path / "big.txt"
    src.write_bytes(big * 2)
    frame_size = 2048  # 293 frames
    reads = []
    real = P._read_frames

    def counting(s, fs):
        for raw in real(s, fs):
            reads.append(len(raw))
            yield raw

    monkeypatch.setattr(P, "_read_frames", counting)
    ahead = []

    class Spy:
        """The archive file: notes how far reading is ahead of writing at each record."""

        def __init__(self, path):
            self.f, self.records = open(path, "w+b"), 0

        def write(self, b):
            if len(reads) and b[:1] != C.MAGIC[:1]:
                self.records += 1
                ahead.append(len(reads) - self.records)
            return self.f.write(b)

        def __getattr__(self, k):
            return getattr(self.f, k)

    plan = P._plan_inputs([str(src)], frame_size, Strata())
    spy = Spy(str(tmp_path / "out.lcodec"))
    with scale.runner(Strata(), 1) as r:
        W._write_plan_to(spy, plan, r, api.PackStats())
    spy.f.close()
    n = -(-len(big) * 2 // frame_size)
    per_batch = scale.BATCH_BYTES // frame_size
    assert len(reads) == n and len(ahead) == n
    assert max(ahead) <= per_batch < n // 2  # one batch in flight, never the whole input
    assert api.unpack((tmp_path / "out.lcodec").read_bytes()) == big * 2


def stored_archive(data: bytes, frame_size: int) -> bytes:
    """An archive of stored frames, written with the container module's own writer (fast to
    make and to decode, so it can be large)."""
    recs = [C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw))
            for raw in (data[i:i + frame_size] for i in range(0, len(data), frame_size))]
    return C.header_bytes(len(data), C.sha256(data), len(recs), frame_size, Strata().identity, None) + b"".join(recs)


def test_unpack_writes_each_frame_as_it_is_decoded(tmp_path, monkeypatch):
    data = os.urandom(2 << 20)
    blob = stored_archive(data, 4096)
    n = len(C.read_container(blob).frames)
    taken = []
    real = R.frame_fields

    def counting(fr):
        taken.append(fr.index)
        return real(fr)

    monkeypatch.setattr(R, "frame_fields", counting)
    seen = []

    class Sink(api.Sink):
        def data(self, mem, raw, k):
            seen.append((len(taken), len(raw)))

    api.decode_stream(blob, Sink(), jobs=2)
    window = 2 * 2 * (scale.BATCH_BYTES // 4096)
    assert len(seen) == n
    # when frame i is handed on, at most a window of frames has been sent off ahead of it
    assert all(t - i <= window + scale.BATCH_BYTES // 4096 for i, (t, _) in enumerate(seen))
    assert window + scale.BATCH_BYTES // 4096 < n
    out = tmp_path / "out.bin"
    api.unpack_to_file(blob, str(out), jobs=2)
    assert out.read_bytes() == data


def test_archives_are_mapped_not_read(tmp_path, big):
    from lcodec.fsio import map_input

    p = tmp_path / "a.lcodec"
    p.write_bytes(api.pack(big[:5000]))
    m = map_input(str(p))
    assert not isinstance(m, (bytes, bytearray)) and m[:4] == C.MAGIC
    assert api.unpack(m) == big[:5000]


def test_an_input_that_changes_while_packing_is_refused(tmp_path):
    p = tmp_path / "log.txt"
    p.write_bytes(b"x" * 1000)
    with pytest.raises(UsageError, match="changed while it was being packed"):
        list(P._read_frames(P._Source(2000, path=str(p)), 512))
    with pytest.raises(UsageError, match="changed while it was being packed"):
        list(P._read_frames(P._Source(500, path=str(p)), 512))


# -- corpus jobs and resume ------------------------------------------------------------------------
def _sha(p) -> str:
    return hashlib.sha256(open(p, "rb").read()).hexdigest()


def test_per_file_corpus_job_writes_archives_and_a_manifest(tree, tmp_path):
    out = tmp_path / "archives"
    man = api.pack_each([str(tree)], str(out), jobs=2)
    files = sorted(FILES + ["empty.txt"])
    assert sorted(e["path"] for e in man["members"]) == sorted("station-src/" + f for f in files)
    on_disk = json.loads((out / "manifest.json").read_text())
    assert on_disk["members"] == man["members"] and man["packed"] == len(files) and man["kept"] == 0
    for e in man["members"]:
        arch = out / e["archive"]
        orig = tree.parent / e["path"]
        assert e["sha256"] == _sha(orig) and e["archive_sha256"] == _sha(arch) and e["bytes"] == orig.stat().st_size
        assert api.unpack(arch.read_bytes()) == orig.read_bytes()
        assert arch.read_bytes() == api.pack(orig.read_bytes())  # the same bytes as packing it alone
    assert not (out / api.EACH_JOURNAL).exists()
    with pytest.raises(UsageError, match="--resume"):
        api.pack_each([str(tree)], str(out))
    # resume: nothing to do; a changed original is coded again, the rest kept
    (tree / "shlex.py").write_bytes(b"# edited by the night shift\n" + (tree / "shlex.py").read_bytes())
    man2 = api.pack_each([str(tree)], str(out), jobs=1, resume=True)
    status = {e["path"]: e["status"] for e in man2["members"]}
    assert status.pop("station-src/shlex.py") == "packed" and set(status.values()) == {"kept"}
    assert api.unpack((out / "station-src/shlex.py.lcodec").read_bytes()) == (tree / "shlex.py").read_bytes()


def _kill_when(cmd, ready, timeout=120):
    """Start `cmd`, SIGKILL it as soon as ready() holds; returns True if it was killed mid-run."""
    p = subprocess.Popen([sys.executable, "-m", "lcodec", *map(str, cmd)], stdout=subprocess.DEVNULL,
                         stderr=subprocess.PIPE, start_new_session=True)
    t0 = time.monotonic()
    while p.poll() is None and time.monotonic() - t0 < timeout:
        if ready():
            os.killpg(p.pid, signal.SIGKILL)  # the job and its worker processes
            p.wait()
            return True
        time.sleep(0.02)
    p.wait()
    return False


def _journal_frames(path) -> int:
    try:
        return json.loads(open(path).read())["frames_done"]
    except (OSError, ValueError, KeyError):
        return 0


def _more_text(big: bytes) -> list[bytes]:
    """Twelve distinct texts made from `big` (about 0.8 MB): enough that a resumable job runs
    past its first journal sync (JOURNAL_EVERY_S) on a quiet machine. 4 KB frames cost
    little since the kernels stopped allocating, and two copies were done in 0.3 s."""
    six = [big, big[::-1], big.swapcase(), big.upper(), big.lower()[::-1], big.replace(b" ", b"\t")]
    return six + [t.replace(b"e", b"3") for t in six]  # twelve: one CI run finished six before it was killed


def test_one_archive_job_resumes_after_sigkill_with_the_same_bytes(tree, big, tmp_path):
    for i, text in enumerate(_more_text(big)):
        (tree / ("big.txt" if i == 0 else f"big.txt.{i}")).write_bytes(text)
    out = tmp_path / "site.lcodec"
    journal = tmp_path / ".site.lcodec.lcodec-journal"
    args = ["pack", tree, "-o", out, "--frame-size", 4096, "--resume", "--jobs", 2]
    killed = _kill_when(args, lambda: _journal_frames(journal) >= 8)
    assert killed, "the job ended before it could be interrupted"
    assert not out.exists() and (tmp_path / ".site.lcodec.lcodec-partial").exists()
    done = _journal_frames(journal)
    r = cli(*args)
    assert r.returncode == 0, r.stderr
    fresh, stats = api.pack_paths([str(tree)], frame_size=4096)
    assert out.read_bytes() == fresh
    m = re.search(r"(\d+) frames \((\d+) more kept from the interrupted run\)", r.stderr.decode())
    assert m, r.stderr
    assert int(m.group(2)) == done and int(m.group(1)) == stats.frames - done  # only unfinished frames were coded
    assert not journal.exists() and not (tmp_path / ".site.lcodec.lcodec-partial").exists()


def test_resume_refuses_a_changed_input(tree, big, tmp_path):
    # six texts: one process could otherwise finish before the job is caught with 4 frames
    # journalled (_more_text)
    for i, text in enumerate(_more_text(big)):
        (tree / ("big.txt" if i == 0 else f"big.txt.{i}")).write_bytes(text)
    out = tmp_path / "site.lcodec"
    journal = tmp_path / ".site.lcodec.lcodec-journal"
    args = ["pack", tree, "-o", out, "--frame-size", 4096, "--resume"]
    assert _kill_when(args, lambda: _journal_frames(journal) >= 4)
    first = "big.txt"  # the first file packed: its frames are the finished ones
    data = bytearray((tree / first).read_bytes())
    data[10] ^= 1
    st = os.stat(tree / first)
    (tree / first).write_bytes(bytes(data))
    os.utime(tree / first, ns=(st.st_atime_ns, st.st_mtime_ns))  # same size and time: only the bytes differ
    r = cli(*args)
    assert r.returncode == 2 and b"changed since the interrupted run" in r.stderr
    assert not out.exists()


def test_per_file_job_resumes_after_sigkill_without_recoding_finished_members(tree, big, tmp_path):
    # eight more members, so that work is left after the third archive is done (with three,
    # about one CI run in four finished the whole job before the kill)
    text = big + big[::-1]
    for i in range(8):
        (tree / f"more-{i}.txt").write_bytes(text[i * 60_000:(i + 1) * 60_000])
    out = tmp_path / "archives"
    journal = out / api.EACH_JOURNAL

    def finished():
        try:
            return sum(1 for line in open(journal) if '"archive_sha256"' in line)
        except OSError:
            return 0

    args = ["pack", tree, "-o", out, "--per-file", "--resume", "--jobs", 2]
    assert _kill_when(args, lambda: finished() >= 3)
    n_done = finished()
    r = cli(*args)
    assert r.returncode == 0, r.stderr
    man = json.loads((out / "manifest.json").read_text())
    assert man["kept"] >= n_done and man["packed"] + man["kept"] == len(man["members"])
    fresh = api.pack_each([str(tree)], str(tmp_path / "fresh"))
    for e in fresh["members"]:
        assert (out / e["archive"]).read_bytes() == (tmp_path / "fresh" / e["archive"]).read_bytes()
    assert not any(n.endswith(".lcodec-partial") for _, _, names in os.walk(out) for n in names)


def test_a_resumable_job_does_not_pack_its_own_partial_files(tree):
    (tree / ".site.lcodec.lcodec-partial").write_bytes(b"left by an interrupted run")
    out = tree / "site.lcodec"
    api.pack_to([str(tree)], str(out), resume=True)
    names = [m.path for m in C.read_container(out.read_bytes()).members]
    assert "station-src/shlex.py" in names and not any("lcodec-partial" in n for n in names)
    assert not (tree / ".site.lcodec.lcodec-journal").exists()


def test_a_link_to_one_file_still_packs_as_that_file(tree, tmp_path):
    link = tmp_path / "latest.py"
    link.symlink_to(tree / "shlex.py")
    api.pack_to([str(link)], str(tmp_path / "l.lcodec"))
    assert (tmp_path / "l.lcodec").read_bytes() == api.pack((tree / "shlex.py").read_bytes())
