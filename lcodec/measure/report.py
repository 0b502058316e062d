"""`lcodec bench CORPUS_DIR --report DIR`: a report folder people can open and read.

    data = write_report(rows, "bench-report/", title="station logs")

writes into DIR

    index.html        the report, self-contained (inline styles, the charts embedded as
                      PNG data URIs): opens offline, can be mailed as one file
    summary.md        the same numbers as Markdown (the charts referenced beside it)
    bench.json        the rows, as `lcodec bench --json` writes them
    bench.csv         the rows, as `lcodec bench --csv` writes them
    charts.json       the numbers each chart plots (what write_report returns)
    bits_per_byte.png bits per byte of every codec over the whole test split
    per_file.png      every test file: raw size (log scale) against bits per byte
    tradeoff.png      size against decode speed, one point per codec
    overhead.png      lcodec: model NLL against coded size per file, with y = x

The model (or dictionary, or prime) a codec needs stands beside every ratio
(`model_bytes`), as bits per byte "counting the model" too: a prior larger than the data
it helps is a cost. The page says in one line what each baseline label is
(`baselines.DESCRIPTIONS`) and lists each row's note (what a dictionary or prime holds,
what the timings leave out). matplotlib (Agg) draws the charts; it is optional (the
`bench` extra) and imported only here, when a report is asked for.
"""
from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import os
import shutil
from typing import Sequence

from .bench import ROW_KEYS, TOTAL, total_rows, write_csv, write_json
from ..errors import UsageError

CHARTS = ("bits_per_byte", "per_file", "tradeoff", "overhead")
CAPTIONS = {
    "bits_per_byte": "Bits per byte over the whole test split (lower is better). The pale extension "
                     "adds the model, dictionary or prime the decoder must already have.",
    "per_file": "Every test file on its own: raw size against bits per byte. Small files pay for "
                "headers and for having little context.",
    "tradeoff": "Size against decode speed, one point per codec over the whole test split "
                "(better: lower and further right).",
    "overhead": "lcodec's coding overhead: coded size of each file against the model's NLL. Points "
                "sit just above the y = x line; the gap is the container (header, frame records) "
                "and the coder's last words.",
}
LCODEC_COLOURS = ("#c4303c", "#7a1fa2", "#e6803a", "#1f8a5b")
BASELINE_COLOURS = ("#3b6ea8", "#2a9d8f", "#8c6d31", "#6b6ecf", "#7f7f7f", "#a8a826", "#17a2b8",
                    "#d17fb5", "#393b79")
MARKERS = "oDs^vPXph<>8"


def require_matplotlib():
    """pyplot with the Agg backend, or a UsageError saying how to install matplotlib."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise UsageError("charts need matplotlib, which is not installed: "
                         "pip install matplotlib (or pip install 'lcodec[bench]')") from None
    return plt


def readable_mode() -> int:
    """0o666 less the umask: reports and pages are for reading (the usual file mode)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def check_out_dir(out_dir: str, force: bool = False) -> None:
    """Refuse a report folder that exists and is not empty (unless force), or is a file."""
    if os.path.lexists(out_dir):
        if not os.path.isdir(out_dir) or os.path.islink(out_dir):
            raise UsageError(f"{out_dir} exists and is not a folder")
        if os.listdir(out_dir) and not force:
            raise UsageError(f"{out_dir} exists and is not empty; pass --force to write into it")


# ---- the numbers ------------------------------------------------------------------


def _split(rows: Sequence[dict]) -> tuple[list[dict], list[dict]]:
    files = [r for r in rows if r["file"] != TOTAL]
    totals = [r for r in rows if r["file"] == TOTAL] or total_rows(files)
    return files, totals


def _mbps(raw: int, seconds: float):
    return raw / seconds / 1e6 if seconds and seconds > 0 else None


def _with_model_bpb(r: dict):
    return 8.0 * (r["coded_bytes"] + r["model_bytes"]) / r["raw_bytes"] if r["raw_bytes"] else None


