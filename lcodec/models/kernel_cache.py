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

It also holds the two decorators of the per-symbol kernels (see `kernel` below).
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
