"""The per-symbol kernels compile without numba's reference counts (kernel_cache.kernel and
.inlined). A bare njit on one of them costs nothing in correctness but about half of
braid's speed (docs/notes/2026-12-04-speed-kernels.md), so a slip must show here: every
compiled function of the byte models is either one of the two, or one of the few loops
that allocate their own scratch (named below, each with its reason)."""
import importlib

import pytest
from numba.core.registry import CPUDispatcher

MODULES = ["braid", "braid_layers", "braid_fork", "strata", "recall"]
# loops that allocate scratch (np.empty / np.zeros), which needs the reference counts
ALLOCATING = {
    "braid._teacher", "braid._decode_steps",
    "strata._teacher", "strata._decode_steps",
    "strata._symbols_of_step",  # object mode
}


def _dispatchers():
    for name in MODULES:
        mod = importlib.import_module(f"lcodec.models.{name}")
        for attr, obj in vars(mod).items():
            if isinstance(obj, CPUDispatcher) and obj.py_func.__module__ == mod.__name__:
                yield f"{name}.{attr}", obj


def test_every_byte_model_kernel_runs_without_reference_counts():
    seen = dict(_dispatchers())
    assert len(seen) > 40  # the scan found the kernels (not a vacuous pass)
    bare = sorted(k for k, d in seen.items() if d.targetoptions.get("_nrt", True) and k not in ALLOCATING)
    assert bare == [], f"per-symbol kernels with reference counts (use kernel or inlined): {bare}"
    stale = sorted(ALLOCATING - set(seen))
    assert stale == [], f"names in ALLOCATING that no longer exist: {stale}"


@pytest.mark.parametrize("name", sorted(ALLOCATING))
def test_the_allocating_loops_keep_reference_counts(name):
    d = dict(_dispatchers())[name]
    assert d.targetoptions.get("_nrt", True) is not False
