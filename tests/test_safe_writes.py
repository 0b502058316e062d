"""Outputs are written atomically (temporary name, fsync, rename), never over an existing
file without --force, and a full disk or a refused permission gives a clear one-line
error, a non-zero exit, nothing under the final name and no temporary file left.
Inputs are never touched.

Every output path is covered: pack, unpack to a file, unpack to a folder, bench --json
and --csv, unpack --salvage (member folder, single file, marked damaged file, report),
and stdout. A full disk is simulated by making os.fsync (which every write goes through
before its rename) or os.write raise OSError(ENOSPC), and for stdout by writing to
/dev/full (the Linux device whose writes fail with ENOSPC). Permission denied is
simulated with a monkeypatch, since these tests may run as root, where a read-only
folder does not block writes. Errno names and messages are the standard library's
(errno, os.strerror).
"""
from __future__ import annotations

import errno
import os
import stat
import subprocess
import sys
import tempfile

import pytest
from click.testing import CliRunner

from lcodec import api, fsio
from lcodec.archive import salvage as S
from lcodec.cli import main as cli_group
from lcodec.errors import UsageError
from support import stdlib_file  # noqa: E402

ENOSPC_TEXT = os.strerror(errno.ENOSPC)  # "No space left on device"
EACCES_TEXT = os.strerror(errno.EACCES)  # "Permission denied"




def run_cli(*args):
    r = CliRunner().invoke(cli_group, [str(a) for a in args])
    assert "Traceback" not in r.output and "Traceback" not in r.stderr
    return r


@pytest.fixture
def work(tmp_path):
    src = tmp_path / "src"
    (src / "station" / "sub").mkdir(parents=True)
    (src / "station" / "colorsys.py").write_bytes(stdlib_file("colorsys.py", 3000))
    (src / "station" / "sub" / "log.txt").write_bytes(b"02:00 VK-7 wind 4.1 m/s\n" * 50)
    (src / "one.py").write_bytes(stdlib_file("bisect.py", 2000))
    out = tmp_path / "out"
    out.mkdir()
    (out / "file.lcodec").write_bytes(api.pack((src / "one.py").read_bytes()))
    (out / "tree.lcodec").write_bytes(api.pack_paths([str(src / "station")])[0])
    return src, out


