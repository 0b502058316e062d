"""The package's layering, checked from its imports (import-linter and grimp, the graph
library it is built on: well-kept tools the project did not write).

The contracts live in pyproject.toml ([tool.importlinter]): the layers (imports point
down only), the decoding path free of torch and of the training code, no use of the old
module paths inside the package, and no import cycles between siblings at any depth.
Beside them: no module-level cycle at all, the size limits the layout is held to, a
check that the layers contract does fail on an upward import (on a copy of the
package), and a decode through the CLI in a process where torch cannot be imported.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys

import pytest

importlinter = pytest.importorskip("importlinter", reason="import-linter is in the test extra (pip install -e .[test])")
grimp = pytest.importorskip("grimp")

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
PKG = os.path.join(ROOT, "lcodec")
MAX_LINES = 900
API_MAX_LINES = 300
# modules allowed over MAX_LINES, each with its reason (none today)
OVER_LIMIT: dict[str, str] = {}


def _lint(config: str, cwd: str, env=None) -> subprocess.CompletedProcess:
    code = ("import sys; from importlinter.cli import lint_imports; "
            "sys.exit(lint_imports(config_filename=sys.argv[1], no_cache=True, no_logo=True))")
    return subprocess.run([sys.executable, "-c", code, config], cwd=cwd, capture_output=True, text=True,
                          timeout=300, env=env)


def test_import_contracts_are_kept():
    r = _lint(os.path.join(ROOT, "pyproject.toml"), ROOT)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "0 broken" in r.stdout and "4 kept" in r.stdout, r.stdout


def test_the_layers_contract_fails_on_an_upward_import(tmp_path):
    """On a copy of the package (under another name, so nothing installed is read): one
    import from the container format up into the archive layer breaks the contract."""
    probe = tmp_path / "lcprobe"
    shutil.copytree(PKG, probe, ignore=shutil.ignore_patterns("__pycache__"))
    target = probe / "format" / "container.py"
    target.write_text(target.read_text() + "\n\ndef _upward():\n    from ..archive import plan  # noqa: F401\n")
    text = open(os.path.join(ROOT, "pyproject.toml")).read()
    conf = text[text.index("[tool.importlinter]"):].replace("lcodec", "lcprobe")
    (tmp_path / "probe.toml").write_text(conf)
    env = dict(os.environ, PYTHONPATH=str(tmp_path))
    r = _lint(str(tmp_path / "probe.toml"), str(tmp_path), env)
    assert r.returncode != 0, r.stdout
    assert "layers: imports point down only BROKEN" in r.stdout
    assert "lcprobe.format.container -> lcprobe.archive.plan" in r.stdout


def test_no_module_imports_itself_back():
    """No cycle in the module graph (Tarjan's strongly connected components over grimp's
    graph of every import, function-level ones included)."""
    g = grimp.build_graph("lcodec", cache_dir=None)
    mods = sorted(g.modules)
    index, low, stack, on, comps, n = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = n[0]
        n[0] += 1
        stack.append(v)
        on.add(v)
        for w in g.find_modules_directly_imported_by(v):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            comps.append(comp)

    sys.setrecursionlimit(max(sys.getrecursionlimit(), 10000))
    for v in mods:
        if v not in index:
            visit(v)
    cycles = [sorted(c) for c in comps if len(c) > 1]
    assert len(mods) > 40 and not cycles, cycles


def test_module_sizes():
    sizes = {}
    for folder, _, names in os.walk(PKG):
        for name in names:
            if name.endswith(".py"):
                path = os.path.join(folder, name)
                with open(path, encoding="utf-8") as f:
                    sizes[os.path.relpath(path, ROOT).replace(os.sep, "/")] = sum(1 for _ in f)
    assert sizes["lcodec/api.py"] <= API_MAX_LINES, sizes["lcodec/api.py"]
    over = {p: n for p, n in sizes.items() if n > MAX_LINES and p not in OVER_LIMIT}
    assert not over, over


def test_decoding_runs_where_torch_cannot_be_imported(tmp_path):
    """`lcodec pack` and `unpack` through the CLI in a process where `import torch` fails:
    nothing on the way needs it."""
    src = tmp_path / "gate.log"
    src.write_bytes(b"".join(b"gate %d: latch %s\n" % (i, b"open" if i % 3 else b"shut") for i in range(3000)))
    code = ("import sys; sys.modules['torch'] = None; from lcodec.cli import main; "
            "main(sys.argv[1:], standalone_mode=False); "
            "assert sys.modules['torch'] is None and not any(m.startswith('lcodec.training') for m in sys.modules)")
    for args in (["pack", str(src), "-o", str(tmp_path / "g.lcodec"), "-q"],
                 ["unpack", str(tmp_path / "g.lcodec"), "-o", str(tmp_path / "back.log"), "-q"]):
        r = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, timeout=300)
        assert r.returncode == 0, r.stderr
    assert (tmp_path / "back.log").read_bytes() == src.read_bytes()
