"""The CI smoke run of the coverage-guided fuzzing (fuzz/harness.py, atheris): every
target for about 10 s (about 60 s in all; salvage has two, `salvage` and `salvage-scan`),
seeded from the golden vectors; no crash, no hang, no huge allocation. The long run is scripts/bench_fuzz.py; README.md ("Reliability") has its
figures."""
import os
import re
import subprocess
import sys

import pytest

atheris = pytest.importorskip("atheris", reason="atheris is not installed (pip install -e .[test] installs it); "
                                                "the coverage-guided fuzzing smoke run is skipped")

HARNESS = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "fuzz", "harness.py")
TARGETS = ["container", "salvage", "salvage-scan", "modelfile", "images", "descriptor"]
SECONDS = {"salvage": 12, "salvage-scan": 8, "container": 11, "modelfile": 11, "images": 10, "descriptor": 8}


@pytest.mark.fuzz
@pytest.mark.parametrize("target", TARGETS)
def test_fuzz_smoke(target, tmp_path):
    corpus = tmp_path / "corpus"
    subprocess.run([sys.executable, HARNESS, "--seeds", target, str(corpus)], check=True, capture_output=True)
    assert len(os.listdir(corpus)) >= 3
    max_len = 1 << 15 if target == "modelfile" else 4096
    r = subprocess.run([sys.executable, HARNESS, target, f"-max_total_time={SECONDS[target]}", f"-max_len={max_len}",
                        "-timeout=10", "-rss_limit_mb=2048", f"-artifact_prefix={tmp_path}/", str(corpus)],
                       capture_output=True, text=True, timeout=300)
    found = [f for f in os.listdir(tmp_path) if f.startswith(("crash", "timeout", "oom", "leak"))]
    assert r.returncode == 0 and not found, r.stderr[-3000:]
    runs = re.search(r"Done (\d+) runs", r.stderr)
    assert runs and int(runs.group(1)) > 0
