"""The per-symbol kernels compile without numba's reference counts (kernel_cache.kernel and
.inlined). A bare njit on one of them costs nothing in correctness but about half of
braid's speed (docs/notes/2026-12-04-speed-kernels.md), so a slip must show here: every
compiled function of the byte models is one of the two. No kernel allocates: the encoder's
and decoder's loops take their scratch from the caller (new_work), which also keeps numba's
array module out of a process that loads them from the cache (a start-up cost)."""

import importlib

from numba.core.registry import CPUDispatcher

MODULES = ["braid", "braid_layers", "braid_fork", "strata", "recall"]


def _dispatchers():
    for name in MODULES:
        mod = importlib.import_module(f"lcodec.models.{name}")
        for attr, obj in vars(mod).items():
            if isinstance(obj, CPUDispatcher) and obj.py_func.__module__ == mod.__name__:
                yield f"{name}.{attr}", obj


def test_every_byte_model_kernel_runs_without_reference_counts():
    seen = dict(_dispatchers())
    assert len(seen) > 40  # the scan found the kernels (not a vacuous pass)
    bare = sorted(k for k, d in seen.items() if d.targetoptions.get("_nrt", True))
    assert bare == [], f"kernels with reference counts (use kernel or inlined): {bare}"
