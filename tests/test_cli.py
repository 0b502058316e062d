"""The command line from outside: every command run as `python -m lcodec ...` in a
subprocess, checking exit codes (0 ok, 1 data problem, 2 usage error), messages on
stderr, no tracebacks, no silent overwrites, and model files.

Outside references: real input files are the Python standard library's own sources
(located with sysconfig); model-file identities are checked with hashlib.sha256 of the
file's bytes; `info --json` output is parsed with the standard library's json module.
"""
from __future__ import annotations

import concurrent.futures as cf
import hashlib
import json
import os
import subprocess
import sys

import pytest

from lcodec import api
from lcodec.format import modelfile
from lcodec.cli import main as cli_group
from lcodec.models.strata import Strata
from support import stdlib_file  # noqa: E402


def strata_architecture(max_order: int, hash_log2: int) -> dict:
    """A model file's architecture: strata with non-default orders and table size, the
    other parameters spelled the way the model itself records them (their schema has
    changed as the model evolved, e.g. discounts per count class)."""
    return {"name": "strata", "params": Strata(max_order=max_order, hash_log2=hash_log2).params}


STRATA_SMALL = strata_architecture(4, 16)
STRATA_OTHER = strata_architecture(3, 12)


def cli(*args, stdin: bytes | None = None, cwd=None):
    return subprocess.run([sys.executable, "-m", "lcodec", *map(str, args)], input=stdin,
                          capture_output=True, cwd=cwd, timeout=120)


def cli_all(arg_lists):
    """Independent invocations side by side (each still its own process)."""
    with cf.ThreadPoolExecutor(3) as ex:
        return list(ex.map(lambda a: cli(*a), arg_lists))


def err_of(r) -> str:
    return r.stderr.decode("utf-8", "replace")


def no_traceback(r):
    assert "Traceback" not in err_of(r) and b"Traceback" not in r.stdout




@pytest.fixture
def text_file(tmp_path):
    p = tmp_path / "shlex.py"
    p.write_bytes(stdlib_file("shlex.py"))
    return p


@pytest.fixture
def tree(tmp_path):
    root = tmp_path / "station-logs"
    (root / "2031" / "empty").mkdir(parents=True)
    (root / "index.txt").write_bytes(b"VK-7 VK-9 HR-2\n")
    (root / "2031" / "vk7.log").write_bytes(b"02:00 VK-7 wind 4.1 m/s\n" * 300)
    (root / "2031" / "heapq.py").write_bytes(stdlib_file("heapq.py"))
    (root / "none.bin").write_bytes(b"")
    return root


def pack_file(src, arc, model=None):
    """Make an archive in-process (for tests about the other commands)."""
    arc.write_bytes(api.pack(src.read_bytes(), model=None if model is None else str(model)))


def pack_tree(src, arc):
    arc.write_bytes(api.pack_paths([str(src)])[0])


def tree_of(root):
    out = {}
    for dp, dns, fns in os.walk(root):
        for n in dns:
            out[os.path.relpath(os.path.join(dp, n), root)] = None
        for n in fns:
            with open(os.path.join(dp, n), "rb") as f:
                out[os.path.relpath(os.path.join(dp, n), root)] = f.read()
    return out


# -- help ---------------------------------------------------------------------------------
def test_every_command_has_help_with_an_example():
    names = sorted(cli_group.commands)
    assert {"pack", "unpack", "verify", "info"} <= set(names)
    runs = cli_all([[name, "--help"] for name in names] + [["--help"]])
    for name, r in zip(names, runs):
        assert r.returncode == 0, (name, err_of(r))
        assert "Example" in r.stdout.decode(), name
    r = runs[-1]  # `python -m lcodec --help`
    assert r.returncode == 0 and "Example" in r.stdout.decode()
    assert b"pack" in r.stdout and b"unpack" in r.stdout and b"verify" in r.stdout


def test_unknown_option_is_a_usage_error(text_file):
    r = cli("pack", text_file, "--no-such-option")
    assert r.returncode == 2
    no_traceback(r)


