"""`lcodec bench --report DIR` (lcodec.report): the numbers each chart plots are the
bench's own rows, the rows written beside the page read back equal, the page is
self-contained and renders in a real browser.

Outside references: the corpus is the Python standard library's own sources (located
with sysconfig); zlib.compress (level 9) gives the zlib-9 sizes independently; the
standard library's json, csv and html.parser read what the report wrote; Pillow decodes
the PNG charts and the browser's screenshot; Debian's headless Chromium renders the
page (skipped, saying so, only where chromium cannot be found).
"""
from __future__ import annotations

import base64
import csv
import io
import json
import math
import os
import shutil
import subprocess
import sys
import sysconfig
import zlib
from html.parser import HTMLParser

import pytest

from lcodec.measure import bench as B
from lcodec.measure.baselines import make_baselines
from lcodec.errors import UsageError
from lcodec.measure.report import CHARTS, require_matplotlib, write_report

from pageshot import ink_stats, screenshot

TEST_NAMES = ("bisect.py", "colorsys.py", "keyword.py", "shlex.py")
TRAIN_NAMES = ("abc.py", "base64.py", "calendar.py", "csv.py", "fnmatch.py", "glob.py")


def _stdlib(name: str) -> bytes:
    # reference: the Python standard library's own sources
    p = os.path.join(sysconfig.get_paths()["stdlib"], name)
    if not os.path.isfile(p):
        pytest.skip(f"{p} is not on this machine")
    with open(p, "rb") as f:
        return f.read()


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    root = tmp_path_factory.mktemp("corpus")
    for split, names in (("train", TRAIN_NAMES), ("test", TEST_NAMES)):
        os.makedirs(root / split)
        for n in names:
            (root / split / n).write_bytes(_stdlib(n))
    (root / "test" / "empty.txt").write_bytes(b"")  # bits per byte undefined: must not break a chart
    return root


@pytest.fixture(scope="module")
def bench_rows(corpus):
    train = [_stdlib(n) for n in TRAIN_NAMES]
    baselines = make_baselines(["zlib-9", "bz2-9", "zstd-19-dict", "zstd-19-rawdict", "ppmd-o16-primed"], train)
    return B.run_bench(str(corpus), [B.lcodec_codec(None, "lcodec-strata")], baselines=baselines)


@pytest.fixture(scope="module")
def report(bench_rows, tmp_path_factory):
    out = tmp_path_factory.mktemp("rep") / "report"
    data = write_report(bench_rows, str(out), title="Report test: standard library sources")
    return out, data


def _totals(rows):
    return {r["codec"]: r for r in rows if r["file"] == B.TOTAL}


def test_report_folder_holds_every_file(report):
    out, _ = report
    names = set(os.listdir(out))
    assert {"index.html", "summary.md", "bench.json", "bench.csv", "charts.json"} <= names
    assert {f"{c}.png" for c in CHARTS} <= names
    from PIL import Image  # reference: Pillow decodes the charts

    for c in CHARTS:
        with Image.open(out / f"{c}.png") as im:
            assert im.format == "PNG" and im.size[0] > 400 and im.size[1] > 200


def test_plotted_bits_per_byte_are_the_totals(report, bench_rows):
    _, data = report
    totals = _totals(bench_rows)
    assert {d["codec"] for d in data["bits_per_byte"]} == set(totals)
    for d in data["bits_per_byte"]:
        t = totals[d["codec"]]
        assert d["bits_per_byte"] == t["bits_per_byte"] == 8 * t["coded_bytes"] / t["raw_bytes"]
        assert d["model_bytes"] == t["model_bytes"]
        assert d["with_model_bits_per_byte"] == 8 * (t["coded_bytes"] + t["model_bytes"]) / t["raw_bytes"]
    # reference: zlib itself (level 9), file by file, gives the plotted zlib-9 figure
    sizes = [len(_stdlib(n)) for n in TEST_NAMES]
    coded = [len(zlib.compress(_stdlib(n), 9)) for n in TEST_NAMES] + [len(zlib.compress(b"", 9))]
    z = next(d for d in data["bits_per_byte"] if d["codec"] == "zlib-9")
    assert z["bits_per_byte"] == pytest.approx(8 * sum(coded) / sum(sizes), rel=1e-12)
    # the dictionary codecs carry their dictionary's size beside their ratio, the primed
    # PPMd its prime's coded size: the raw dictionary is the train files joined
    raw = sum(len(_stdlib(n)) for n in TRAIN_NAMES)
    for codec in ("zstd-19-dict", "zstd-19-rawdict", "ppmd-o16-primed"):
        zd = next(d for d in data["bits_per_byte"] if d["codec"] == codec)
        assert zd["model_bytes"] > 0 and zd["with_model_bits_per_byte"] > zd["bits_per_byte"]
        if codec == "zstd-19-rawdict":
            assert zd["model_bytes"] == raw


