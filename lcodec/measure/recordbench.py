"""`lcodec bench --kind records FILE -m MODEL`: a file of fixed-size records (a heddle model
file's record of H x W symbols, one byte each) against image codecs and general
compressors, in bits per symbol (per dimension).

Layout, the same for every codec: the records one after another, as the file holds them.
The image codecs get them as one 8-bit grey image of (records * H) rows and W columns (the
records stacked; row-major, that is exactly the file's byte order); the general
compressors get the file's bytes. Every codec's output is decoded again and compared.
lcodec's figure is its whole archive (container header and frame records included);
beside it, the model's NLL of the symbols and the payload alone (coded words).
"""
from __future__ import annotations

import os
import time

import numpy as np

from ..archive import read as api_read, write as api_write
from ..errors import UsageError
from ..format import container as C
from ..models import resolve
from .baselines import available, make_baseline
from .imagebench import codec_size

IMAGE_CODECS = ("png", "jpegls", "jpegxl")
GENERAL = ("xz-9e", "zstd-19", "ppmd-o8", "ppmd-o16")


def record_shape(model) -> tuple[int, int]:
    inner = getattr(model, "inner", model)
    graph = getattr(inner, "graph", None)
    if graph is None or not graph.P:
        raise UsageError("--kind records needs -m with a heddle model file of fixed-size records")
    return graph.H, graph.W


def bench_records(path: str, model_path: str, jobs: int = 1) -> dict:
    model = resolve(model_path)
    H, W = record_shape(model)
    data = open(path, "rb").read()
    R = H * W
    if not data or len(data) % R:
        raise UsageError(f"{path}: {len(data)} bytes is not a whole number of {H} x {W} records")
    n = len(data)
    t0 = time.perf_counter()
    blob, stats = api_write.pack_stats(data, model_path, jobs=jobs)
    enc_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    back = api_read.unpack(blob, model_path, jobs=jobs)
    dec_s = time.perf_counter() - t0
    if back != data:
        raise RuntimeError("lcodec did not round-trip")
    cont = C.read_container(blob)
    payload = sum(f.coded_len for f in cont.frames)
    row = {"file": os.path.basename(path), "records": n // R, "record": [H, W], "symbols": n,
           "model_bytes": os.path.getsize(model_path), "lcodec_bytes": len(blob), "payload_bytes": payload,
           "nll_bits": stats.nll_bits, "encode_s": enc_s, "decode_s": dec_s, "decode_symbols_per_s": n / dec_s,
           "codecs": {}}
    img = np.frombuffer(data, np.uint8).reshape(n // W, W, 1)
    for c in IMAGE_CODECS:
        try:
            row["codecs"][c] = codec_size(c, img)
        except ImportError:
            row["codecs"][c] = None
    for name in GENERAL:
        if not available(name):
            row["codecs"][name] = None
            continue
        b = make_baseline(name)
        out = b.compress(data)
        if b.decompress(out) != data:
            raise RuntimeError(f"{name} did not round-trip")
        row["codecs"][name] = len(out)
    return row


def format_row(row: dict) -> list[str]:
    n = row["symbols"]
    best = min((v for v in row["codecs"].values() if v), default=None)
    lines = [f"{row['file']}: {row['records']} records of {row['record'][0]} x {row['record'][1]} symbols "
             f"({n:,} symbols); bits per symbol, and each against lcodec's archive", f"{'method':24s} {'bytes':>9s} "
             f"{'bits/sym':>9s} {'lcodec / it':>12s}"]

    def line(name, size):
        lines.append(f"{name:24s} {size:9,d} {8.0 * size / n:9.4f} {row['lcodec_bytes'] / size:12.3f}")

    line("lcodec (archive)", row["lcodec_bytes"])
    lines.append(f"{'  model NLL':24s} {row['nll_bits'] / 8:9,.0f} {row['nll_bits'] / n:9.4f}")
    lines.append(f"{'  coded words':24s} {row['payload_bytes']:9,d} {8.0 * row['payload_bytes'] / n:9.4f}  "
                 f"({100 * (8 * row['payload_bytes'] / row['nll_bits'] - 1):+.3f}% over the NLL; header and "
                 f"records {row['lcodec_bytes'] - row['payload_bytes']} bytes)")
    for name, size in row["codecs"].items():
        if size:
            line(name, size)
        else:
            lines.append(f"{name:24s} {'n/a':>9s}")
    if best:
        lines.append(f"lcodec is {row['lcodec_bytes'] / best:.3f}x the best codec ({8.0 * best / n:.4f} bits per "
                     f"symbol); model file {row['model_bytes']:,} bytes; decoding {row['decode_symbols_per_s']:,.0f} "
                     "symbols/s")
    return lines


def probe_file(path: str, records_file: str | None, count: int, shape: str | None, echo=print) -> dict:
    """`lcodec probe`: the heddle audit (models/heddle_audit.py) on a model file."""
    from ..errors import ModelError
    from ..format import modelfile
    from ..models import heddle_audit
    from ..models.heddle import Graph

    meta, arrays, sha = modelfile.load(path)
    if meta["architecture"].get("name") != "heddle":
        raise UsageError(f"{path} is a {meta['architecture'].get('name')!r} model file; probe checks heddle models "
                         "(the layer kit's)")
    try:
        graph = Graph(meta["architecture"].get("params"), arrays, check_causal=False)
    except (KeyError, TypeError, ValueError) as e:
        raise ModelError(f"model file {path}: bad parameters ({e})") from None
    H, W = graph.H, graph.W
    if not graph.P:
        try:
            H, W = (int(v) for v in (shape or "8x8").lower().split("x"))
            assert 1 <= H * W <= 1 << 16
        except (ValueError, AssertionError):
            raise UsageError("--shape takes ROWSxCOLS, say 16x16") from None
    elif shape:
        raise UsageError("--shape is for image-sized models; this one has records of "
                         f"{graph.H} x {graph.W}")
    recs = None
    if records_file:
        raw = np.fromfile(records_file, np.uint8)
        n = min(count, len(raw) // (H * W))
        if n < 1:
            raise UsageError(f"{records_file} holds no whole record of {H} x {W} symbols")
        recs = raw[:n * H * W].reshape(n, H * W)
    echo(f"{path}: heddle, records of {H} x {W}, alphabet {graph.A}, {len(graph.specs)} ops (sha256 {sha[:16]}...)")
    rep = heddle_audit.run(graph, recs, n=count, shape=(H, W), echo=echo)
    for k in ("float_bits_per_symbol", "note"):
        if k in meta:
            echo(f"recorded at export: {k} = {meta[k]}")
            rep["recorded_" + k] = meta[k]
    return rep
