"""`lcodec explain` (lcodec.explain): per-byte costs under the model, in file order, that
add up to what `lcodec pack` really codes, and the pages drawn from them.

Outside references: real text is the Python standard library's own sources (the
`stdlib_text` fixture); the coded-size bound is the one stated in docs/FORMAT.md ("Fixed
costs and bounds"); random bytes come from numpy's generator, whose cost per byte no
model can push below 8 bits on average (Shannon's source coding theorem, Cover & Thomas,
Elements of Information Theory, ch. 5); numpy's sliding_window_view gives the window
sums independently; Pillow decodes the PNG strip and the screenshots; the standard
library's html.parser reads the page; Debian's headless Chromium renders it (skipped,
saying so, only where chromium cannot be found).
"""
from __future__ import annotations

import os
import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
import pytest

from lcodec import api
from lcodec.format import container as C
from lcodec.coding import active_lanes, lane_layout
from lcodec.measure.explain import (TOP_N, WINDOW, explain, heat_png, looks_like_text, render_html,
                            symbol_costs, top_windows)
from lcodec.models import resolve
from lcodec.models.strata import Strata

from pageshot import ink_stats, screenshot

FRAME = 1 << 15  # small frames, so that one test file spans several frames of several lanes


@pytest.fixture(scope="module")
def text_explained(stdlib_text):
    data = stdlib_text[:100_000]
    return explain(data, frame_size=FRAME)


def test_costs_sum_to_pack_stats_nll(stdlib_text):
    for data, fs in ((stdlib_text[:40_000], api.DEFAULT_FRAME_SIZE), (stdlib_text[:5_000], 1000)):
        costs = symbol_costs(data, frame_size=fs)
        assert costs.shape == (len(data),) and costs.dtype == np.float64
        assert np.all(costs > 0)
        _, stats = api.pack_stats(data, frame_size=fs)
        assert stats.stored_frames == 0
        assert costs.sum() == pytest.approx(stats.nll_bits, rel=1e-6)


def test_explained_total_within_the_stated_coding_bound(text_explained):
    ex = text_explained
    assert len(ex.frames) == 4 and all(f.lanes == api.choose_lanes(f.raw_bytes) > 1 for f in ex.frames[:3])
    assert ex.total_bits == pytest.approx(ex.pack_nll_bits, rel=1e-6)
    # docs/FORMAT.md, "Fixed costs and bounds": coded payload <= NLL x 1.001 + 8 bytes per frame
    for f in ex.frames:
        assert f.payload_bytes <= f.model_bits / 8 * 1.001 + 8
        assert f.payload_bytes >= f.model_bits / 8 * 0.999  # and not (much) below the NLL
    # the archive is the payloads plus the frame records plus the header, nothing else
    blob, stats = api.pack_stats(ex.data, frame_size=FRAME)
    cont = C.read_container(blob)
    assert ex.archive_bytes == len(blob) == stats.coded_bytes
    assert ex.archive_bytes == ex.payload_bytes + ex.record_bytes + ex.header_bytes
    assert ex.header_bytes == cont.frames[0].offset
    assert len(blob) <= ex.total_bits / 8 * 1.001 + 8 * len(ex.frames) + ex.record_bytes + ex.header_bytes


def test_costs_are_in_file_order_like_the_decoders_step_pass(stdlib_text):
    # The decoder's pass (model.stepper, positions starts[:m] + t as coder.decode_frame
    # writes them) must give each byte the same cost as the encoder pass mapped back.
    data = stdlib_text[:40_000]
    lanes = api.choose_lanes(len(data))
    assert lanes == 2
    arr = np.frombuffer(data, np.uint8)
    starts, lengths = lane_layout(len(arr), lanes)
    n_steps = int(lengths[0])
    act = active_lanes(lengths, n_steps)
    m_model = Strata()
    step = m_model.stepper(lengths)
    want = np.empty(len(arr))
    prev = np.zeros(lanes, np.int32)
    m_prev = 0
    for t in range(n_steps):
        m = int(act[t])
        tab = step(prev, m_prev, m)
        pos = starts[:m] + t
        syms = arr[pos]
        want[pos] = -np.log2(tab[np.arange(m), syms] / tab.sum(axis=1))
        prev[:m] = syms
        m_prev = m
    step.close()
    got = symbol_costs(data)
    assert np.array_equal(got, want)


def test_random_bytes_cost_at_least_eight_bits_and_are_stored():
    rng = np.random.default_rng(2031)
    data = rng.integers(0, 256, 150_000, dtype=np.uint8).tobytes()
    ex = explain(data)
    # Shannon: no model codes iid uniform bytes below 8 bits per byte on average
    assert ex.bits_per_byte > 8 * 0.995
    assert [f.method for f in ex.frames] == ["stored"]
    assert ex.charged_bits == pytest.approx(ex.pack_nll_bits, rel=1e-12) == 8.0 * len(data)
    assert ex.payload_bytes == len(data)


def test_top_windows_are_the_costliest_and_do_not_overlap(text_explained):
    costs = text_explained.costs
    top = top_windows(costs)
    assert len(top) == TOP_N
    # reference: numpy's sliding_window_view sums every window independently
    sums = np.lib.stride_tricks.sliding_window_view(costs, WINDOW).sum(axis=1)
    assert top[0][2] == pytest.approx(sums.max(), rel=1e-9)
    assert [b for _, _, b in top] == sorted((b for _, _, b in top), reverse=True)
    starts = sorted(o for o, _, _ in top)
    assert all(b - a >= WINDOW for a, b in zip(starts, starts[1:]))
    for off, ln, bits in top:
        assert ln == WINDOW and bits == pytest.approx(costs[off:off + ln].sum(), rel=1e-9)
    assert top_windows(costs[:10]) == [(0, 10, pytest.approx(costs[:10].sum()))]
    assert top_windows(np.zeros(0)) == []


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.text, self.refs, self.ids = [], [], set()

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        self.refs += [a[k] for k in ("src", "href") if a.get(k)]

    def handle_data(self, d):
        self.text.append(d)