def test_plotted_per_file_points_are_the_file_rows(report, bench_rows):
    _, data = report
    files = [r for r in bench_rows if r["file"] != B.TOTAL]
    for codec, pts in data["per_file"].items():
        want = [(r["file"], r["raw_bytes"], r["bits_per_byte"]) for r in files
                if r["codec"] == codec and r["bits_per_byte"] is not None]
        assert [(p["file"], p["raw_bytes"], p["bits_per_byte"]) for p in pts] == want
        assert len(pts) == len(TEST_NAMES)  # the empty file (no bits per byte) is left out


def test_plotted_tradeoff_and_overhead_are_the_rows(report, bench_rows):
    _, data = report
    totals = _totals(bench_rows)
    for d in data["tradeoff"]:
        t = totals[d["codec"]]
        assert d["bits_per_byte"] == t["bits_per_byte"] and d["coded_bytes"] == t["coded_bytes"]
        assert d["decode_mb_s"] == pytest.approx(t["raw_bytes"] / t["decode_s"] / 1e6, rel=1e-12)
    assert list(data["overhead"]) == ["lcodec-strata"]  # NLL exists for lcodec only
    rows = [r for r in bench_rows if r["file"] != B.TOTAL and r["codec"] == "lcodec-strata"]
    pts = data["overhead"]["lcodec-strata"]
    assert [(p["file"], p["nll_bytes"], p["coded_bytes"]) for p in pts] == \
        [(r["file"], r["nll_bits"] / 8, r["coded_bytes"]) for r in rows]
    for p in pts:  # coded size never below the model's NLL by more than rounding
        assert p["coded_bytes"] >= math.floor(p["nll_bytes"] * 0.999)


def test_saved_chart_numbers_and_rows_read_back_equal(report, bench_rows):
    out, data = report
    # reference: the standard library's json and csv modules read what was written
    assert json.loads((out / "charts.json").read_text()) == json.loads(json.dumps(data))
    back = json.loads((out / "bench.json").read_text())
    assert back == [{k: r[k] for k in B.ROW_KEYS} for r in bench_rows]
    with open(out / "bench.csv", newline="") as f:
        lines = list(csv.DictReader(f))
    assert [(r["file"], r["codec"], int(r["coded_bytes"])) for r in lines] == \
        [(r["file"], r["codec"], r["coded_bytes"]) for r in bench_rows]


def test_summary_markdown_has_the_totals_and_model_sizes(report, bench_rows):
    out, _ = report
    md = (out / "summary.md").read_text()
    assert md.startswith("# Report test: standard library sources")
    for codec, t in _totals(bench_rows).items():
        line = next(ln for ln in md.splitlines() if ln.startswith(f"| {codec} |"))
        cells = [c.strip() for c in line.strip("|").split("|")]
        assert cells[1] == f"{t['coded_bytes']:,}" and cells[2] == f"{t['bits_per_byte']:.3f}"
        assert cells[4] == f"{t['model_bytes']:,}"
    for c in CHARTS:
        assert f"]({c}.png)" in md


