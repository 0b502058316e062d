"""`lcodec demo`: the main job, end to end, on the bundled demo corpus.

1. make the demo corpus (lcodec.democorpus: invented station telemetry and logs)
   under WORKDIR/corpus, with its train/ and test/ split;
2. train a braid model on the train split (corpus statistics braided with per-file
   adaptation; a short time limit) and write it to WORKDIR/model.lcmodel;
3. pack the test split into one archive with it and verify it against the originals;
4. compare bits per byte with the built-in adaptive model alone and the general
   compressors, each test file on its own.
"""
from __future__ import annotations

import os
import time

from .. import api
from ..errors import UsageError
from ..fsio import ARCHIVE_EXT, atomic_write
from ..measure import bench as B
from . import corpus as democorpus

STAMP = ".lcodec-demo"  # marks a work folder as the demo's own, so it may be reused


def _prepare(workdir: str) -> None:
    if os.path.exists(workdir):
        if not os.path.isdir(workdir):
            raise UsageError(f"{workdir} exists and is not a folder")
        if os.listdir(workdir) and not os.path.exists(os.path.join(workdir, STAMP)):
            raise UsageError(f"{workdir} exists and was not made by `lcodec demo`; choose another --workdir")
    os.makedirs(workdir, exist_ok=True)
    with open(os.path.join(workdir, STAMP), "w") as f:
        f.write("work folder of `lcodec demo`; safe to delete\n")


TRAIN_SECONDS = 20  # the demo's training budget (counting plus the discount search)


def run(workdir: str, scale: float = 1.0, echo=print, quiet: bool = False) -> dict:
    t_start = time.perf_counter()
    _prepare(workdir)
    corpus = os.path.join(workdir, "corpus")
    summary = democorpus.generate(corpus, scale=scale)
    test_dir = os.path.join(corpus, "test")
    echo(f"demo corpus: {corpus} ({_describe(summary)})")

    from ..models import load_model
    from ..training.train import train

    model_path = os.path.join(workdir, "model.lcmodel")
    t0 = time.perf_counter()
    res = train([os.path.join(corpus, "train")], model_path, TRAIN_SECONDS, "braid", 0, echo=lambda m: None, force=True)
    echo(f"trained a braid model on the train split in {time.perf_counter() - t0:.0f} s: validation "
         f"{res['integer_bpb']:.3f} bits per byte (the built-in adaptive model alone: {res['strata_bpb']:.3f}); "
         f"{os.path.getsize(model_path):,} bytes -> {model_path}")
    model = load_model(model_path)

    archive = os.path.join(workdir, "test-split" + ARCHIVE_EXT)
    blob, stats = api.pack_paths([test_dir], model)
    atomic_write(archive, blob, force=True)
    echo(f"packed the test split: {stats.raw_bytes:,} -> {stats.coded_bytes:,} bytes "
         f"({stats.bits_per_byte:.3f} bits per byte, model NLL {stats.nll_bits / max(stats.raw_bytes, 1):.3f}), "
         f"{stats.encode_s:.1f} s -> {archive}")
    rep = api.verify(blob, model, against=test_dir)
    if not rep.ok:
        raise RuntimeError("demo archive failed verification: " + "; ".join(rep.problems))
    echo(f"verified: {rep.members} members, every frame CRC-32C and SHA-256 match, identical to {test_dir}")

    echo("comparing with general compressors, each test file on its own...")
    rows = B.run_bench(corpus, [B.lcodec_codec(model_path, "lcodec-braid"), B.lcodec_codec(None, "lcodec-strata")],
                       progress=None if quiet else (lambda m: None))
    B.write_json(rows, os.path.join(workdir, "bench.json"))
    B.write_csv(rows, os.path.join(workdir, "bench.csv"))
    echo(B.format_table(rows))
    echo(f"rows written to {os.path.join(workdir, 'bench.json')} and bench.csv; "
         f"demo took {time.perf_counter() - t_start:.0f} s")
    return {"archive": archive, "model": model_path, "stats": stats, "rows": rows}


def _describe(summary: dict) -> str:
    parts = []
    for split in ("train", "test"):
        s = summary.get(split) if isinstance(summary, dict) else None
        if isinstance(s, dict) and "files" in s and "bytes" in s:
            parts.append(f"{split}: {s['files']} files, {s['bytes']:,} bytes")
    return "; ".join(parts) if parts else "made"