# -- round trips --------------------------------------------------------------------------
def test_pack_unpack_a_file(tmp_path, text_file):
    r = cli("pack", text_file)  # default output name: the input's name + .lcodec
    assert r.returncode == 0, err_of(r)
    arc = tmp_path / "shlex.py.lcodec"
    assert arc.is_file()
    other = tmp_path / "elsewhere"  # default output name: the archive's name less .lcodec
    other.mkdir()
    os.replace(arc, other / arc.name)
    r = cli("unpack", other / arc.name, "-q")
    assert r.returncode == 0, err_of(r)
    assert (other / "shlex.py").read_bytes() == text_file.read_bytes()


def test_pack_unpack_a_folder(tmp_path, tree):
    arc = tmp_path / "logs.lcodec"
    r = cli("pack", tree, "-o", arc, "--frame-size", "2000")
    assert r.returncode == 0, err_of(r)
    out = tmp_path / "restored"
    r = cli("unpack", arc, "-o", out)
    assert r.returncode == 0, err_of(r)
    assert tree_of(out / "station-logs") == tree_of(tree)


def test_stdin_to_stdout(tmp_path, text_file):
    data = text_file.read_bytes()
    arc = tmp_path / "piped.lcodec"
    r = cli("pack", "-", "-o", arc, stdin=data)
    assert r.returncode == 0, err_of(r)
    r = cli("unpack", arc, "-o", "-")
    assert r.returncode == 0, err_of(r)
    assert r.stdout == data
    r = cli("unpack", "-", "-o", "-", stdin=arc.read_bytes())  # the archive from stdin too
    assert r.returncode == 0, err_of(r)
    assert r.stdout == data


# -- overwriting and missing inputs -------------------------------------------------------
def test_pack_refuses_to_overwrite_without_force(tmp_path, text_file):
    arc = tmp_path / "taken.lcodec"
    arc.write_bytes(b"precious")
    r = cli("pack", text_file, "-o", arc)
    assert r.returncode == 2
    no_traceback(r)
    assert "--force" in err_of(r)
    assert arc.read_bytes() == b"precious"
    r = cli("pack", text_file, "-o", arc, "--force")
    assert r.returncode == 0, err_of(r)
    assert arc.read_bytes() != b"precious"
    assert api.unpack(arc.read_bytes()) == text_file.read_bytes()


def test_unpack_refuses_to_overwrite_without_force(tmp_path, text_file, tree):
    arc = tmp_path / "a.lcodec"
    pack_file(text_file, arc)
    target = tmp_path / "taken.txt"
    target.write_bytes(b"precious")
    r = cli("unpack", arc, "-o", target)
    assert r.returncode == 2
    no_traceback(r)
    assert target.read_bytes() == b"precious"
    r = cli("unpack", arc, "-o", target, "--force")
    assert r.returncode == 0, err_of(r)
    assert target.read_bytes() == text_file.read_bytes()
    # a folder archive into an existing folder
    farc = tmp_path / "f.lcodec"
    pack_tree(tree, farc)
    dest = tmp_path / "dest"
    dest.mkdir()
    (dest / "keep.txt").write_bytes(b"mine")
    r = cli("unpack", farc, "-o", dest)
    assert r.returncode == 2
    no_traceback(r)
    assert os.listdir(dest) == ["keep.txt"]
    r = cli("unpack", farc, "-o", dest, "--force")
    assert r.returncode == 0, err_of(r)
    assert tree_of(dest / "station-logs") == tree_of(tree)
    assert (dest / "keep.txt").read_bytes() == b"mine"


def test_pack_refuses_to_overwrite_its_input(tmp_path, text_file):
    before = text_file.read_bytes()
    r = cli("pack", text_file, "-o", text_file, "--force")
    assert r.returncode == 2
    no_traceback(r)
    assert text_file.read_bytes() == before


