"""What the image readers, the image layout code and the archive reader share with tessel
(lcodec/models/tessel.py), in a module of their own: importing it defines none of the
pixel model's kernels, which a byte archive's pack or unpack never runs."""
from __future__ import annotations

import threading
from contextlib import contextmanager

MAX_SAMPLES = 1 << 24  # samples in one image frame (the decoder holds 8 bytes per sample); larger: bytes
FLAG_BIG_ENDIAN, FLAG_SIGNED = 1, 2
PAYLOAD_VERSION = 1

_BLAS = {"lock": threading.Lock()}


def limit_blas() -> None:
    """BLAS on one thread from the first image decoded on, for the rest of the process (the
    products are small: one thread is faster). The setting is process-wide and deliberately
    not restored: restoring it after each decode made OpenBLAS change its thread count back
    and forth, and a decode in 2 threads after such a change ran at 4,800-16,000 pixels per
    second against 274,000-283,000 with the limit kept (load about 3; docs/notes/model-tessel.md,
    "Decoding threads"). Asked on every call (about 0.4 ms), so that a BLAS library loaded
    since the last call is limited too."""
    from threadpoolctl import threadpool_limits

    with _BLAS["lock"]:
        threadpool_limits(limits=1, user_api="blas")


@contextmanager
def one_blas_thread():
    """`limit_blas` around a decode (kept after it)."""
    limit_blas()
    yield
