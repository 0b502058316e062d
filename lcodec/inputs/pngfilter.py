"""PNG row reconstruction, compiled (numba). A module of its own so that the image readers
in images.py can be instrumented for fuzzing while this kernel is compiled from plain
bytecode (fuzz/harness.py)."""
from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def _unfilter(buf, rows, stride, bpp, out):
    """PNG reconstruction (filter types 0-4 of the PNG specification, ISO/IEC 15948)."""
    pos = 0
    for r in range(rows):
        ft = buf[pos]
        pos += 1
        for i in range(stride):
            x = np.int32(buf[pos + i])
            a = np.int32(out[r, i - bpp]) if i >= bpp else 0
            b = np.int32(out[r - 1, i]) if r > 0 else 0
            c = np.int32(out[r - 1, i - bpp]) if (r > 0 and i >= bpp) else 0
            if ft == 1:
                x += a
            elif ft == 2:
                x += b
            elif ft == 3:
                x += (a + b) >> 1
            elif ft == 4:
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                if pa <= pb and pa <= pc:
                    x += a
                elif pb <= pc:
                    x += b
                else:
                    x += c
            elif ft != 0:
                return False
            out[r, i] = np.uint8(x & 255)
        pos += stride
    return True