def test_page_of_text_and_its_cap(text_explained):
    ex = text_explained
    page = render_html(ex, "stdlib.py", view_bytes=20_000)
    # reference: the standard library's html.parser reads the page back
    p = _Page()
    p.feed(page)
    body = "".join(p.text)
    assert "Showing the first 20,000 of 100,000 bytes" in body
    assert f"{ex.archive_bytes:,}" in body and f"{ex.total_bits:,.0f}" in body and f"{ex.bits_per_byte:.3f}" in body
    assert all(ref.startswith(("#", "data:")) for ref in p.refs)  # self-contained
    # the rendered text is the file's first 20,000 bytes (line ends drawn as a glyph)
    view = page[page.index('<pre class="view">'):]
    q = _Page()
    q.feed(view)
    shown = "".join(q.text).replace("\u21b5\n", "\n")
    assert shown.startswith(ex.data[:20_000].decode("utf-8")[:2000])
    for off, _, _ in ex.top:
        if off < 20_000:
            assert f"o{off}" in p.ids


def test_page_of_binary_is_a_hex_view_and_utf8_text_renders():
    rng = np.random.default_rng(5)
    blob = bytes(rng.integers(0, 256, 3000, dtype=np.uint8)) + b"\x00" * 500
    assert not looks_like_text(blob)
    page = render_html(explain(blob), "blob.bin")
    assert 'class="view hex"' in page and "00000010" in page
    txt = ("Station Tarnvik-7: humidité 81 %, température −3,5 °C, état « veille » ✓\n" * 40).encode("utf-8")
    assert looks_like_text(txt)
    ex = explain(txt)
    page = render_html(ex, "tarnvik.txt")
    assert "humidité" in page and "✓" in page
    empty = explain(b"")
    assert empty.costs.shape == (0,) and empty.frames == [] and "All 0 bytes" in render_html(empty, "e")


def test_heat_strip_png(text_explained, tmp_path):
    png = heat_png(text_explained, str(tmp_path / "s.png"))
    assert (tmp_path / "s.png").read_bytes() == png
    _, inked = ink_stats(str(tmp_path / "s.png"))
    assert inked > 0.05


def test_page_renders_in_headless_chromium(text_explained, tmp_path):
    page = tmp_path / "explain.html"
    page.write_text(render_html(text_explained, "stdlib.py", view_bytes=30_000,
                                png=heat_png(text_explained)), encoding="utf-8")
    shot = screenshot(str(page), str(tmp_path / "shot.png"))
    colours, inked = ink_stats(shot)
    assert colours > 50 and inked > 0.05


def _cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "lcodec", *map(str, args)], capture_output=True,
                          timeout=300, cwd=cwd)


def test_cli_explain(tmp_path, stdlib_text):
    src = tmp_path / "notes.py"
    src.write_bytes(stdlib_text[:30_000])
    out = tmp_path / "notes.html"
    r = _cli("explain", src, "-o", out)
    assert r.returncode == 0, r.stderr
    assert out.is_file() and (tmp_path / "notes.png").is_file()
    from PIL import Image  # reference: Pillow decodes the strip

    with Image.open(tmp_path / "notes.png") as im:
        assert im.format == "PNG" and im.size[0] > 500
    again = _cli("explain", src, "-o", out)
    assert again.returncode == 2 and b"--force" in again.stderr
    other = tmp_path / "elsewhere.png"
    assert _cli("explain", src, "-o", out, "--png", other, "--force", "-q").returncode == 0 and other.is_file()
    missing = _cli("explain", tmp_path / "nope.txt", "-o", tmp_path / "n.html")
    assert missing.returncode == 2 and b"no such file" in missing.stderr
    folder = _cli("explain", tmp_path, "-o", tmp_path / "f.html")
    assert folder.returncode == 2 and b"Traceback" not in folder.stderr
    same = _cli("explain", src, "-o", src, "--force")
    assert same.returncode == 2 and b"overwrite the input" in same.stderr
    h = _cli("explain", "--help")
    assert h.returncode == 0 and b"Example:" in h.stdout
    assert not [n for n in os.listdir(tmp_path) if n.startswith(".")]  # no temporary files left


def test_model_file_with_its_own_lane_choice():
    # the committed golden model file (a learned model choosing its own lane count)
    golden = os.path.join(os.path.dirname(__file__), "golden")
    model, orig = os.path.join(golden, "weft-tiny.lcmodel"), os.path.join(golden, "weft-v1-text.orig")
    if not (os.path.isfile(model) and os.path.isfile(orig)):
        pytest.skip("no golden model file here")
    with open(orig, "rb") as f:
        data = f.read()
    ex = explain(data, model)
    m = resolve(model)
    assert [f.lanes for f in ex.frames] == [api.frame_lanes(m, len(data))]
    assert ex.frames[0].method != "stored"
    assert ex.total_bits == pytest.approx(api.pack_stats(data, model)[1].nll_bits, rel=1e-6)
