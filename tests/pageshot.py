"""Screenshots of our HTML pages in headless Chromium (Debian's `chromium` package,
installed by .ci/run), checked with Pillow and numpy for not being blank."""
from __future__ import annotations

import os
import shutil
import subprocess
import tempfile

import numpy as np
import pytest


def chromium_path() -> str | None:
    for name in ("chromium", "chromium-browser"):
        p = shutil.which(name)
        if p:
            return p
    return "/usr/bin/chromium" if os.access("/usr/bin/chromium", os.X_OK) else None


def screenshot(page: str, out_png: str, size=(1200, 900)) -> str:
    """Render `page` (a local HTML file) to `out_png`; skip when Chromium is not here."""
    exe = chromium_path()
    if exe is None:
        pytest.skip("chromium not found (Debian package `chromium`; .ci/run installs it)")
    with tempfile.TemporaryDirectory() as profile:
        cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={profile}", f"--screenshot={out_png}", f"--window-size={size[0]},{size[1]}",
               "file://" + os.path.abspath(page)]
        r = subprocess.run(cmd, capture_output=True, timeout=120)
    assert os.path.isfile(out_png), f"chromium wrote no screenshot (rc {r.returncode}): {r.stderr[-2000:]!r}"
    return out_png


def ink_stats(png_path: str) -> tuple[int, float]:
    """(number of distinct colours, fraction of pixels that are not near-white)."""
    from PIL import Image  # reference: Pillow decodes the screenshot

    with Image.open(png_path) as im:
        px = np.asarray(im.convert("RGB"), dtype=np.int16)
    colours = len(np.unique(px.reshape(-1, 3), axis=0))
    inked = float((px.min(axis=2) < 235).mean())
    return colours, inked