def test_missing_inputs(tmp_path):
    arg_lists = [["pack", tmp_path / "nope.txt", "-o", tmp_path / "x.lcodec"],
                 ["unpack", tmp_path / "nope.lcodec", "-o", tmp_path / "x"],
                 ["verify", tmp_path / "nope.lcodec"],
                 ["info", tmp_path / "nope.lcodec"]]
    for args, r in zip(arg_lists, cli_all(arg_lists)):
        assert r.returncode == 2, (args[0], r.returncode, err_of(r))
        no_traceback(r)
        assert err_of(r).strip(), args[0]
    assert sorted(os.listdir(tmp_path)) == []


def test_pack_stdin_needs_an_output_name():
    r = cli("pack", "-", stdin=b"abc")
    assert r.returncode == 2
    no_traceback(r)


# -- verify -------------------------------------------------------------------------------
def test_verify_against(tmp_path, tree):
    arc = tmp_path / "logs.lcodec"
    pack_tree(tree, arc)
    r = cli("verify", arc, "--against", tree)
    assert r.returncode == 0, err_of(r)
    (tree / "2031" / "vk7.log").write_bytes(b"02:00 VK-7 wind 4.2 m/s\n" * 300)  # one member changed
    os.unlink(tree / "index.txt")  # and one gone
    r = cli("verify", arc, "--against", tree)
    assert r.returncode == 1
    no_traceback(r)
    err = err_of(r)
    assert "station-logs/2031/vk7.log" in err and "station-logs/index.txt" in err
    assert "heapq.py" not in err  # the unchanged members are not named


# -- info ---------------------------------------------------------------------------------
def test_info_json(tmp_path, tree, text_file):
    arc = tmp_path / "logs.lcodec"
    pack_tree(tree, arc)
    r = cli("info", arc, "--json")
    assert r.returncode == 0, err_of(r)
    d = json.loads(r.stdout)  # reference: the standard library's json parser
    for key in ("format_version", "content_bytes", "frames", "model", "members"):
        assert key in d, key
    assert d["format_version"] == 3 and len(d["archive_id"]) == 16
    assert d["content_bytes"] == sum(len(v) for v in tree_of(tree).values() if v is not None)
    paths = {m["path"] for m in d["members"]}
    assert "station-logs/2031/vk7.log" in paths and "station-logs/2031/empty" in paths
    # reference: hashlib.sha256 of the original file
    by_path = {m["path"]: m for m in d["members"]}
    assert by_path["station-logs/index.txt"]["sha256"] == hashlib.sha256(b"VK-7 VK-9 HR-2\n").hexdigest()
    # single file, text form
    farc = tmp_path / "one.lcodec"
    pack_file(text_file, farc)
    d1 = json.loads(cli("info", farc, "--json").stdout)
    assert d1["members"] is None and d1["content_bytes"] == len(text_file.read_bytes())
    r = cli("info", farc, "--frames")
    assert r.returncode == 0 and b"format version 3" in r.stdout


def test_info_on_a_damaged_archive(tmp_path, text_file):
    arc = tmp_path / "bad.lcodec"
    pack_file(text_file, arc)
    b = bytearray(arc.read_bytes())
    b[30] ^= 1
    arc.write_bytes(bytes(b))
    r = cli("info", arc)
    assert r.returncode == 1
    no_traceback(r)


# -- model files --------------------------------------------------------------------------
@pytest.fixture
def model_file(tmp_path):
    p = tmp_path / "small.lcm"
    sha = modelfile.dump(str(p), STRATA_SMALL)
    # reference: hashlib.sha256 of the file's bytes is the model's identity
    assert sha == hashlib.sha256(p.read_bytes()).hexdigest()
    return p, sha


def test_info_on_a_model_file(model_file):
    path, sha = model_file
    r = cli("info", path)
    assert r.returncode == 0, err_of(r)
    assert sha in r.stdout.decode() and "strata" in r.stdout.decode()
    r = cli("info", path, "--json")
    assert r.returncode == 0, err_of(r)
    d = json.loads(r.stdout)
    assert d["sha256"] == sha and d["architecture"] == STRATA_SMALL