class FullDisk:
    """A file opened for writing whose writes fail as on a full disk."""

    def __init__(self, f):
        self.f = f

    def write(self, data):
        raise OSError(errno.ENOSPC, ENOSPC_TEXT)

    def __getattr__(self, name):
        return getattr(self.f, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.f.close()


def disk_full(monkeypatch, call="fsync"):
    """call "fsync": the sync before each rename fails; "write": the writes themselves
    (through open() and os.fdopen(), which every output goes through)."""
    if call == "fsync":
        def fail(*a, **k):
            raise OSError(errno.ENOSPC, ENOSPC_TEXT)
        monkeypatch.setattr(os, "fsync", fail)
        return
    import builtins

    for owner, name in ((builtins, "open"), (os, "fdopen")):
        real = getattr(owner, name)

        def opener(*a, _real=real, **k):
            f = _real(*a, **k)
            mode = k.get("mode", a[1] if len(a) > 1 else "r")
            return FullDisk(f) if "w" in mode and "b" in mode else f
        monkeypatch.setattr(owner, name, opener)


def listing(folder):
    return sorted(os.listdir(folder))


def no_temp_left(folder):
    left = [n for n in os.listdir(folder) if n.startswith(".") or n.endswith(".part") or ".part-" in n
            or ".salvage-" in n]
    assert left == [], left


def output_cases(src, out):
    """(name, argv, paths that must not appear) for every command that writes a file."""
    return [
        ("pack file", ["pack", src / "one.py", "-o", out / "new.lcodec"], [out / "new.lcodec"]),
        ("pack folder", ["pack", src / "station", "-o", out / "new2.lcodec"], [out / "new2.lcodec"]),
        ("unpack file", ["unpack", out / "file.lcodec", "-o", out / "one.py"], [out / "one.py"]),
        ("unpack folder", ["unpack", out / "tree.lcodec", "-o", out / "restored"], [out / "restored"]),
        ("salvage folder", ["unpack", out / "tree.lcodec", "-o", out / "s1", "--salvage"], [out / "s1"]),
        ("salvage file", ["unpack", out / "file.lcodec", "-o", out / "s2", "--salvage"], [out / "s2"]),
    ]


@pytest.mark.parametrize("call", ["fsync", "write"])
def test_disk_full_leaves_nothing(work, monkeypatch, call):
    src, out = work
    before = listing(out)
    for name, argv, absent in output_cases(src, out):
        with monkeypatch.context() as mp:
            disk_full(mp, call)
            r = run_cli(*argv)
        assert r.exit_code == 2, (name, r.exit_code, r.stderr)
        assert ENOSPC_TEXT in r.stderr, (name, r.stderr)
        assert len(r.stderr.strip().splitlines()) <= 3, (name, r.stderr)
        for p in absent:
            assert not os.path.lexists(p), (name, p)
        assert all(n in before or n.endswith(".salvage.json") for n in listing(out)), (name, listing(out))
        for n in listing(out):
            if n.endswith(".salvage.json"):  # the report may not get out either: if it did, remove it
                os.unlink(out / n)
        no_temp_left(out)
    assert listing(out) == before


def test_disk_full_in_bench_outputs(work, monkeypatch, tmp_path):
    corpus = tmp_path / "corpus"
    (corpus / "train").mkdir(parents=True)
    (corpus / "test").mkdir()
    (corpus / "train" / "a.txt").write_bytes(b"02:00 VK-7 wind 4.1 m/s\n" * 40)
    (corpus / "test" / "b.txt").write_bytes(b"02:10 VK-9 wind 3.9 m/s\n" * 30)
    res = tmp_path / "res"
    res.mkdir()
    disk_full(monkeypatch)
    for flag, name in (("--json", "rows.json"), ("--csv", "rows.csv")):
        r = run_cli("bench", corpus, flag, res / name, "-q")
        assert r.exit_code == 2 and ENOSPC_TEXT in r.stderr, r.stderr
        assert listing(res) == []  # nothing, not even a temporary file
    monkeypatch.undo()
    r = run_cli("bench", corpus, "--json", res / "rows.json", "--csv", res / "rows.csv", "-q")
    assert r.exit_code == 0 and listing(res) == ["rows.csv", "rows.json"]


def test_salvage_report_still_written_when_the_output_fails(work, monkeypatch):
    src, out = work
    real_open = open

    def no_member_files(path, mode="r", *a, **k):  # member files fail; the report (via mkstemp) does not
        if "wb" in mode and ".salvage-" in str(path):
            raise OSError(errno.ENOSPC, ENOSPC_TEXT)
        return real_open(path, mode, *a, **k)

    monkeypatch.setattr("builtins.open", no_member_files)
    with pytest.raises(UsageError) as ei:
        S.salvage_to((out / "tree.lcodec").read_bytes(), str(out / "s"))
    assert ENOSPC_TEXT in str(ei.value)
    assert not (out / "s").exists()
    assert (out / "s.salvage.json").is_file()  # the report says what happened
    no_temp_left(out)


def test_permission_denied_is_a_clear_error(work, monkeypatch):
    src, out = work
    before = listing(out)

    def refused(*a, **k):
        raise PermissionError(errno.EACCES, EACCES_TEXT)

    for name, argv, absent in output_cases(src, out):
        with monkeypatch.context() as mp:
            mp.setattr(tempfile, "mkstemp", refused)  # atomic_write's temporary file
            mp.setattr(os, "makedirs", refused)  # unpack's and salvage's temporary folder
            r = run_cli(*argv)
        assert r.exit_code == 2 and EACCES_TEXT in r.stderr, (name, r.exit_code, r.stderr)
        for p in absent:
            assert not os.path.lexists(p), (name, p)
        no_temp_left(out)
    assert listing(out) == before


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0,
                    reason="as root a read-only folder does not block writes (the monkeypatched test covers it)")
