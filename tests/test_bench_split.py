"""The same-kind image bench's split (scripts/bench_images.py, `_tiles`): every tile is
in the training set or the test set, never both, and the tiles put back where their names
say rebuild the image's whole-tile area sample for sample."""
import os
import sys

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "scripts"))
import bench_images as B  # noqa: E402


def test_checkerboard_tiles_are_disjoint_and_rebuild_the_image():
    rng = np.random.default_rng(5)
    a = rng.integers(0, 65536, size=(70, 100), dtype=np.uint16)
    tr, te = B._tiles(a, 16)
    pos_tr, pos_te = {p for p, _ in tr}, {p for p, _ in te}
    assert not pos_tr & pos_te
    assert len(pos_tr | pos_te) == (70 // 16) * (100 // 16)
    assert all((i + j) % 2 == 0 for i, j in pos_tr) and all((i + j) % 2 == 1 for i, j in pos_te)
    back = np.zeros_like(a)
    for (i, j), t in tr + te:
        assert t.shape == (16, 16) and t.dtype == a.dtype
        back[i * 16:(i + 1) * 16, j * 16:(j + 1) * 16] = t
    h, w = 16 * (70 // 16), 16 * (100 // 16)
    assert np.array_equal(back[:h, :w], a[:h, :w])


def test_caps_keep_tiles_spread_over_the_image():
    a = np.arange(8 * 8 * 3, dtype=np.uint8).reshape(8, 8, 3)
    tr, te = B._tiles(a, 1, cap_test=4, cap_train=5)
    assert len(tr) == 5 and len(te) == 4
    rows = [p[0] for p, _ in te]
    assert rows == sorted(rows) and rows[0] == 0 and rows[-1] >= 5  # first to last rows, not one corner
    for (i, j), t in tr + te:
        assert np.array_equal(t, a[i:i + 1, j:j + 1])
