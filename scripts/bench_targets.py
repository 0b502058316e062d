#!/usr/bin/env python3
"""The project's size and speed targets, measured on this machine, against the baselines
measured in the same run. Not a test: prints figures, writes JSON, and marks each target
MET or MISSED (exit 0 either way, unless something fails to round-trip).

    python scripts/bench_targets.py [--out DIR] [--limit-bytes N] [--kinds python_stdlib,c_headers]

Targets (foundation issue):
  * the built-in adaptive model, each test file on its own, is smaller in total than
    xz -9e, bz2 -9 and zstd -19, on the Python standard library and on C headers
    (its ratio to PPMd order 8 is reported too);
  * encode and decode at least 200 KB/s on one large file (a 4 MiB concatenation of
    the Python standard library's test split), on this 2-core machine.
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
from lcodec.measure import bench as B  # noqa: E402

LC = "lcodec-strata"


def size_targets(kind: str, out: str, limit: int | None) -> dict:
    corpus = os.path.join(out, kind)
    open_data.materialise(kind, corpus, limit_bytes=limit)
    t0 = time.perf_counter()
    rows = B.run_bench(corpus, [B.lcodec_codec(None, LC)])
    totals = {r["codec"]: r for r in rows if r["file"] == B.TOTAL}
    B.write_json(rows, os.path.join(out, f"bench-{kind}.json"))
    print(f"\n== {kind} ({time.perf_counter() - t0:.0f} s)")
    print(B.format_table(rows))
    lc = totals[LC]["coded_bytes"]
    res = {"kind": kind, "raw_bytes": totals[LC]["raw_bytes"], "lcodec_bytes": lc,
           "lcodec_bpb": totals[LC]["bits_per_byte"], "nll_bpb": totals[LC]["nll_bits"] / totals[LC]["raw_bytes"]}
    for base in ("xz-9e", "bz2-9", "zstd-19", "ppmd-o8", "zstd-19-dict", "brotli-11"):
        if base in totals:
            res[f"ratio_to_{base}"] = lc / totals[base]["coded_bytes"]
    beaten = all(res.get(f"ratio_to_{b}", 0) < 1 for b in ("xz-9e", "bz2-9", "zstd-19"))
    print(f"target: smaller than xz -9e, bz2 -9 and zstd -19: {'MET' if beaten else 'MISSED'} "
          + ", ".join(f"{k[9:]} x{v:.3f}" for k, v in res.items() if k.startswith("ratio_to_")))
    res["target_met"] = beaten
    return res


def speed_target(out: str) -> dict:
    train, test = open_data.python_stdlib()
    data = b""
    for p in test + train:
        with open(p, "rb") as f:
            data += f.read()
        if len(data) >= 4 << 20:
            break
    data = data[: 4 << 20]
    api.pack(data[:20000])  # load the compiled kernels once, outside the timing
    t0 = time.perf_counter()
    blob, stats = api.pack_stats(data)
    enc = time.perf_counter() - t0
    t0 = time.perf_counter()
    back = api.unpack(blob)
    dec = time.perf_counter() - t0
    assert back == data, "large-file round trip failed"
    res = {"bytes": len(data), "coded_bytes": len(blob), "bits_per_byte": 8 * len(blob) / len(data),
           "encode_kb_s": len(data) / enc / 1e3, "decode_kb_s": len(data) / dec / 1e3}
    met = res["encode_kb_s"] >= 200 and res["decode_kb_s"] >= 200
    print(f"\n== one large file: {len(data):,} bytes -> {len(blob):,} ({res['bits_per_byte']:.3f} bits per byte); "
          f"encode {res['encode_kb_s']:.0f} KB/s, decode {res['decode_kb_s']:.0f} KB/s "
          f"(target >= 200 KB/s both): {'MET' if met else 'MISSED'}")
    res["target_met"] = met
    return res


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", default="bench-out", help="folder for corpora and JSON (default: bench-out)")
    ap.add_argument("--limit-bytes", type=int, default=8 << 20,
                    help="cap on each corpus's bytes, train and test together (default 8 MiB)")
    ap.add_argument("--kinds", default="python_stdlib,c_headers")
    ap.add_argument("--skip-speed", action="store_true")
    a = ap.parse_args()
    os.makedirs(a.out, exist_ok=True)
    report = {"sizes": [size_targets(k, a.out, a.limit_bytes) for k in a.kinds.split(",") if k]}
    if not a.skip_speed:
        report["speed"] = speed_target(a.out)
    with open(os.path.join(a.out, "targets.json"), "w") as f:
        json.dump(report, f, indent=2)
    print(f"\nwritten {os.path.join(a.out, 'targets.json')}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
