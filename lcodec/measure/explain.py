"""`lcodec explain FILE`: what every byte of a file costs under a model.

    costs = symbol_costs(data)              # float64 bits, one per byte, in file order
    ex = explain(data)                      # costs plus the packed archive's real sizes
    html = render_html(ex, "notes.txt")     # heat map over the text (or a hex view)
    heat_png(ex, "notes.png")               # a heat strip of the whole file (matplotlib)

The costs are computed the way `lcodec pack` codes the file: the content is cut into
frames of `api.DEFAULT_FRAME_SIZE` bytes (or the given frame size), each frame is split
into `api.frame_lanes(model, len(frame))` lanes by `coder.lane_layout`, and the model's
encoder pass (`teacher_chunks`) yields the tables in coding order (step by step, the
active lanes in order within a step). The cost of a byte is -log2(f[s] / sum f) under
its table, the same quantity the coder sums as the model's NLL; the coding order is
mapped back to file positions, so costs[i] belongs to data[i].

The totals cover the whole file; the rendered part of a page is capped (256 KiB of
text, 64 KiB of hex by default) and the page says so.
"""
from __future__ import annotations

import base64
import bisect
import html
import io
import os
from dataclasses import dataclass, field

import numpy as np

from ..archive import plan as api_plan, write as api_write
from ..coding import active_lanes, lane_layout
from ..format import container as C
from ..frames import frame_lanes
from ..models import identity_text, resolve
from .report import readable_mode, require_matplotlib  # noqa: F401  (also used by the CLI)

VIEW_TEXT_BYTES = 256 * 1024
VIEW_HEX_BYTES = 64 * 1024
WINDOW = 64  # bytes per "expensive region"
TOP_N = 20
HEX_ROW = 16

# Colour bins of the heat map, in bits per byte: bin k holds [EDGES[k-1], EDGES[k]).
EDGES = (0.25, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0)
COLOURS = ("#ffffff", "#fff6d5", "#ffe9a3", "#ffd36b", "#fdb061", "#f98c4c",
           "#e6573f", "#c4303c", "#8c1437", "#4b0b2f")
DARK_FROM = 7  # bins from here on get light text
TITLE_FROM_BIN = 5  # spans of 3 bits per byte and more carry their own hover title (cheaper ones: the line's)


# ---- the numbers ------------------------------------------------------------------


def frame_spans(n: int, model, frame_size: int = api_plan.DEFAULT_FRAME_SIZE) -> list[tuple[int, int, int]]:
    """(offset, length, lanes) of each frame of an n-byte content, as api packs it with
    `model` (lanes by api.frame_lanes)."""
    return [(off, min(frame_size, n - off), frame_lanes(model, min(frame_size, n - off)))
            for off in range(0, n, frame_size)]