def chart_data(rows: Sequence[dict]) -> dict:
    """The numbers the four charts plot, straight from the rows (JSON-able)."""
    files, totals = _split(rows)
    codecs = [t["codec"] for t in totals]
    kinds = {t["codec"]: t["kind"] for t in totals}
    by_codec = {c: [r for r in files if r["codec"] == c] for c in codecs}
    return {
        "codecs": codecs,
        "kinds": kinds,
        "bits_per_byte": [{"codec": t["codec"], "bits_per_byte": t["bits_per_byte"],
                           "with_model_bits_per_byte": _with_model_bpb(t),
                           "model_bytes": t["model_bytes"], "coded_bytes": t["coded_bytes"],
                           "raw_bytes": t["raw_bytes"]} for t in totals],
        "per_file": {c: [{"file": r["file"], "raw_bytes": r["raw_bytes"], "bits_per_byte": r["bits_per_byte"]}
                         for r in by_codec[c] if r["bits_per_byte"] is not None] for c in codecs},
        "tradeoff": [{"codec": t["codec"], "bits_per_byte": t["bits_per_byte"], "coded_bytes": t["coded_bytes"],
                      "decode_mb_s": _mbps(t["raw_bytes"], t["decode_s"]),
                      "encode_mb_s": _mbps(t["raw_bytes"], t["encode_s"]),
                      "model_bytes": t["model_bytes"]} for t in totals],
        "overhead": {c: [{"file": r["file"], "nll_bytes": r["nll_bits"] / 8.0, "coded_bytes": r["coded_bytes"],
                          "raw_bytes": r["raw_bytes"]}
                         for r in by_codec[c] if r["nll_bits"] is not None]
                     for c in codecs if kinds[c] == "lcodec"},
    }


def _styles(data: dict) -> dict:
    out, li, bi = {}, 0, 0
    for i, c in enumerate(data["codecs"]):
        if data["kinds"][c] == "lcodec":
            out[c] = (LCODEC_COLOURS[li % len(LCODEC_COLOURS)], MARKERS[i % len(MARKERS)])
            li += 1
        else:
            out[c] = (BASELINE_COLOURS[bi % len(BASELINE_COLOURS)], MARKERS[i % len(MARKERS)])
            bi += 1
    return out


# ---- the charts -------------------------------------------------------------------


def _tidy(ax):
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)
    ax.grid(color="#e3e6ea", lw=0.6)
    ax.set_axisbelow(True)


