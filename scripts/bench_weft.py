#!/usr/bin/env python3
"""The neural byte model's targets: weft (preset `weft`, an MLP over the context window
with hashed-context embeddings) alone, with no per-file adaptation, against the general
compressors on the Python standard library split by file. Not a test: prints figures,
writes JSON, and marks each target MET or MISSED (exit 0 either way, unless something
fails to round-trip).

    python scripts/bench_weft.py [--out DIR] [--time-limit S] [--model PATH] [--preset NAME]

Targets (learned-model issue), the test split (10% of the files, seed 0), each test file
packed on its own, the model trained for at most 15 minutes on this machine:
  * smaller in total than xz -9e, bz2 -9 and zstd -19 (the ratios to zstd -19 with a
    dictionary trained on the train split and to PPMd order 8 are reported too);
  * coded size within 0.1% of the integer model's NLL;
  * encode at least 300 KB/s and decode at least 100 KB/s over the test split (the
    model loaded once, as `lcodec pack`/`unpack` of a folder do);
  * the integer model's validation NLL within 2% of the float model's.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")
sys.path.insert(0, ROOT)

from corpora import open_data  # noqa: E402
from lcodec import api
from lcodec.format import modelfile
from lcodec.measure import bench as B  # noqa: E402
from lcodec.measure import baselines as BL  # noqa: E402
from lcodec.format.container import read_container  # noqa: E402
from lcodec.models import load_model  # noqa: E402

LC = "lcodec-weft"
TRAIN_BUDGET_S = 15 * 60


def say(msg: str) -> None:
    print(msg, flush=True)


class PayloadCounter(B.LcodecCodec):
    """lcodec in the bench, also summing each archive's coded payload (its frames' words,
    without the header every archive carries) from the archives the bench makes."""

    def __init__(self, model, label):
        super().__init__(model, label)
        self.payload = 0

    def compress_stats(self, data: bytes):
        blob, nll_bits = super().compress_stats(data)
        self.payload += sum(fr.coded_len for fr in read_container(blob).frames)
        return blob, nll_bits


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="bench-weft-out")
    ap.add_argument("--time-limit", type=float, default=480.0, help="training seconds (at most 900)")
    ap.add_argument("--model", help="measure this model file instead of training one")
    ap.add_argument("--preset", default="weft")
    a = ap.parse_args()
    if a.time_limit > TRAIN_BUDGET_S:
        ap.error(f"the target allows at most {TRAIN_BUDGET_S} s of training")
    os.makedirs(a.out, exist_ok=True)
    corpus = os.path.join(a.out, "python_stdlib")
    open_data.materialise("python_stdlib", corpus, limit_bytes=32 << 20)
    model = a.model
    if model is None:
        from lcodec.training.train import train

        model = os.path.join(a.out, f"python_stdlib-{a.preset}.lcmodel")
        t0 = time.perf_counter()
        train([os.path.join(corpus, "train")], model, a.time_limit, a.preset, 0, echo=say, force=True)
        say(f"trained in {time.perf_counter() - t0:.0f} s")
    meta = modelfile.load(model)[0]
    msize = os.path.getsize(model)
    m = load_model(model)
    api.pack(b"warm up the compiled kernels " * 40, model=m)
    codec = PayloadCounter(m, LC)
    rows = B.run_bench(corpus, [codec])
    for r in rows:
        if r["codec"] == LC:
            r["model_bytes"] = msize
    B.write_json(rows, os.path.join(a.out, "bench-weft.json"))
    say(B.format_table(rows))
    tot = {r["codec"]: r for r in rows if r["file"] == B.TOTAL}
    lc = tot[LC]
    raw = lc["raw_bytes"]
    ratios = {k: lc["coded_bytes"] / v["coded_bytes"] for k, v in tot.items() if k in BL.DEFAULT_NAMES}
    val = meta.get("validation", {})
    res = {
        "model": os.path.abspath(model), "model_bytes": msize, "preset": meta.get("preset"),
        "train_seconds": meta.get("training", {}).get("seconds"), "files": sum(1 for r in rows if r["codec"] == LC) - 1,
        "raw_bytes": raw, "weft_bytes": lc["coded_bytes"], "weft_bpb": lc["bits_per_byte"],
        "nll_bpb": lc["nll_bits"] / raw, "coded_over_nll": 8 * lc["coded_bytes"] / lc["nll_bits"],
        "ratios": ratios,
        "encode_kb_s": raw / lc["encode_s"] / 1e3, "decode_kb_s": raw / lc["decode_s"] / 1e3,
        "validation": val,
    }
    # the coder's own overhead: payload words against the NLL, without the per-archive
    # header (content SHA-256, identity, frame records) that small files pay
    res["payload_over_nll"] = 8 * codec.payload / lc["nll_bits"]
    res["header_bytes_per_file"] = (lc["coded_bytes"] - codec.payload) / max(1, res["files"])
    size_met = all(ratios[b] < 1 for b in ("xz-9e", "bz2-9", "zstd-19"))
    res["targets"] = {
        "smaller_than_xz_bz2_zstd": size_met,
        "encode_300_kb_s": res["encode_kb_s"] >= 300, "decode_100_kb_s": res["decode_kb_s"] >= 100,
        "integer_within_2pct_of_float": bool(val) and val["integer_bpb"] <= 1.02 * val["float_qat_bpb"],
        "payload_within_0.1pct_of_nll": res["payload_over_nll"] <= 1.001,
    }
    say(f"\nweft ({msize:,}-byte model file, preset {res['preset']}, trained {res['train_seconds']} s): "
        f"{res['weft_bpb']:.4f} bits per byte over {res['files']} test files ({raw:,} bytes), NLL {res['nll_bpb']:.4f}")
    say("  ratios: " + ", ".join(f"{k} x{v:.3f}" for k, v in ratios.items()))
    say(f"  smaller than xz -9e, bz2 -9 and zstd -19: {'MET' if size_met else 'MISSED'}")
    say(f"  coded payload / NLL {res['payload_over_nll']:.5f} (target within 0.1%: "
        f"{'MET' if res['payload_over_nll'] <= 1.001 else 'MISSED'}); with every archive's header "
        f"{res['coded_over_nll']:.5f} ({res['header_bytes_per_file']:.0f} bytes per archive)")
    say(f"  encode {res['encode_kb_s']:.0f} KB/s (target 300): {'MET' if res['targets']['encode_300_kb_s'] else 'MISSED'}; "
        f"decode {res['decode_kb_s']:.0f} KB/s (target 100): {'MET' if res['targets']['decode_100_kb_s'] else 'MISSED'}")
    if val:
        say(f"  validation: integer {val['integer_bpb']:.4f} vs float {val['float_qat_bpb']:.4f} bits per byte "
            f"(within 2%: {'MET' if res['targets']['integer_within_2pct_of_float'] else 'MISSED'})")
    with open(os.path.join(a.out, "targets-weft.json"), "w") as f:
        json.dump(res, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
