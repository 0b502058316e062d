"""Every crash or hang the coverage-guided fuzzing (fuzz/harness.py) finds becomes a test
here, with its input (tests/fuzz_found/). Two so far:
* the `salvage-scan` run of 2026-12-05 stopped at libFuzzer's memory limit (2,048 MB) after
  222,062 executions; the input it was running (salvage-scan-rss-2026-12-05) is harmless on
  its own (about 230 MB, the process's start), the memory had grown in every execution (see
  test_every_offset_head_test_keeps_no_memory_under_instrumentation);
* the `salvage` run of 2026-12-05 (third session) hung after 113,548 executions
  (salvage-hang-2026-12-05): a damaged header claiming 2 bytes of content, and a
  version-2 record found by scanning that claims far more. Version-2 frames have no
  sub-frame checks, so salvage decoded all of the claim (16 s under the fuzzer); salvage
  now takes the output ceiling over the frames' claims (test_salvage_keeps_to_its_ceiling). This file also checks
the harness's targets accept their own seeds, so that a regression input runs the same code."""
import importlib.util
import os
import subprocess
import sys

import pytest

pytest.importorskip("atheris", reason="atheris is not installed: the harness module needs it")

# imported first, so that loading the harness does not instrument them for the rest of the suite
import lcodec.archive.read  # noqa: E402,F401
import lcodec.archive.salvage  # noqa: E402,F401
import lcodec.inputs.images  # noqa: E402,F401

HERE = os.path.dirname(os.path.abspath(__file__))
_spec = importlib.util.spec_from_file_location("lcodec_fuzz_harness", os.path.join(HERE, "..", "fuzz", "harness.py"))
H = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(H)

FOUND_DIR = os.path.join(HERE, "fuzz_found")
# (target, input) for each crash, hang or memory-limit stop found
FOUND: list[tuple[str, bytes]] = [
    ("salvage-scan", open(os.path.join(FOUND_DIR, "salvage-scan-rss-2026-12-05"), "rb").read()),
    ("salvage", open(os.path.join(FOUND_DIR, "salvage-hang-2026-12-05"), "rb").read()),
]


def test_salvage_keeps_to_its_ceiling(monkeypatch):
    # the hang's archive: salvage with the harness's ceiling decodes at most that many bytes
    # of content over all frames, and reports the frame past it
    from lcodec.archive import salvage as S

    data = open(os.path.join(FOUND_DIR, "salvage-hang-2026-12-05"), "rb").read()
    blob = H._split(data, H.reseal_archive)
    asked = []
    real = S.decode_record

    def counted(model, fr):
        asked.append(fr.raw_len)
        return real(model, fr)

    monkeypatch.setattr(S, "decode_record", counted)
    res = S.salvage(blob, ceiling=H.MAX_DECODE)
    assert sum(asked) <= H.MAX_DECODE
    lines = " ".join(p.reason for p in [*res.frames.values(), *res.pieces])
    assert "output ceiling" in lines, lines


@pytest.mark.parametrize("target", sorted(H.TARGETS))
def test_targets_take_their_seeds(target):
    for s in H.seeds(target)[:6]:
        H.TARGETS[target](s)


@pytest.mark.parametrize("target,data", FOUND)
def test_found_inputs_stay_fixed(target, data):
    H.TARGETS[target](data)


# salvage_bound.head_offsets under atheris' instrumentation, called again and again on the
# input the run stopped at; prints how much the resident memory grew (KB).
_GROWTH = r"""
import atheris, sys
with atheris.instrument_imports(include=["lcodec"]):
    from lcodec.archive import salvage_bound as B
data = memoryview(open(sys.argv[1], "rb").read()[1:])
def rss_kb():
    return int(open("/proc/self/statm").read().split()[1]) * 4096 // 1024
for _ in range(200):
    B.head_offsets(data, 0, len(data), True)
before = rss_kb()
for _ in range(3000):
    B.head_offsets(data, 0, len(data), True)
    B.head_offsets(data, 0, len(data), False)
print(rss_kb() - before)
"""


@pytest.mark.skipif(not os.path.exists("/proc/self/statm"), reason="reads Linux's /proc/self/statm")
def test_every_offset_head_test_keeps_no_memory_under_instrumentation():
    """The memory-limit stop of 2026-12-05: atheris' hook on comparison operators kept a
    reference to every numpy array compared with `<` in head_offsets (about 11 KB per
    execution, so 2 GB after about 200,000). head_offsets now compares with np.less; 6,000
    calls must not grow the process by 8 MB (they grew it by about 60 MB before)."""
    r = subprocess.run([sys.executable, "-c", _GROWTH, os.path.join(FOUND_DIR, "salvage-scan-rss-2026-12-05")],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    assert int(r.stdout.split()[-1]) < 8 * 1024, r.stdout
