"""The reversible component transform of RGB samples, and how tessel's colour mode uses it.

The transform (the reversible component transform of ITU-T T.800 | ISO/IEC 15444-1,
Annex G; I0, I1, I2 = R, G, B, all arithmetic on integers, floor division):

    Y0 = floor((R + 2 G + B) / 4)      Y1 = B - G      Y2 = R - G
    G  = Y0 - floor((Y1 + Y2) / 4)     R  = Y2 + G     B  = Y1 + G

For samples of d bits, Y0 keeps d bits and the chroma Y1, Y2 need d + 1 bits (-(2**d - 1) ..
2**d - 1: 9 bits for 8-bit samples).

How tessel codes them (params colour "rct", lcodec/models/tessel.py): one symbol of 8 bits
per 8-bit sample stays the rule, so the chroma planes are not coded with a 9-bit alphabet.
Instead channel 1 (G) is coded first, then Y1 and Y2. Given the pixel's G, Y1 = B - G lies in
the 256 values -G .. 255 - G (and Y2 likewise), so the 8-bit residual (B - pred) mod 256, with
pred = (the median prediction in the Y1 plane) + G clamped to 0..255, determines Y1 exactly;
the same holds with 16 bits and residuals mod 65536. Y0 is not coded: it follows from G, Y1
and Y2 (`rct_luma_of`). Coding Y0 first instead would leave Y1 free over all 511 values for
some Y0 (Y0 = 127: R = B = 255, G = 0 gives Y1 = 255; R = B = 0, G = 255 gives Y1 = -255), so
every chroma sample would need a second symbol.

The functions here are the transform as published, on numpy arrays (vectorised) and on Python
integers (the reference the tests compare both with); the decoder needs none of them (tessel
predicts in the chroma planes directly), so they cost it nothing.
"""
from __future__ import annotations

import numpy as np


def rct_forward(rgb: np.ndarray) -> np.ndarray:
    """(..., 3) unsigned samples -> (..., 3) int64: Y0, Y1, Y2 (ITU-T T.800 Annex G)."""
    a = np.asarray(rgb, np.int64)
    R, G, B = a[..., 0], a[..., 1], a[..., 2]
    return np.stack([(R + 2 * G + B) >> 2, B - G, R - G], axis=-1)  # >> 2 is floor division by 4


def rct_inverse(y: np.ndarray) -> np.ndarray:
    """(..., 3) Y0, Y1, Y2 -> (..., 3) int64 R, G, B (ITU-T T.800 Annex G)."""
    a = np.asarray(y, np.int64)
    G = a[..., 0] - ((a[..., 1] + a[..., 2]) >> 2)  # floor, also for negative sums
    return np.stack([a[..., 2] + G, G, a[..., 1] + G], axis=-1)


def rct_luma_of(g, y1, y2):
    """Y0 from what tessel codes: G and the chroma Y1, Y2 (Y0 = G + floor((Y1 + Y2) / 4))."""
    return g + ((y1 + y2) >> 2)


def rct_forward_int(r: int, g: int, b: int) -> tuple[int, int, int]:
    """The forward transform on Python integers (// is floor division)."""
    return (r + 2 * g + b) // 4, b - g, r - g


def rct_inverse_int(y0: int, y1: int, y2: int) -> tuple[int, int, int]:
    """The inverse transform on Python integers."""
    g = y0 - (y1 + y2) // 4
    return y2 + g, g, y1 + g
