"""Every crash or hang the coverage-guided fuzzing (fuzz/harness.py) finds becomes a test
here, with its minimised input. None so far: the runs reported in README.md
("Reliability") found no crash and no hang. This file checks the harness's targets
accept their own seeds, so that a regression input added below runs the same code."""
import importlib.util
import os

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

# (target, minimised input) for each crash or hang found; empty so far.
FOUND: list[tuple[str, bytes]] = []


@pytest.mark.parametrize("target", sorted(H.TARGETS))
def test_targets_take_their_seeds(target):
    for s in H.seeds(target)[:6]:
        H.TARGETS[target](s)


@pytest.mark.parametrize("target,data", FOUND)
def test_found_inputs_stay_fixed(target, data):
    H.TARGETS[target](data)