def _plain_log(axis):
    """Tick labels as plain numbers (1,000 rather than 10^3) on a log axis."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter, NullLocator

    axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    axis.set_minor_locator(NullLocator())
    axis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:,.0f}" if v >= 1 else f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def _bytes_text(n: int) -> str:
    return f"{n:,} B"


def _chart_bpb(plt, data, style):
    items = [d for d in data["bits_per_byte"] if d["bits_per_byte"] is not None]
    items.sort(key=lambda d: (d["bits_per_byte"], d["codec"]), reverse=True)  # best at the top
    fig, ax = plt.subplots(figsize=(9.6, 0.4 * len(items) + 1.2), dpi=110)
    y = range(len(items))
    top = max([d["with_model_bits_per_byte"] or 0 for d in items] + [d["bits_per_byte"] for d in items] + [1])
    for i, d in zip(y, items):
        col = style[d["codec"]][0]
        if d["model_bytes"]:
            ax.barh(i, d["with_model_bits_per_byte"], color=col, alpha=0.22, height=0.66, lw=0)
        ax.barh(i, d["bits_per_byte"], color=col, height=0.66, lw=0)
        label = f"{d['bits_per_byte']:.3f}"
        label += (f"   model {_bytes_text(d['model_bytes'])}: {d['with_model_bits_per_byte']:.3f} with it"
                  if d["model_bytes"] else "   model 0 B")
        ax.text(max(d["bits_per_byte"], d["with_model_bits_per_byte"] or 0) + top * 0.01, i, label,
                va="center", fontsize=8.5, color="#1d2430")
    ax.set_yticks(list(y), [d["codec"] for d in items], fontsize=9)
    ax.set_xlim(0, top * 1.55)
    ax.set_xlabel("bits per byte (total coded bytes x 8 / total raw bytes)")
    ax.set_title("Bits per byte, whole test split", loc="left", fontsize=11)
    _tidy(ax)
    ax.grid(axis="y", visible=False)
    return fig


def _chart_per_file(plt, data, style):
    fig, ax = plt.subplots(figsize=(9.6, 4.8), dpi=110)
    for c in data["codecs"]:
        pts = data["per_file"][c]
        if not pts:
            continue
        col, mk = style[c]
        lc = data["kinds"][c] == "lcodec"
        ax.scatter([p["raw_bytes"] for p in pts], [p["bits_per_byte"] for p in pts], s=46 if lc else 22,
                   marker=mk, color=col, alpha=0.95 if lc else 0.7, label=c, zorder=3 if lc else 2,
                   edgecolors="white" if lc else "none", linewidths=0.6)
    ax.set_xscale("log")
    _plain_log(ax.xaxis)
    ax.set_xlabel("raw size of the file (bytes, log scale)")
    ax.set_ylabel("bits per byte")
    ax.set_ylim(bottom=0)
    ax.set_title("Every test file, every codec", loc="left", fontsize=11)
    ax.legend(fontsize=8, frameon=False, loc="center left", bbox_to_anchor=(1.0, 0.5))
    _tidy(ax)
    return fig


def _chart_tradeoff(plt, data, style):
    fig, ax = plt.subplots(figsize=(9.6, 4.8), dpi=110)
    pts = [d for d in data["tradeoff"] if d["decode_mb_s"] and d["bits_per_byte"] is not None]
    for d in pts:
        col, mk = style[d["codec"]]
        lc = data["kinds"][d["codec"]] == "lcodec"
        ax.scatter(d["decode_mb_s"], d["bits_per_byte"], s=90 if lc else 55, marker=mk, color=col, zorder=3,
                   edgecolors="white", linewidths=0.8)
        name = d["codec"] + (f"\n(model {_bytes_text(d['model_bytes'])})" if d["model_bytes"] else "")
        ax.annotate(name, (d["decode_mb_s"], d["bits_per_byte"]), xytext=(7, 4), textcoords="offset points",
                    fontsize=8.5, color="#1d2430")
    ax.set_xscale("log")
    _plain_log(ax.xaxis)
    if pts:
        lo = min(d["decode_mb_s"] for d in pts)
        hi = max(d["decode_mb_s"] for d in pts)
        ax.set_xlim(lo / 2, hi * 4)
        ax.set_ylim(min(d["bits_per_byte"] for d in pts) * 0.9, max(d["bits_per_byte"] for d in pts) * 1.08)
    ax.set_xlabel("decode speed (MB of raw content per second, log scale)")
    ax.set_ylabel("bits per byte")
    ax.set_title("Size against decode speed (better: lower, further right)", loc="left", fontsize=11)
    _tidy(ax)
    return fig


def _chart_overhead(plt, data, style):
    fig, (ax, dx) = plt.subplots(1, 2, figsize=(9.6, 4.6), dpi=110, gridspec_kw={"width_ratios": [3, 2], "wspace": 0.3})
    allv = []
    for c, pts in data["overhead"].items():
        pts = [p for p in pts if p["nll_bytes"] > 0 and p["coded_bytes"] > 0]
        if not pts:
            continue
        col, mk = style[c]
        xs, ys = [p["nll_bytes"] for p in pts], [p["coded_bytes"] for p in pts]
        allv += xs + ys
        ax.scatter(xs, ys, s=40, marker=mk, color=col, label=c, zorder=3, edgecolors="white", linewidths=0.6)
        dx.scatter([p["raw_bytes"] for p in pts], [y - x for x, y in zip(xs, ys)], s=34, marker=mk, color=col,
                   zorder=3, edgecolors="white", linewidths=0.6)
    if allv:
        lo, hi = min(allv) / 1.5, max(allv) * 1.5
        ax.plot([lo, hi], [lo, hi], color="#4b5563", lw=1, ls="--", label="y = x (coded = NLL)", zorder=2)
        ax.set_xlim(lo, hi)
        ax.set_ylim(lo, hi)
    ax.set_xscale("log")
    ax.set_yscale("log")
    _plain_log(ax.xaxis)
    _plain_log(ax.yaxis)
    ax.set_xlabel("model NLL of the file (bytes = bits / 8, log scale)")
    ax.set_ylabel("coded size of the file (bytes, log scale)")
    ax.set_title("Coded size against the model's NLL", loc="left", fontsize=11)
    ax.legend(fontsize=8.5, frameon=False, loc="upper left")
    _tidy(ax)
    dx.set_xscale("log")
    _plain_log(dx.xaxis)
    dx.axhline(0, color="#4b5563", lw=1, ls="--")
    dx.set_ylim(bottom=min(0, *(dx.get_ylim()[:1])))
    dx.set_xlabel("raw size of the file (bytes, log scale)")
    dx.set_ylabel("coded size minus NLL (bytes)")
    dx.set_title("The overhead in bytes", loc="left", fontsize=11)
    _tidy(dx)
    return fig


def draw_charts(data: dict) -> dict:
    """PNG bytes of each chart in CHARTS."""
    import io

    plt = require_matplotlib()
    style = _styles(data)
    makers = {"bits_per_byte": _chart_bpb, "per_file": _chart_per_file, "tradeoff": _chart_tradeoff,
              "overhead": _chart_overhead}
    out = {}
    for name in CHARTS:
        fig = makers[name](plt, data, style)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", bbox_inches="tight", facecolor="white")
        plt.close(fig)
        out[name] = buf.getvalue()
    return out


# ---- the tables -------------------------------------------------------------------


def _fmt_bpb(v) -> str:
    return "-" if v is None else f"{v:.3f}"


def _fmt_speed(v) -> str:
    return "-" if v is None else (f"{v:.2f}" if v < 10 else f"{v:,.0f}")


def totals_table(rows: Sequence[dict]) -> tuple[list[str], list[list[str]], dict]:
    """(header, body, info) of the totals table, smallest coded size first."""
    files, totals = _split(rows)
    totals = sorted(totals, key=lambda r: (r["coded_bytes"], r["codec"]))
    base = [r for r in totals if r["kind"] == "baseline"]
    best = base[0] if base else None
    head = ["codec", "coded bytes", "bits per byte", "vs best baseline", "model bytes",
            "bits per byte with the model", "encode MB/s", "decode MB/s"]
    body = []
    for r in totals:
        ratio = "-" if not best or not best["coded_bytes"] else f"{r['coded_bytes'] / best['coded_bytes']:.3f}"
        body.append([r["codec"], f"{r['coded_bytes']:,}", _fmt_bpb(r["bits_per_byte"]), ratio,
                     f"{r['model_bytes']:,}", _fmt_bpb(_with_model_bpb(r)),
                     _fmt_speed(_mbps(r["raw_bytes"], r["encode_s"])),
                     _fmt_speed(_mbps(r["raw_bytes"], r["decode_s"]))])
    n_files = len({r["file"] for r in files})
    raw = totals[0]["raw_bytes"] if totals else 0
    notes = [(r["codec"], r["note"]) for r in totals if r.get("note")]
    return head, body, {"n_files": n_files, "raw_bytes": raw, "best": best["codec"] if best else None,
                        "notes": notes, "legend": baseline_legend(totals), "totals": totals}


def baseline_legend(totals: Sequence[dict]) -> list[tuple[str, str]]:
    """(label, what it is) for every baseline row whose label the project defines."""
    from .baselines import DESCRIPTIONS

    return [(r["codec"], DESCRIPTIONS[r["codec"]]) for r in totals
            if r["kind"] == "baseline" and r["codec"] in DESCRIPTIONS]


def per_file_table(rows: Sequence[dict]) -> tuple[list[str], list[list[str]], list[int]]:
    """One line per test file: raw bytes, then bits per byte of every codec (and lcodec's
    NLL in bits per byte). Returns (header, body, index of the best codec per line)."""
    files, totals = _split(rows)
    codecs = [t["codec"] for t in totals]
    lc = [t["codec"] for t in totals if t["kind"] == "lcodec"]
    order, cell = [], {}
    for r in files:
        if r["file"] not in cell:
            order.append(r["file"])
            cell[r["file"]] = {"raw": r["raw_bytes"]}
        cell[r["file"]][r["codec"]] = r
    head = ["file", "raw bytes"] + codecs + [f"{c} NLL" for c in lc]
    body, best = [], []
    for f in order:
        c = cell[f]
        vals = [c[k]["bits_per_byte"] if k in c else None for k in codecs]
        present = [(v, i) for i, v in enumerate(vals) if v is not None]
        best.append(min(present)[1] if present else -1)
        nll = [_fmt_bpb(c[k]["nll_bits"] / c["raw"] * 1.0) if k in c and c[k]["nll_bits"] is not None and c["raw"]
               else "-" for k in lc]
        body.append([f, f"{c['raw']:,}"] + [_fmt_bpb(v) for v in vals] + nll)
    return head, body, best


# ---- the documents ----------------------------------------------------------------


def _md_table(head, body) -> str:
    def esc(s):
        return str(s).replace("|", "\\|")
    lines = ["| " + " | ".join(map(esc, head)) + " |",
             "|" + "|".join("---" if i == 0 else "---:" for i in range(len(head))) + "|"]
    lines += ["| " + " | ".join(map(esc, row)) + " |" for row in body]
    return "\n".join(lines)


def summary_markdown(rows: Sequence[dict], title: str, generated: str) -> str:
    head, body, info = totals_table(rows)
    fhead, fbody, _ = per_file_table(rows)
    out = [f"# {title}", "",
           f"{info['n_files']} test files, {info['raw_bytes']:,} bytes; each file compressed on its own "
           f"by every codec and round-trip checked. Generated {generated}.", ""]
    if info["best"]:
        out += [f"Best baseline: {info['best']}. \"vs best baseline\" is coded size over that codec's coded "
                "size; \"model bytes\" is what the decoder must already have (model file, dictionary or "
                "prime), left out of the coded size and put back in the column after it.", ""]
    out += ["## Totals", "", _md_table(head, body), ""]
    if info["legend"]:
        out += ["Baselines:", ""] + [f"* {c}: {d}" for c, d in info["legend"]] + [""]
    if info["notes"]:
        out += ["Notes:", ""] + [f"* {c}: {n}" for c, n in info["notes"]] + [""]
    out += ["## Charts", ""]
    for name in CHARTS:
        out += [f"![{name}]({name}.png)", "", CAPTIONS[name], ""]
    out += ["## Per file (bits per byte)", "", _md_table(fhead, fbody), "",
            "The rows: bench.json and bench.csv (the same as `lcodec bench --json/--csv`).", ""]
    return "\n".join(out)


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#1d2430;margin:0;background:#f4f5f7}
main{max-width:1120px;margin:0 auto;padding:22px 28px 40px}
h1{font-size:23px;margin:0 0 4px} h2{font-size:17px;margin:28px 0 8px}
.sub{color:#5b6472;margin:0 0 14px}
.cards{display:flex;flex-wrap:wrap;gap:12px;margin:10px 0 6px}
.card{background:#fff;border:1px solid #dde1e7;border-radius:8px;padding:10px 14px;min-width:160px}
.card .v{font-size:20px;font-weight:600} .card .k{color:#5b6472;font-size:12px}
table{border-collapse:collapse;background:#fff;border:1px solid #dde1e7;font-size:13px}
th,td{padding:5px 10px;border-bottom:1px solid #eceef2;text-align:right;white-space:nowrap}
th{background:#eef1f5;font-weight:600;vertical-align:bottom} td.l,th.l{text-align:left}
tr.lc td{background:#fdf1f1} tr.lc td:first-child{font-weight:600;border-left:3px solid #c4303c}
td.best{font-weight:700;color:#0f5132;background:#e6f4ea}
.wrap{overflow-x:auto}
.charts{display:grid;grid-template-columns:1fr;gap:16px}
figure{margin:0;background:#fff;border:1px solid #dde1e7;border-radius:8px;padding:10px}
figure img{width:100%;height:auto;display:block}
figcaption{color:#5b6472;font-size:12.5px;margin-top:6px}
.note{color:#5b6472;font-size:13px} a{color:#1f5fbf}
details summary{cursor:pointer;font-weight:600;margin:6px 0}
"""