def test_read_only_folder(work):
    src, out = work
    ro = out / "ro"
    ro.mkdir()
    os.chmod(ro, 0o555)
    try:
        r = run_cli("pack", src / "one.py", "-o", ro / "x.lcodec")
        assert r.exit_code == 2 and EACCES_TEXT in r.stderr
        assert listing(ro) == []
    finally:
        os.chmod(ro, 0o755)


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="no /dev/full on this system")
def test_stdout_on_a_full_device(work):
    src, out = work
    for argv in (["unpack", out / "file.lcodec", "-o", "-"], ["pack", src / "one.py", "-o", "-"],
                 ["info", out / "tree.lcodec", "--json"]):
        with open("/dev/full", "wb") as full:
            r = subprocess.run([sys.executable, "-m", "lcodec", *map(str, argv)], stdout=full,
                               stderr=subprocess.PIPE, timeout=120)
        err = r.stderr.decode()
        assert r.returncode == 2, (argv, r.returncode, err)
        assert ENOSPC_TEXT in err and "Traceback" not in err and "internal error" not in err, err


def test_a_failed_rename_leaves_no_temporary_file(tmp_path, monkeypatch):
    def fail(*a, **k):
        raise OSError(errno.EXDEV, os.strerror(errno.EXDEV))

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(UsageError):
        fsio.atomic_write(str(tmp_path / "x"), b"data")
    assert listing(tmp_path) == []


def test_outputs_get_the_usual_permissions(tmp_path):
    old = os.umask(0o027)
    try:
        fsio.atomic_write(str(tmp_path / "x"), b"data")
    finally:
        os.umask(old)
    assert stat.S_IMODE(os.stat(tmp_path / "x").st_mode) == 0o640  # 0o666 less the umask, as open() gives


def test_inputs_are_never_touched(work):
    src, out = work
    bad = bytearray((out / "tree.lcodec").read_bytes())
    bad[len(bad) // 2] ^= 0x10
    (out / "bad.lcodec").write_bytes(bytes(bad))
    watched = [src / "one.py", src / "station" / "colorsys.py", src / "station", out / "file.lcodec",
               out / "tree.lcodec", out / "bad.lcodec"]

    def state():
        out_ = []
        for p in watched:
            st = os.stat(p)
            out_.append((p, st.st_mode, st.st_mtime_ns, st.st_size, None if p.is_dir() else p.read_bytes()))
        return out_

    before = state()
    runs = [["pack", src / "one.py", "-o", out / "a.lcodec"], ["pack", src / "station", "-o", out / "b.lcodec"],
            ["unpack", out / "file.lcodec", "-o", out / "a.py"], ["unpack", out / "tree.lcodec", "-o", out / "t"],
            ["verify", out / "tree.lcodec", "--against", src / "station"], ["info", out / "file.lcodec"],
            ["unpack", out / "bad.lcodec", "-o", out / "s", "--salvage", "--keep-damaged"],
            ["verify", out / "bad.lcodec"]]
    for argv in runs:
        run_cli(*argv)
    assert state() == before


def test_a_refused_unpack_into_an_existing_folder_leaves_no_temporary_folder(work):
    src, out = work
    dest = out / "dest"
    (dest / "station").mkdir(parents=True)
    os.symlink(str(out), dest / "station" / "sub")  # a link where a member folder goes
    r = run_cli("unpack", out / "tree.lcodec", "-o", dest, "--force")
    assert r.exit_code == 2 and "symbolic link" in r.stderr
    assert sorted(os.listdir(dest / "station")) == ["sub"]
    no_temp_left(out)