def test_pages_say_what_each_baseline_is(report, bench_rows):
    from lcodec.measure.baselines import DESCRIPTIONS

    out, _ = report
    md = (out / "summary.md").read_text()
    page = (out / "index.html").read_text(encoding="utf-8")
    notes = {r["codec"]: r["note"] for r in bench_rows if r["file"] == B.TOTAL}
    for codec in ("zlib-9", "bz2-9", "zstd-19-dict", "zstd-19-rawdict", "ppmd-o16-primed"):
        assert f"* {codec}: {DESCRIPTIONS[codec]}" in md
        assert f"<li>{codec}: {DESCRIPTIONS[codec]}</li>" in page
    legend = md.split("Baselines:\n\n", 1)[1].split("\n\n", 1)[0].splitlines()
    totals = _totals(bench_rows)
    in_order = sorted(totals, key=lambda c: (totals[c]["coded_bytes"], c))
    # the baselines only, in the totals' order
    assert [ln.split(":")[0] for ln in legend] == [f"* {c}" for c in in_order if c != "lcodec-strata"]
    # the rows that hold train text say how much and what their timings leave out
    for codec in ("zstd-19-rawdict", "ppmd-o16-primed"):
        assert "model bytes" in notes[codec] and "not counted" in notes[codec]
        assert f"* {codec}: {notes[codec]}" in md


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.refs = [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        for k in ("src", "href"):
            if a.get(k):
                self.refs.append(a[k])


def test_index_html_is_self_contained(report):
    out, _ = report
    # reference: the standard library's html.parser finds every image and link
    p = _Tags()
    p.feed((out / "index.html").read_text(encoding="utf-8"))
    assert len(p.imgs) == len(CHARTS)
    from PIL import Image  # reference: Pillow decodes the embedded charts

    for src in p.imgs:
        assert src.startswith("data:image/png;base64,")
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as im:
            assert im.format == "PNG"
    for ref in p.refs:  # nothing fetched from elsewhere: data URIs and files beside it
        assert ref.startswith(("data:", "#")) or "/" not in ref and os.path.exists(out / ref), ref


def test_index_html_renders_in_headless_chromium(report, tmp_path):
    out, _ = report
    shot = screenshot(str(out / "index.html"), str(tmp_path / "index.png"))
    colours, inked = ink_stats(shot)
    assert colours > 50  # text, tables and charts, not a blank or one-colour page
    assert inked > 0.05


def test_existing_folder_is_refused_without_force(report, bench_rows, tmp_path):
    out, _ = report
    with pytest.raises(UsageError, match="not empty"):
        write_report(bench_rows, str(out))
    (tmp_path / "file").write_text("x")
    with pytest.raises(UsageError, match="not a folder"):
        write_report(bench_rows, str(tmp_path / "file"))
    again = tmp_path / "again"
    os.makedirs(again)
    (again / "bench.json").write_text("old")
    write_report(bench_rows[:2], str(again), force=True)  # rows without totals: totals are added
    back = json.loads((again / "bench.json").read_text())
    assert [r["file"] for r in back] == [bench_rows[0]["file"]] * 2 + [B.TOTAL] * 2
    assert not [n for n in os.listdir(tmp_path) if n.startswith(".")]  # no temporary folders left


def test_missing_matplotlib_is_a_clear_usage_error(monkeypatch):
    require_matplotlib()  # installed here (the test extra)
    for name in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    with pytest.raises(UsageError, match="pip install matplotlib"):
        require_matplotlib()


def test_cli_bench_report(tmp_path):
    corpus = tmp_path / "c"
    os.makedirs(corpus / "train")
    os.makedirs(corpus / "test")
    (corpus / "train" / "a.py").write_bytes(_stdlib("abc.py"))
    (corpus / "test" / "k.py").write_bytes(_stdlib("keyword.py"))
    out = tmp_path / "rep"
    cmd = [sys.executable, "-m", "lcodec", "bench", str(corpus), "--report", str(out), "-q"]
    r = subprocess.run(cmd, capture_output=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert {"index.html", "summary.md", "bench.json", "bench.csv"} <= set(os.listdir(out))
    r2 = subprocess.run(cmd, capture_output=True, timeout=300)
    assert r2.returncode == 2 and b"--force" in r2.stderr and b"Traceback" not in r2.stderr
    shutil.rmtree(out)