def coding_positions(starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Position within the frame of each symbol, in coding order: step t codes symbol t
    of every lane still active (lanes in order), as coder.encode_frame/decode_frame do."""
    n_steps = int(lengths[0]) if len(lengths) and int(lengths.sum()) else 0
    if n_steps == 0:
        return np.zeros(0, np.int64)
    act = active_lanes(lengths, n_steps).astype(np.int64)
    steps = np.repeat(np.arange(n_steps, dtype=np.int64), act)
    first = np.repeat(np.cumsum(act) - act, act)  # index of each step's first symbol
    lane = np.arange(len(steps), dtype=np.int64) - first
    return np.asarray(starts, np.int64)[lane] + steps


def _frame_costs(model, raw: np.ndarray, lanes: int) -> np.ndarray:
    starts, lengths = lane_layout(len(raw), lanes)
    pos = coding_positions(starts, lengths)
    out = np.empty(len(raw), np.float64)
    done = 0
    for syms, tab in model.teacher_chunks(raw, starts, lengths):
        k = len(syms)
        if k == 0:
            continue
        syms = np.asarray(syms, np.int64)
        tab = np.asarray(tab, np.float64)
        where = pos[done:done + k]
        if not np.array_equal(raw[where], syms):  # the model and the lane layout disagree
            raise RuntimeError("model symbols do not follow coder.lane_layout's coding order")
        out[where] = -np.log2(tab[np.arange(k), syms] / tab.sum(axis=1))
        done += k
    if done != len(raw):
        raise RuntimeError(f"model yielded {done} symbols for a frame of {len(raw)} bytes")
    return out


def symbol_costs(data: bytes, model=None, frame_size: int = api_plan.DEFAULT_FRAME_SIZE, progress=None) -> np.ndarray:
    """The cost in bits of every byte of `data` under `model` (None: the built-in
    adaptive model; a model file's path; or a model object), one float64 per byte in
    file order, framed and laned as api.pack_stats codes it. Each frame starts from a
    fresh model state, as in the container. `progress`, if given, is called with the
    byte count of each frame done."""
    m = resolve(model)
    arr = np.frombuffer(bytes(data), np.uint8)
    out = np.empty(len(arr), np.float64)
    for off, n, lanes in frame_spans(len(arr), m, frame_size):
        out[off:off + n] = _frame_costs(m, arr[off:off + n], lanes)
        if progress:
            progress(n)
    return out


@dataclass
class FrameCost:
    index: int
    offset: int
    raw_bytes: int
    lanes: int
    model_bits: float  # sum of the frame's symbol costs
    method: str  # "queue", "stack" or "stored", as packed
    payload_bytes: int  # coded (or stored) bytes in the archive
    record_bytes: int  # the frame record's head

    @property
    def charged_bits(self) -> float:
        """What api.PackStats.nll_bits counts for this frame: 8 bits per byte when stored."""
        return 8.0 * self.raw_bytes if self.method == "stored" else self.model_bits


@dataclass
class Explanation:
    data: bytes = field(repr=False)
    costs: np.ndarray = field(repr=False)
    model_text: str
    frame_size: int
    frames: list
    archive_bytes: int
    header_bytes: int
    pack_nll_bits: float  # api.pack_stats(...).nll_bits
    top: list  # (offset, length, bits) of the most expensive windows

    @property
    def raw_bytes(self) -> int:
        return len(self.data)

    @property
    def total_bits(self) -> float:
        return float(self.costs.sum())

    @property
    def bits_per_byte(self) -> float:
        return self.total_bits / self.raw_bytes if self.raw_bytes else 0.0

    @property
    def archive_bits_per_byte(self) -> float:
        return 8.0 * self.archive_bytes / self.raw_bytes if self.raw_bytes else 0.0

    @property
    def charged_bits(self) -> float:
        return float(sum(f.charged_bits for f in self.frames))

    @property
    def payload_bytes(self) -> int:
        return sum(f.payload_bytes for f in self.frames)

    @property
    def record_bytes(self) -> int:
        return sum(f.record_bytes for f in self.frames)

    @property
    def payload_bound_bytes(self) -> float:
        """docs/FORMAT.md "Fixed costs and bounds": a modelled frame's coded bytes are at
        most NLL x 1.001 + 8 bytes; a stored frame's are its raw bytes."""
        return sum(f.model_bits / 8 * 1.001 + 8 if f.method != "stored" else f.raw_bytes
                   for f in self.frames)


def top_windows(costs: np.ndarray, window: int = WINDOW, n: int = TOP_N) -> list[tuple[int, int, float]]:
    """The `n` most expensive non-overlapping windows of `window` bytes, by total bits
    (most expensive first): (offset, length, bits). Chosen greedily from all window
    positions."""
    size = len(costs)
    if size == 0:
        return []
    if size <= window:
        return [(0, size, float(costs.sum()))]
    csum = np.concatenate([[0.0], np.cumsum(costs)])
    sums = csum[window:] - csum[:-window]  # sums[i] = costs[i:i + window].sum()
    order = np.argsort(-sums, kind="stable")
    blocked = np.zeros(len(sums), bool)
    out = []
    for i in order:
        if blocked[i]:
            continue
        out.append((int(i), window, float(costs[i:i + window].sum())))
        if len(out) == n:
            break
        blocked[max(0, i - window + 1):i + window] = True
    return out


def explain(data: bytes, model=None, frame_size: int = api_plan.DEFAULT_FRAME_SIZE, progress=None) -> Explanation:
    """Symbol costs of `data`, and the archive api.pack_stats makes of it, side by side.
    `progress`, if given, is called with byte counts (2 x len(data) in all)."""
    data = bytes(data)
    m = resolve(model)
    costs = symbol_costs(data, m, frame_size, progress)
    blob, stats = api_write.pack_stats(data, m, frame_size, progress)
    cont = C.read_container(blob)
    spans = frame_spans(len(data), m, frame_size)
    frames = []
    for (off, n, lanes), fr in zip(spans, cont.frames):
        frames.append(FrameCost(fr.index, off, n, fr.lanes if fr.method != C.METHOD_STORED else lanes,
                                float(costs[off:off + n].sum()), C.METHOD_NAMES[fr.method],
                                fr.coded_len, fr.payload_offset - fr.offset))
    header = cont.frames[0].offset if cont.frames else cont.file_size
    return Explanation(data, costs, identity_text(m.identity), frame_size, frames, len(blob), header,
                       float(stats.nll_bits), top_windows(costs))


# ---- the page ---------------------------------------------------------------------


def bins_of(bits_per_byte: np.ndarray) -> np.ndarray:
    return np.searchsorted(np.asarray(EDGES), bits_per_byte, side="right")


def looks_like_text(data: bytes) -> bool:
    """UTF-8 (a sequence cut at the end is allowed) with almost no control characters."""
    if not data:
        return True
    if b"\x00" in data:
        return False
    for cut in range(4):
        try:
            text = data[:len(data) - cut].decode("utf-8")
            break
        except UnicodeDecodeError:
            continue
    else:
        return False
    ctrl = sum(1 for ch in text if (ord(ch) < 32 and ch not in "\t\n\r\f") or ord(ch) == 127)
    return ctrl <= len(text) // 200


def _decode_view(data: bytes) -> str:
    for cut in range(4):
        try:
            return data[:len(data) - cut].decode("utf-8")
        except UnicodeDecodeError:
            continue
    return data.decode("latin-1")


def _text_view(data: bytes, costs: np.ndarray, anchors: set) -> str:
    """Characters in spans coloured by bits per byte (equal neighbours share a span),
    each line wrapped in a span whose title gives its offset and bits; spans of
    TITLE_FROM_BIN and up carry their own title (hover shows the cost)."""
    text = _decode_view(data)
    out, line = [], []
    run, run_bin, run_off, run_bits, run_bytes = [], -1, 0, 0.0, 0
    line_no, line_off, line_bits = 1, 0, 0.0

    def close():
        if not run:
            return
        tip = ""
        if run_bin >= TITLE_FROM_BIN:
            tip = (f' title="offset {run_off:,}: {run_bits:.1f} bits"' if run_bytes == 1 else
                   f' title="offset {run_off:,}, {run_bytes} bytes: {run_bits:.1f} bits"')
        line.append(f'<i class=c{run_bin}{tip}>{"".join(run)}</i>')

    def end_line(end_pos):
        n = end_pos - line_off
        out.append(f'<span class="ln" title="line {line_no:,}, offset {line_off:,}: {n} bytes, {line_bits:.1f} bits'
                   f' ({line_bits / max(n, 1):.2f} per byte)">{"".join(line)}</span>')

    cost_list = costs[:len(data)].tolist()
    byte_bins = bins_of(costs[:len(data)]).tolist()
    pos = 0
    for ch in text:
        if ch < "\x80":
            nb, bits, b = 1, cost_list[pos], byte_bins[pos]
        else:
            nb = len(ch.encode("utf-8"))
            bits = sum(cost_list[pos:pos + nb])
            b = bisect.bisect_right(EDGES, bits / nb)
        line_bits += bits
        if pos in anchors:
            close()
            run = []
            line.append(f'<a id="o{pos}"></a>')
        if ch == "\n":
            close()
            run, run_bin = [], -1
            tip = f' title="offset {pos:,}: line end, {bits:.1f} bits"' if b >= TITLE_FROM_BIN else ""
            line.append(f'<i class="c{b} nl"{tip}>\u21b5</i>')
            end_line(pos + 1)
            out.append("\n")
            line, line_no, line_off, line_bits = [], line_no + 1, pos + 1, 0.0
        else:
            if ch < " " and ch not in "\t" or ch == "\x7f":
                glyph = "\u00b7"
            else:
                glyph = html.escape(ch, quote=False)
            if b != run_bin or not run:
                close()
                run, run_bin, run_off, run_bits, run_bytes = [], b, pos, 0.0, 0
            run.append(glyph)
            run_bits += bits
            run_bytes += nb
        pos += nb
    close()
    if line:
        end_line(pos)
    return "".join(out)


def _hex_view(data: bytes, costs: np.ndarray, anchors: set) -> str:
    bins = bins_of(costs[:len(data)])
    lines = []
    for row in range(0, len(data), HEX_ROW):
        chunk = data[row:row + HEX_ROW]
        cells, chars = [], []
        for j, byte in enumerate(chunk):
            i = row + j
            b = bins[i]
            cells.append(f'<i class=c{b} title="offset {i:,}: {costs[i]:.1f} bits">{byte:02x}</i>')
            ch = chr(byte) if 32 <= byte < 127 else "\u00b7"
            chars.append(f'<i class=c{b}>{html.escape(ch, quote=False)}</i>')
        pad = "   " * (HEX_ROW - len(chunk))
        anchor = "".join(f'<a id="o{a}"></a>' for a in range(row, row + HEX_ROW) if a in anchors)
        lines.append(f'{anchor}<span class="off">{row:08x}</span>  {" ".join(cells)}{pad}  {"".join(chars)}')
    return "\n".join(lines)


def _excerpt(data: bytes, text_mode: bool) -> str:
    if text_mode:
        s = data.decode("utf-8", "replace")
        s = "".join("\u21b5" if c == "\n" else ("\u00b7" if c < " " or c == "\x7f" else c) for c in s)
        return html.escape(s)
    return html.escape(data.hex(" "))


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#1d2430;margin:0;background:#f4f5f7}
main{max-width:1180px;margin:0 auto;padding:22px 28px 40px}
h1{font-size:22px;margin:0 0 4px} h2{font-size:17px;margin:26px 0 8px}
.sub{color:#5b6472;margin:0 0 16px}
.cards{display:flex;flex-wrap:wrap;gap:12px;margin:8px 0 4px}
.card{background:#fff;border:1px solid #dde1e7;border-radius:8px;padding:10px 14px;min-width:150px}
.card .v{font-size:20px;font-weight:600} .card .k{color:#5b6472;font-size:12px}
table{border-collapse:collapse;background:#fff;border:1px solid #dde1e7;font-size:13px}
th,td{padding:4px 10px;border-bottom:1px solid #eceef2;text-align:right;vertical-align:top}
th{background:#eef1f5;font-weight:600} td.l,th.l{text-align:left}
td.x{font-family:ui-monospace,"DejaVu Sans Mono",Menlo,monospace;font-size:12px;text-align:left;
  max-width:640px;overflow-wrap:anywhere;white-space:pre-wrap}
.legend{display:flex;flex-wrap:wrap;gap:0;margin:6px 0 10px;font-size:12px}
.legend span{padding:2px 8px;border:1px solid #dde1e7;margin-right:-1px}
.view{background:#fff;border:1px solid #dde1e7;border-radius:8px;padding:12px 14px;
  font-family:ui-monospace,"DejaVu Sans Mono",Menlo,monospace;font-size:12.5px;line-height:1.5;
  white-space:pre-wrap;overflow-wrap:anywhere;tab-size:4;margin:0}
.view.hex{white-space:pre;overflow-x:auto}
.view i{font-style:normal}
.view .off{color:#8a93a1}
.view .nl{color:#b9bfc8}
.view .c7.nl,.view .c8.nl,.view .c9.nl{color:#f0d0d0}
img.strip{width:100%;max-width:1120px;background:#fff;border:1px solid #dde1e7;border-radius:8px}
.note{color:#5b6472;font-size:13px}
a{color:#1f5fbf}
"""


def _legend() -> str:
    labels = [f"&lt; {EDGES[0]}"] + [f"{a:g}&ndash;{b:g}" for a, b in zip(EDGES, EDGES[1:])] + [f"&ge; {EDGES[-1]:g}"]
    return "".join(f'<span class="c{i}">{lab}</span>' for i, lab in enumerate(labels))


def _palette_css() -> str:
    rules = []
    for i, col in enumerate(COLOURS):
        fg = ";color:#fff" if i >= DARK_FROM else ""
        rules.append(f".c{i}{{background:{col}{fg}}}")
    return "\n".join(rules)


def render_html(ex: Explanation, name: str, view_bytes: int | None = None, png: bytes | None = None) -> str:
    """The explain page for `ex` (a self-contained HTML document: inline styles, the
    heat strip PNG, if given, embedded as a data URI)."""
    data = ex.data
    text_mode = looks_like_text(data[:VIEW_TEXT_BYTES])
    cap = view_bytes if view_bytes is not None else (VIEW_TEXT_BYTES if text_mode else VIEW_HEX_BYTES)
    shown = data[:cap]
    anchors = {off for off, _, _ in ex.top if off < len(shown)}
    view = _text_view(shown, ex.costs, anchors) if text_mode else _hex_view(shown, ex.costs, anchors)
    e = html.escape
    n = ex.raw_bytes

    def card(value, key):
        return f'<div class="card"><div class="v">{value}</div><div class="k">{key}</div></div>'

    cards = "".join([
        card(f"{n:,}", "bytes in the file"),
        card(f"{ex.total_bits:,.0f}", f"bits: sum of symbol costs ({ex.total_bits / 8:,.0f} bytes)"),
        card(f"{ex.bits_per_byte:.3f}", "bits per byte under the model"),
        card(f"{ex.archive_bytes:,}", "bytes in the packed archive"),
        card(f"{ex.archive_bits_per_byte:.3f}", "bits per byte, packed"),
    ])
    stored = [f for f in ex.frames if f.method == "stored"]
    sizes = (f"The archive's {ex.archive_bytes:,} bytes: {ex.payload_bytes:,} bytes of coded frames, "
             f"{ex.record_bytes:,} bytes of frame records and a {ex.header_bytes:,}-byte header. "
             f"Coded frames against the model's cost: {ex.payload_bytes:,} bytes against "
             f"{ex.charged_bits / 8:,.1f} bytes of NLL (api.pack_stats counts {ex.pack_nll_bits:,.1f} bits); "
             f"the bound in docs/FORMAT.md (NLL &times; 1.001 + 8 bytes per coded frame) is "
             f"{ex.payload_bound_bytes:,.1f} bytes.")
    if stored:
        sizes += (f" {len(stored)} frame{'s' if len(stored) != 1 else ''} cost the model more than "
                  f"{'their' if len(stored) != 1 else 'its'} raw size and {'are' if len(stored) != 1 else 'is'} "
                  f"stored as is (8 bits per byte).")

    top_rows = []
    for rank, (off, ln, bits) in enumerate(ex.top, 1):
        link = f'<a href="#o{off}">{off:,}</a>' if off < len(shown) else f"{off:,}"
        top_rows.append(f"<tr><td>{rank}</td><td>{link}</td><td>{ln}</td><td>{bits:,.1f}</td>"
                        f"<td>{bits / ln:.2f}</td><td class=\"x\">{_excerpt(data[off:off + ln], text_mode)}</td></tr>")
    frame_rows = "".join(
        f"<tr><td>{f.index}</td><td>{f.offset:,}</td><td>{f.raw_bytes:,}</td><td>{f.lanes}</td>"
        f"<td class=\"l\">{f.method}</td><td>{f.model_bits:,.0f}</td>"
        f"<td>{f.model_bits / max(f.raw_bytes, 1):.3f}</td><td>{f.payload_bytes:,}</td></tr>" for f in ex.frames)
    if len(shown) < n:
        cap_note = (f"Showing the first {len(shown):,} of {n:,} bytes; the rest is counted in every "
                    f"total above.")
    else:
        cap_note = f"All {n:,} bytes."
    strip = ""
    if png is not None:
        strip = ('<h2>The whole file</h2><img class="strip" alt="bits per byte along the file" '
                 f'src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}">')
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{e(name)}: cost of every byte</title>
<style>{_CSS}{_palette_css()}</style></head>
<body><main>
<h1>Cost of every byte: {e(name)}</h1>
<p class="sub">Model: {e(ex.model_text)}. Frames of up to {ex.frame_size:,} bytes, lanes as
<code>lcodec pack</code> lays them out. A byte's cost is &minus;log<sub>2</sub> of the probability the
model gave it.</p>
<div class="cards">{cards}</div>
<p class="note">{sizes}</p>
{strip}
<h2>The most expensive regions</h2>
<p class="note">The {len(ex.top)} costliest non-overlapping windows of {WINDOW} bytes, by total bits.</p>
<table><tr><th>#</th><th>offset</th><th>bytes</th><th>bits</th><th>bits per byte</th><th class="l">content</th></tr>
{"".join(top_rows)}</table>
<h2>Frames</h2>
<table><tr><th>frame</th><th>offset</th><th>bytes</th><th>lanes</th><th class="l">method</th><th>model bits</th>
<th>bits per byte</th><th>archive bytes</th></tr>{frame_rows}</table>
<h2>Heat map</h2>
<p class="note">{cap_note} Colour: bits per byte. Hover: a line's offset and bits, or those of an expensive run (3 bits per byte or more); in the hex view, every byte's.
{"&#8629; marks a line end." if text_mode else "Hex view: offset, 16 bytes, then the bytes as text."}</p>
<div class="legend">{_legend()}</div>
<pre class="view{'' if text_mode else ' hex'}">{view}</pre>
</main></body></html>
"""


def heat_png(ex: Explanation, path: str | None = None, columns: int = 1200) -> bytes:
    """A PNG of the whole file: mean bits per byte along it (line) over a heat strip,
    frame boundaries marked. Returns the PNG bytes (and writes them to `path`, if given)."""
    plt = require_matplotlib()
    from matplotlib.colors import BoundaryNorm, ListedColormap

    n = ex.raw_bytes
    cols = max(1, min(columns, n))
    edges = np.linspace(0, n, cols + 1).round().astype(np.int64)
    csum = np.concatenate([[0.0], np.cumsum(ex.costs)])
    width = np.maximum(edges[1:] - edges[:-1], 1)
    mean = (csum[edges[1:]] - csum[edges[:-1]]) / width if n else np.zeros(1)
    centre = (edges[1:] + edges[:-1]) / 2

    cmap = ListedColormap(COLOURS)
    bounds = [0.0, *EDGES, max(16.0, float(mean.max()) + 1e-9)]
    norm = BoundaryNorm(bounds, cmap.N)
    fig, (ax, hx) = plt.subplots(2, 1, figsize=(11.2, 3.6), dpi=100, sharex=True,
                                 gridspec_kw={"height_ratios": [3, 1], "hspace": 0.08})
    k = max(1, cols // 60)  # a moving average over about 1/60 of the file, drawn over the columns
    smooth = np.convolve(np.pad(mean, (k // 2, k - 1 - k // 2), mode="edge"), np.ones(k) / k, mode="valid")
    ax.fill_between(centre, mean, color="#f98c4c", alpha=0.35, lw=0, label="mean of each column")
    ax.plot(centre, smooth, color="#8c1437", lw=1.4, label=f"moving average over {k} columns")
    ax.axhline(ex.bits_per_byte, color="#1d2430", lw=0.8, ls="--",
               label=f"file average {ex.bits_per_byte:.3f}")
    ax.set_ylabel("bits per byte")
    ax.set_ylim(0, max(8.5, float(mean.max()) * 1.05) if n else 8.5)
    ax.grid(axis="y", color="#e3e6ea", lw=0.6)
    ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), frameon=False, fontsize=8.5, ncol=3)
    ax.set_title(f"bits per byte along the file\n{cols:,} columns of about {max(n // cols, 1):,} bytes",
                 fontsize=10, loc="left")
    hx.imshow(mean[None, :], aspect="auto", cmap=cmap, norm=norm, extent=(0, max(n, 1), 0, 1),
              interpolation="nearest")
    hx.set_yticks([])
    hx.set_xlabel("offset in the file (bytes)")
    for f in ex.frames[1:]:
        for a in (ax, hx):
            a.axvline(f.offset, color="#4b5563", lw=0.6, ls=":")
    for a in (ax, hx):
        a.set_xlim(0, max(n, 1))
        for s in ("top", "right"):
            a.spines[s].set_visible(False)
    from matplotlib.ticker import FuncFormatter

    hx.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:,.0f}"))
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight", facecolor="white")
    plt.close(fig)
    png = buf.getvalue()
    if path is not None:
        from ..fsio import atomic_write

        atomic_write(path, png, force=True)
    return png


def default_png_path(html_path: str) -> str:
    root, ext = os.path.splitext(html_path)
    return (root if ext.lower() in (".html", ".htm") else html_path) + ".png"
