"""Keep numba's on-disk kernel cache honest across modules.

numba (cache=True) reuses a module's compiled kernels while that module's own source file
is unchanged, even when a kernel calls kernels of another module whose source changed:
braid's kernels inline strata's and recall's, so after an edit of recall.py alone (a
checkout, a `git pull` of an editable install) braid would keep running the old recall
code. An encoder and a decoder on two machines could then compute different tables.

`forget_if_changed(module_file, deps)` stamps, beside the module's cache files, a digest
of the sources of the modules its kernels call; when the stamp differs from the digest,
the module's cache files are removed before anything is compiled or loaded, so numba
compiles afresh. Call it at the top of such a module, after its imports.

It also holds the two decorators of the per-symbol kernels (see `kernel` below), and
makes numba load lcodec's cached kernels without its compiler's registries
(`_lean_cache_loads`).
"""
from __future__ import annotations

import glob
import hashlib
import os

from numba import njit

# The per-symbol kernels. A kernel runs a few hundred times per byte coded, with tuples of
# a dozen arrays as arguments; numba's reference counting then made one atomic increment
# and one decrement per array per call, which was about half of braid's time. `kernel`
# compiles without the reference counts, `inlined` also puts the body in its caller (the
# small helpers called once per layer). Without reference counts a function may neither
# allocate an array nor return one other than an argument; numba refuses to compile either
# (a typing error), so nothing can outlive its caller's references. Kernels that allocate
# keep plain njit.
kernel = njit(cache=True, nogil=True, _nrt=False)
inlined = njit(cache=True, nogil=True, _nrt=False, inline="always")


def _lean_cache_loads() -> bool:
    """Load lcodec's cached kernels without first loading numba's lowering registries.

    Before it loads a kernel from its on-disk cache, numba refreshes its target context:
    that imports every module of its compiler's implementations (numpy's array functions,
    linear algebra, typed containers, ... and scipy, through a BLAS look-up), 0.25-0.45 s
    and about 15-25 MB, more than the work of packing or unpacking a 40 KB file. A cached
    kernel is finished machine code: rebuilding it needs the code generator and numba's
    runtime (rtsys.initialize, which the refresh would have started), not those registries.
    So, for lcodec's own kernels only, the load starts the runtime and loads. A cache miss
    is unchanged (numba's compiler refreshes the context itself before compiling), and so
    is a load that fails here: it is tried again numba's way. Returns whether the load was
    replaced (False where this numba lacks the parts used: loads then stay numba's own)."""
    try:
        from numba.core import caching
        from numba.core.runtime import rtsys
    except ImportError:
        return False
    cls = caching.Cache
    full = cls.load_overload
    if getattr(full, "lcodec_lean", False):
        return True
    if not (hasattr(cls, "_load_overload") and hasattr(cls, "_guard_against_spurious_io_errors")
            and hasattr(rtsys, "initialize")):
        return False

    def load_overload(self, sig, target_context):
        py_func = getattr(self, "_py_func", None)
        if not getattr(py_func, "__module__", "").startswith("lcodec."):
            return full(self, sig, target_context)
        try:
            rtsys.initialize(target_context)
            with self._guard_against_spurious_io_errors():
                got = self._load_overload(sig, target_context)
        except Exception:  # noqa: BLE001 - numba's own way below reports what is wrong
            got = None
        return got if got is not None else full(self, sig, target_context)

    load_overload.lcodec_lean = True
    cls.load_overload = load_overload
    return True


LEAN_LOADS = _lean_cache_loads()


def forget_if_changed(module_file: str, deps: list[str]) -> None:
    folder = os.path.join(os.path.dirname(module_file), "__pycache__")
    stem = os.path.splitext(os.path.basename(module_file))[0]
    h = hashlib.sha256()
    for d in deps:
        try:
            with open(d, "rb") as f:
                h.update(f.read())
        except OSError:
            return  # sources not readable (a zipped install): nothing to compare
    digest = h.hexdigest()
    stamp = os.path.join(folder, f"{stem}.kernel-deps")
    try:
        with open(stamp) as f:
            if f.read().strip() == digest:
                return
    except OSError:
        pass
    try:
        for p in glob.glob(os.path.join(folder, f"{stem}.*.nb[ic]")):
            os.remove(p)
        os.makedirs(folder, exist_ok=True)
        with open(stamp, "w") as f:
            f.write(digest + "\n")
    except OSError:
        pass  # a read-only install: its files all come from one release, so nothing is stale