def index_html(rows: Sequence[dict], title: str, generated: str, pngs: dict) -> str:
    e = html.escape
    head, body, info = totals_table(rows)
    fhead, fbody, fbest = per_file_table(rows)
    totals = info["totals"]
    lc = [t for t in totals if t["kind"] == "lcodec"]
    best = next((t for t in totals if t["codec"] == info["best"]), None)
    cards = [("test files", f"{info['n_files']:,}"), ("raw bytes", f"{info['raw_bytes']:,}")]
    for t in lc:
        cards.append((f"{t['codec']}: bits per byte (model {t['model_bytes']:,} B)", _fmt_bpb(t["bits_per_byte"])))
        if best and best["coded_bytes"]:
            cards.append((f"{t['codec']} vs {best['codec']} (coded size)", f"{t['coded_bytes'] / best['coded_bytes']:.3f}"))
    if best:
        cards.append((f"best baseline {best['codec']} (model {best['model_bytes']:,} B)", _fmt_bpb(best["bits_per_byte"])))
    card_html = "".join(f'<div class="card"><div class="v">{e(v)}</div><div class="k">{e(k)}</div></div>'
                        for k, v in cards)

    def table(head, body, lc_rows=(), best_cols=None, left=1):
        h = "".join(f'<th class="{"l" if i < left else ""}">{e(c)}</th>' for i, c in enumerate(head))
        lines = []
        for j, row in enumerate(body):
            cls = ' class="lc"' if row[0] in lc_rows else ""
            cells = []
            for i, c in enumerate(row):
                k = "l" if i < left else ""
                if best_cols is not None and best_cols[j] >= 0 and i == best_cols[j] + 2:
                    k += " best"
                cells.append(f'<td class="{k.strip()}">{e(c)}</td>')
            lines.append(f"<tr{cls}>{''.join(cells)}</tr>")
        return f'<div class="wrap"><table><tr>{h}</tr>{"".join(lines)}</table></div>'

    figs = "".join(
        f'<figure><img alt="{e(name)}" src="data:image/png;base64,{base64.b64encode(pngs[name]).decode("ascii")}">'
        f"<figcaption>{e(CAPTIONS[name])} (<a href=\"{name}.png\">{name}.png</a>)</figcaption></figure>"
        for name in CHARTS if name in pngs)
    notes = "".join(f"<li>{e(c)}: {e(n)}</li>" for c, n in info["notes"])
    legend = "".join(f"<li>{e(c)}: {e(d)}</li>" for c, d in info["legend"])
    best_line = (f"Best baseline: <b>{e(info['best'])}</b>. &ldquo;vs best baseline&rdquo; is a codec's coded size "
                 f"over that codec's; &ldquo;model bytes&rdquo; is what the decoder must already have (a model file, "
                 f"a dictionary or a prime), left out of the coded size and put back in the column after it."
                 if info["best"] else "")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{e(title)}</title>
