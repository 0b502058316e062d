"""SIGINT and SIGTERM during pack, unpack and train: exit 130 / 143 with one line, nothing
under a final name, no temporary file left (a `pack --resume` job keeps its partial archive
and journal). The signals are sent to the lcodec process, as `kill PID` or Ctrl-C would."""
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

import lcodec

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX signals")

SIGNALS = [(signal.SIGINT, 130, "interrupted (SIGINT)"), (signal.SIGTERM, 143, "terminated (SIGTERM)")]


def _text(n: int, seed: int = 0) -> bytes:
    rng = np.random.default_rng(seed)
    words = [b"kestrel-ridge", b"mount-orrin", b"vale-of-tess", b"gust", b"tremor", b"battery", b"link", b"ok"]
    out = bytearray()
    while len(out) < n:
        out += b" ".join(words[i] for i in rng.integers(len(words), size=6)) + b" %d\n" % rng.integers(1 << 30)
    return bytes(out[:n])


def _signalled(args, folder, sig, started, timeout=120, group=False):
    """Start lcodec, wait until started(folder) says it is working, send `sig`, wait; the
    ended process and its stderr. group: lcodec in a process group of its own, and `sig` to
    the whole group (as a service manager or `kill -TERM -PGID` does), so workers get it too."""
    p = subprocess.Popen([sys.executable, "-m", "lcodec", *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         start_new_session=group)
    t0 = time.monotonic()
    while not started(folder):
        if p.poll() is not None:
            out, err = p.communicate()
            pytest.fail(f"lcodec ended before the signal: {p.returncode} {err.decode()}")
        if time.monotonic() - t0 > timeout:
            if group:
                os.killpg(p.pid, signal.SIGKILL)
            else:
                p.kill()
            pytest.fail("lcodec never started its work")
        time.sleep(0.02)
    time.sleep(0.3)
    if group:
        os.killpg(p.pid, sig)
    else:
        p.send_signal(sig)
    out, err = p.communicate(timeout=timeout)
    return p, err.decode()


def _run_and_signal(args, folder, sig, started, timeout=120):
    p, err = _signalled(args, folder, sig, started, timeout)
    return p.returncode, err


def _packed(tmp_path, data):
    """An archive of `data` in tmp_path/in, and an empty folder tmp_path/out to unpack into."""
    arc = tmp_path / "in" / "mast.log.lcodec"
    arc.parent.mkdir()
    arc.write_bytes(lcodec.pack(data, frame_size=65536))
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    return arc, out_dir


def _temp_file(folder):
    return any(n.startswith(".") for n in os.listdir(folder))


def _check(code, err, want_code, want_text):
    assert code == want_code, err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and want_text in lines[0], err


@pytest.fixture(scope="module")
def big(tmp_path_factory):
    d = tmp_path_factory.mktemp("big")
    data = _text(1_500_000)
    (d / "mast.log").write_bytes(data)
    return d / "mast.log", data


@pytest.mark.parametrize("sig,code,text", SIGNALS)
def test_pack_interrupted(tmp_path, big, sig, code, text):
    src, _ = big
    out = tmp_path / "mast.log.lcodec"
    rc, err = _run_and_signal(["pack", str(src), "-o", str(out), "--frame-size", "65536"], tmp_path, sig, _temp_file)
    _check(rc, err, code, text)
    assert os.listdir(tmp_path) == []


def test_pack_in_workers_terminated(tmp_path, big):
    src, _ = big
    out = tmp_path / "mast.log.lcodec"
    rc, err = _run_and_signal(["pack", str(src), "-o", str(out), "--frame-size", "65536", "--jobs", "2"], tmp_path,
                              signal.SIGTERM, _temp_file)
    _check(rc, err, 143, "terminated (SIGTERM)")
    assert os.listdir(tmp_path) == []


def test_resumable_pack_keeps_only_its_journal(tmp_path, big):
    src, data = big
    out = tmp_path / "mast.log.lcodec"
    journal = tmp_path / ".mast.log.lcodec.lcodec-journal"
    rc, err = _run_and_signal(["pack", str(src), "-o", str(out), "--frame-size", "65536", "--resume"], tmp_path,
                              signal.SIGINT, lambda d: journal.exists())
    _check(rc, err, 130, "interrupted (SIGINT)")
    assert sorted(os.listdir(tmp_path)) == [".mast.log.lcodec.lcodec-journal", ".mast.log.lcodec.lcodec-partial"]


@pytest.mark.parametrize("sig,code,text", SIGNALS)
def test_unpack_interrupted(tmp_path, big, sig, code, text):
    arc, out_dir = _packed(tmp_path, big[1])
    rc, err = _run_and_signal(["unpack", str(arc), "-o", str(out_dir / "mast.log")], out_dir, sig, _temp_file)
    _check(rc, err, code, text)
    assert os.listdir(out_dir) == []


def test_train_terminated(tmp_path):
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    for i in range(6):
        (corpus / f"mast-{i}.log").write_bytes(_text(60_000, i))
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    p = subprocess.Popen([sys.executable, "-m", "lcodec", "train", str(corpus), "-o", str(out_dir / "m.lcmodel"),
                          "--time-limit", "60"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    first = p.stderr.readline()  # training has begun (it reports what it counts)
    assert first, "train said nothing"
    time.sleep(1.0)
    p.send_signal(signal.SIGTERM)
    _, rest = p.communicate(timeout=120)
    assert p.returncode == 143, rest.decode()
    assert "terminated (SIGTERM)" in rest.decode().strip().splitlines()[-1]
    assert os.listdir(out_dir) == []


# A signal whose handler runs where Python cannot raise: inside a ctypes callback (what
# llvmlite's object-cache callback is while numba compiles a kernel: the window in which
# test_train_terminated's SIGTERM was lost under load on 2026-12-05, its "Exception ignored
# on calling ctypes callback function ... lcodec.errors.Terminated" in the captured stderr
# and train running on to exit 0). The handler's exception is dropped there; the work then
# tries to give its output a final name.
LOST_IN_CALLBACK = r"""
import ctypes, os, signal, sys
from lcodec import cli, fsio

@cli.guarded
def work(path, signum):
    def callback():
        os.kill(os.getpid(), signum)  # taken at once: the handler runs inside this callback
        sum(range(1000))
    ctypes.CFUNCTYPE(None)(callback)()
    fsio.atomic_write(path, b"kestrel-ridge gust report\n")

work(sys.argv[1], int(sys.argv[2]))
"""


@pytest.mark.parametrize("sig,code,text", SIGNALS)
def test_signal_lost_in_a_callback_still_stops_before_the_final_name(tmp_path, sig, code, text):
    out = tmp_path / "report.txt"
    p = subprocess.run([sys.executable, "-c", LOST_IN_CALLBACK, str(out), str(int(sig))], capture_output=True,
                       timeout=120)
    _check(p.returncode, p.stderr.decode(), code, text)  # one line: the lost exception is not printed
    assert os.listdir(tmp_path) == []


# A signal that lands after an output's temporary file is made and before the `with` that
# would remove it (an unpack SIGINTed just after its temporary file appeared left
# ".mast.log.*.part" behind, 1 of 50 runs under load, 2026-12-05).
BEFORE_THE_WITH = r"""
import os, sys
from lcodec import cli, fsio

@cli.guarded
def work(path, signum):
    out = fsio.OutFile(path)
    os.kill(os.getpid(), signum)  # the handler raises here, before the with below
    with out:
        out.f.write(b"vale-of-tess tremor log\n")

work(sys.argv[1], int(sys.argv[2]))
"""


@pytest.mark.parametrize("sig,code,text", SIGNALS)
def test_signal_before_the_output_is_guarded_leaves_no_temporary_file(tmp_path, sig, code, text):
    p = subprocess.run([sys.executable, "-c", BEFORE_THE_WITH, str(tmp_path / "tremor.log"), str(int(sig))],
                       capture_output=True, timeout=120)
    _check(p.returncode, p.stderr.decode(), code, text)
    assert os.listdir(tmp_path) == []


def _group_gone(pgid: int, wait: float = 10.0) -> bool:
    """Whether every process of the group (lcodec and its workers) has ended."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < wait:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.05)
    return False


def _group_terminated(args, folder, started, timeout=120):
    """SIGTERM to lcodec's whole process group once started(folder): exit code, stderr, and
    whether every process of the group (lcodec and its workers) has ended."""
    p, err = _signalled(args, folder, signal.SIGTERM, started, timeout, group=True)
    gone = _group_gone(p.pid)
    if not gone:
        os.killpg(p.pid, signal.SIGKILL)
    return p.returncode, err, gone


def test_pack_with_workers_group_terminated(tmp_path, big):
    src, _ = big
    out = tmp_path / "mast.log.lcodec"
    rc, err, gone = _group_terminated(["pack", str(src), "-o", str(out), "--frame-size", "65536", "--jobs", "2"],
                                      tmp_path, _temp_file)
    _check(rc, err, 143, "terminated (SIGTERM)")
    assert gone, "worker processes outlived lcodec"
    assert os.listdir(tmp_path) == []


def test_unpack_with_workers_group_terminated(tmp_path, big):
    arc, out_dir = _packed(tmp_path, big[1])
    rc, err, gone = _group_terminated(["unpack", str(arc), "-o", str(out_dir / "mast.log"), "--jobs", "2"], out_dir,
                                      _temp_file)
    _check(rc, err, 143, "terminated (SIGTERM)")
    assert gone, "worker processes outlived lcodec"
    assert os.listdir(out_dir) == []


def test_constrictions_first_numpy_call_holds_signals_back(monkeypatch):
    # coder._first_numpy_call makes constriction load numpy's array interface with SIGINT
    # held back (a KeyboardInterrupt raised inside that load once made its Rust side panic):
    # a SIGINT sent during the call arrives only after it has returned, and the signal mask
    # is as before afterwards
    import constriction

    from lcodec import cli, errors
    from lcodec.coding import coder

    done = []
    real = constriction.stream.queue.RangeEncoder

    class Interrupted:  # constriction's classes cannot be subclassed: a wrapper
        def __init__(self):
            self.inner = real()

        def encode(self, *a):
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(0.05)  # an unheld SIGINT would be raised in here
            self.inner.encode(*a)
            done.append(True)

        def get_compressed(self):
            return self.inner.get_compressed()

    monkeypatch.setattr(constriction.stream.queue, "RangeEncoder", Interrupted)
    monkeypatch.setattr(errors, "PENDING_SIGNALS", errors.PENDING_SIGNALS)  # restored as it was
    before = list(errors.PENDING_SIGNALS)
    mask = signal.pthread_sigmask(signal.SIG_BLOCK, [])
    handlers = signal.getsignal(signal.SIGINT), signal.getsignal(signal.SIGTERM)
    signal.signal(signal.SIGINT, cli._on_signal)  # the CLI's handler, as in `lcodec unpack`
    try:
        with pytest.raises(KeyboardInterrupt):
            coder._first_numpy_call()
    finally:
        signal.signal(signal.SIGINT, handlers[0])
        signal.signal(signal.SIGTERM, handlers[1])
        errors.PENDING_SIGNALS[:] = before
    assert done == [True]
    assert signal.pthread_sigmask(signal.SIG_BLOCK, []) == mask