def test_model_file_round_trip_and_wrong_or_missing_model(tmp_path, model_file, text_file):
    path, sha = model_file
    arc = tmp_path / "m.lcodec"
    r = cli("pack", text_file, "-o", arc, "-m", path)
    assert r.returncode == 0, err_of(r)
    assert api.info(arc.read_bytes())["model"]["sha256"] == sha
    # with the model: exact
    out = tmp_path / "with-model.py"
    r = cli("unpack", arc, "-o", out, "-m", path)
    assert r.returncode == 0, err_of(r)
    assert out.read_bytes() == text_file.read_bytes()
    # without it: exit 1, the message names the model's sha256, nothing written
    missing = tmp_path / "without-model.py"
    r = cli("unpack", arc, "-o", missing)
    assert r.returncode == 1, err_of(r)
    no_traceback(r)
    assert sha in err_of(r)
    assert not missing.exists()
    # with a different model file: exit 1, both identities named
    other = tmp_path / "other.lcm"
    other_sha = modelfile.dump(str(other), STRATA_OTHER)
    assert other_sha != sha
    r = cli("unpack", arc, "-o", missing, "-m", other)
    assert r.returncode == 1, err_of(r)
    no_traceback(r)
    assert sha in err_of(r) and other_sha in err_of(r)
    assert not missing.exists()
    assert [n for n in os.listdir(tmp_path) if n.endswith(".part") or ".part-" in n] == []


def test_damaged_model_file_is_refused(tmp_path, model_file, text_file):
    path, sha = model_file
    arc = tmp_path / "m.lcodec"
    pack_file(text_file, arc, model=path)
    blob = bytearray(path.read_bytes())
    i = blob.index(b"max_order") + 2  # one changed byte inside the metadata
    blob[i] ^= 0x01
    bad = tmp_path / "bad.lcm"
    bad.write_bytes(bytes(blob))
    arg_lists = [["unpack", arc, "-o", tmp_path / "x.py", "-m", bad],
                 ["pack", text_file, "-o", tmp_path / "y.lcodec", "-m", bad],
                 ["info", bad]]
    for args, r in zip(arg_lists, cli_all(arg_lists)):
        assert r.returncode == 1, (args[0], r.returncode, err_of(r))
        no_traceback(r)
        assert err_of(r).strip()
    assert not (tmp_path / "x.py").exists() and not (tmp_path / "y.lcodec").exists()


def test_a_warm_process_loads_kernels_without_numbas_compiler_registries(tmp_path, text_file):
    # pack and unpack load lcodec's cached kernels without numba's lowering registries
    # (kernel_cache._lean_cache_loads; numba.np.arraymath is one of them, and it pulls in
    # scipy): a start-up cost of 0.25-0.45 s and 15-25 MB. The first process may compile
    # (a cold cache: then numba loads everything, as it must); the second runs on the cache.
    # scipy must still import as usual afterwards, and the round trip must be exact.
    code = (
        "import sys\n"
        "from click.testing import CliRunner\n"
        "from lcodec.cli import main\n"
        f"r = CliRunner().invoke(main, ['pack', '-q', '--force', {str(text_file)!r}, '-o', {str(tmp_path / 'a.lcodec')!r}])\n"
        "assert r.exit_code == 0, r.output\n"
        f"r = CliRunner().invoke(main, ['unpack', '-q', '--force', {str(tmp_path / 'a.lcodec')!r}, '-o', {str(tmp_path / 'back')!r}])\n"
        "assert r.exit_code == 0, r.output\n"
        "print('lean' if 'numba.np.arraymath' not in sys.modules else 'full')\n"
        "import scipy.linalg\n")
    runs = [subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
            for _ in range(2)]
    for out in runs:
        assert out.returncode == 0, out.stderr
    assert runs[1].stdout.strip() == "lean", runs[1].stdout + runs[1].stderr
    assert (tmp_path / "back").read_bytes() == text_file.read_bytes()