<style>{_CSS}</style></head>
<body><main>
<h1>{e(title)}</h1>
<p class="sub">{info['n_files']} test files, {info['raw_bytes']:,} bytes; each file compressed on its own by every
codec and round-trip checked. Generated {e(generated)}.</p>
<div class="cards">{card_html}</div>
<h2>Totals</h2>
<p class="note">{best_line}</p>
{table(head, body, lc_rows={t['codec'] for t in lc})}
{f'<p class="note">Baselines:</p><ul class="note">{legend}</ul>' if legend else ''}
{f'<p class="note">Notes:</p><ul class="note">{notes}</ul>' if notes else ''}
<h2>Charts</h2>
<div class="charts">{figs}</div>
<h2>Per file</h2>
<details open><summary>bits per byte of every test file (best per file in green)</summary>
{table(fhead, fbody, best_cols=fbest)}
</details>
<p class="note">Files beside this page: <a href="summary.md">summary.md</a>, <a href="bench.json">bench.json</a>,
<a href="bench.csv">bench.csv</a> (the rows, as <code>lcodec bench --json/--csv</code> write them),
<a href="charts.json">charts.json</a> (the numbers plotted).</p>
</main></body></html>
"""


def write_report(rows: Sequence[dict], out_dir: str, title: str = "lcodec bench report",
                 force: bool = False) -> dict:
    """Write the report folder (see the module docstring) for bench rows (per-file rows,
    with or without their "*TOTAL*" rows). Refuses an existing non-empty folder unless
    `force`. Returns the numbers the charts plot (also saved as charts.json)."""
    rows = [{k: r.get(k) for k in ROW_KEYS} for r in rows]
    if not [r for r in rows if r["file"] != TOTAL]:
        raise UsageError("no bench rows to report")
    if not [r for r in rows if r["file"] == TOTAL]:
        rows = rows + total_rows(rows)
    check_out_dir(out_dir, force)
    data = chart_data(rows)
    pngs = draw_charts(data)
    generated = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    texts = {
        "index.html": index_html(rows, title, generated, pngs).encode("utf-8"),
        "summary.md": summary_markdown(rows, title, generated).encode("utf-8"),
        "charts.json": (json.dumps(data, indent=1, allow_nan=False) + "\n").encode("utf-8"),
        **{f"{name}.png": png for name, png in pngs.items()},
    }
    _write_folder(out_dir, texts, rows)
    return data


def _write_folder(out_dir: str, files: dict, rows) -> None:
    """A new folder is written under a temporary name and renamed into place; into an
    existing folder (empty, or --force) each file is written atomically."""
    from ..fsio import atomic_write

    def put(folder):
        for name, blob in files.items():
            atomic_write(os.path.join(folder, name), blob, force=True)
        write_json(rows, os.path.join(folder, "bench.json"))
        write_csv(rows, os.path.join(folder, "bench.csv"))
        for name in list(files) + ["bench.json", "bench.csv"]:
            os.chmod(os.path.join(folder, name), readable_mode())

    if os.path.isdir(out_dir):
        put(out_dir)
        return
    parent = os.path.dirname(os.path.abspath(out_dir))
    tmp = os.path.join(parent, f".{os.path.basename(os.path.abspath(out_dir))}.part-{os.getpid()}")
    try:
        os.makedirs(tmp)
        put(tmp)
        os.rename(tmp, out_dir)
    except OSError as e:
        shutil.rmtree(tmp, ignore_errors=True)
        raise UsageError(f"cannot write the report into {out_dir}: {e.strerror or e}") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
