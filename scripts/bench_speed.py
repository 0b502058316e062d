#!/usr/bin/env python3
"""Speed of the learned and built-in models, with PPMd order 8 timed on the same bytes in
the same run. Not a test: prints figures and the speed issue's targets (MET or MISSED), and
writes JSON. It exits 0 either way, and 1 if a round trip fails.

    python scripts/bench_speed.py --models DIR [--kinds a,b] [--bytes N] [--out DIR]

DIR holds `<kind>-braid.lcmodel` (and, optionally, `<kind>-braid-tree.lcmodel`). Models
are trained with `lcodec train --preset braid` on each kind's train split. The test data
is each kind's test split (corpora/open_data.py), concatenated and cut to N bytes (default
1 MiB), packed as one frame.

Every learned figure is one process, one thread (numba's thread count 1, one frame at a
time), model load excluded.

Rows:
  * braid and braid-tree, per kind: encode and decode KB/s, bits per byte, and the time
    ratio to PPMd order 8 on the same bytes;
  * strata (the built-in model), both ways, on the first kind's bytes;
  * small input: `lcodec pack` and `lcodec unpack` of a 40 KB text file with the built-in
    model, as commands. Wall time and peak RSS are set against
    `python -c "import numpy, numba"`;
  * `--jobs 2` against `--jobs 1`: strata on 4 frames of 1 MiB, and braid on 2 frames
    (with the peak RSS of braid's one-process pack: memory per frame, not per input).

Targets (the speed issue):
  * braid decode >= 600 KB/s and encode >= 800 KB/s per core;
  * decode time at most 15x PPMd order 8's;
  * braid-tree decode >= 300 KB/s;
  * strata >= 1.5 MB/s both ways;
  * a 40 KB pack or unpack within 2x the import line's wall time, at peak RSS <= 150 MB;
  * --jobs 2 at least 1.7x.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")
sys.path.insert(0, ROOT)

import numba  # noqa: E402
import numpy as np  # noqa: E402

from corpora import open_data  # noqa: E402
from lcodec import api, baselines  # noqa: E402
from lcodec.coding import coder  # noqa: E402
from lcodec.models import default_model, load_model  # noqa: E402

PY = sys.executable
RSS_PY = ("import resource, subprocess, sys, time; t = time.perf_counter(); r = subprocess.run(sys.argv[1:]); "
          "print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss, r.returncode)")


def test_bytes(kind: str, out: str, n: int) -> bytes:
    corpus = os.path.join(out, "corpora", kind)
    if not os.path.isdir(os.path.join(corpus, "test")):
        open_data.materialise(kind, corpus)
    data = bytearray()
    for root, _, files in sorted(os.walk(os.path.join(corpus, "test"))):
        for name in sorted(files):
            with open(os.path.join(root, name), "rb") as f:
                data += f.read()
            if len(data) >= n:
                return bytes(data[:n])
    return bytes(data)


def time_model(model, data: bytes) -> dict:
    """One frame, one thread: encode and decode seconds (the kernels warmed first)."""
    lanes = api.frame_lanes(model, len(data))  # as `lcodec pack` chooses them
    warm = data[:4096]
    coder.decode_frame(model, coder.encode_frame(model, warm, 1)[0], len(warm), 1)
    t0 = time.perf_counter()
    payload, nll = coder.encode_frame(model, data, lanes)
    enc = time.perf_counter() - t0
    t0 = time.perf_counter()
    back = coder.decode_frame(model, payload, len(data), lanes)
    dec = time.perf_counter() - t0
    if back != data:
        raise SystemExit("round trip failed")
    return {"bytes": len(data), "lanes": lanes, "bits_per_byte": 8 * len(payload) / len(data),
            "encode_s": enc, "decode_s": dec, "encode_kb_s": len(data) / enc / 1e3,
            "decode_kb_s": len(data) / dec / 1e3}


def time_ppmd(data: bytes) -> dict:
    b = baselines.make_baseline("ppmd-o8")
    t0 = time.perf_counter()
    blob = b.compress(data)
    enc = time.perf_counter() - t0
    t0 = time.perf_counter()
    back = b.decompress(blob)
    dec = time.perf_counter() - t0
    if back != data:
        raise SystemExit("ppmd-o8 round trip failed")
    return {"bits_per_byte": 8 * len(blob) / len(data), "encode_s": enc, "decode_s": dec}


def command(args: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MB) of one command."""
    r = subprocess.run([PY, "-c", RSS_PY, *args], capture_output=True, text=True, check=True)
    wall, rss, rc = r.stdout.split()
    if int(rc) != 0:
        raise SystemExit(f"{' '.join(args)} failed")
    return float(wall), int(rss) / 1024


def small_input(data: bytes, tmp: str, repeat: int = 3) -> dict:
    lc = [PY, "-m", "lcodec"]
    src = os.path.join(tmp, "note.txt")
    with open(src, "wb") as f:
        f.write(data[:40_000])
    base = min(command([PY, "-c", "import numpy, numba"])[0] for _ in range(repeat))
    packs, unpacks = [], []
    for _ in range(repeat):
        packs.append(command(lc + ["pack", src, "-o", src + ".lcodec", "--force", "-q"]))
        unpacks.append(command(lc + ["unpack", src + ".lcodec", "-o", src + ".back", "--force", "-q"]))
    with open(src + ".back", "rb") as f:
        if f.read() != data[:40_000]:
            raise SystemExit("small-input round trip failed")
    pack_s, pack_rss = min(packs)
    unpack_s, unpack_rss = min(unpacks)
    return {"import_numpy_numba_s": base, "pack_s": pack_s, "unpack_s": unpack_s,
            "pack_peak_rss_mb": max(p[1] for p in packs), "unpack_peak_rss_mb": max(u[1] for u in unpacks),
            "pack_ratio": pack_s / base, "unpack_ratio": unpack_s / base}


def jobs_scaling(data: bytes, model_path: str | None, tmp: str) -> dict:
    src = os.path.join(tmp, "jobs.bin")
    with open(src, "wb") as f:
        f.write(data)
    out = {}
    for jobs in (1, 2):
        args = [PY, "-m", "lcodec", "pack", src, "-o", src + ".lcodec", "--force", "-q", "--jobs", str(jobs)]
        if model_path:
            args += ["-m", model_path]
        out[f"jobs{jobs}_s"], out[f"jobs{jobs}_peak_rss_mb"] = command(args)
    out["speedup"] = out["jobs1_s"] / out["jobs2_s"]
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--models", required=True, help="folder of <kind>-braid.lcmodel files")
    ap.add_argument("--kinds", default="python_stdlib,c_headers,doc_text,package_data")
    ap.add_argument("--bytes", type=int, default=1 << 20, help="test bytes per kind (default 1 MiB)")
    ap.add_argument("--out", default="bench-out", help="folder for corpora and JSON (default: bench-out)")
    ap.add_argument("--skip-commands", action="store_true", help="leave out the small-input and --jobs rows")
    a = ap.parse_args()
    numba.set_num_threads(1)
    os.makedirs(a.out, exist_ok=True)
    res = {"kinds": {}, "load_average": os.getloadavg()[0]}
    kinds = [k for k in a.kinds.split(",") if k]
    first = None
    for kind in kinds:
        path = os.path.join(a.models, f"{kind}-braid.lcmodel")
        if not os.path.exists(path):
            print(f"{kind}: no model {path}, skipped")
            continue
        data = test_bytes(kind, a.out, a.bytes)
        first = first or data
        pp = time_ppmd(data)
        row = {"ppmd_o8": pp, "braid": time_model(load_model(path), data)}
        tree = os.path.join(a.models, f"{kind}-braid-tree.lcmodel")
        if os.path.exists(tree):
            row["braid_tree"] = time_model(load_model(tree), data)
        for name in ("braid", "braid_tree"):
            if name in row:
                r = row[name]
                r["decode_x_ppmd"] = r["decode_s"] / pp["decode_s"]
                r["encode_x_ppmd"] = r["encode_s"] / pp["encode_s"]
                print(f"{kind:14s} {name:10s} {r['bits_per_byte']:.4f} bpb  encode {r['encode_kb_s']:6.0f} KB/s "
                      f"({r['encode_x_ppmd']:5.1f}x ppmd-o8's time)  decode {r['decode_kb_s']:6.0f} KB/s "
                      f"({r['decode_x_ppmd']:5.1f}x)", flush=True)
        print(f"{kind:14s} ppmd-o8    {pp['bits_per_byte']:.4f} bpb  encode {len(data) / pp['encode_s'] / 1e3:6.0f} KB/s"
              f"  decode {len(data) / pp['decode_s'] / 1e3:6.0f} KB/s", flush=True)
        res["kinds"][kind] = row
    if first is None:
        first = test_bytes(kinds[0], a.out, a.bytes)
    s = res["strata"] = time_model(default_model(), first)
    print(f"strata (built-in) {s['bits_per_byte']:.4f} bpb  encode {s['encode_kb_s']:.0f} KB/s  "
          f"decode {s['decode_kb_s']:.0f} KB/s", flush=True)
    if not a.skip_commands:
        with tempfile.TemporaryDirectory() as tmp:
            sm = res["small_input"] = small_input(first, tmp)
            print(f"40 KB file, built-in model: pack {sm['pack_s']:.2f} s ({sm['pack_ratio']:.1f}x the import line's "
                  f"{sm['import_numpy_numba_s']:.2f} s), peak RSS {sm['pack_peak_rss_mb']:.0f} MB; unpack "
                  f"{sm['unpack_s']:.2f} s ({sm['unpack_ratio']:.1f}x), peak RSS {sm['unpack_peak_rss_mb']:.0f} MB",
                  flush=True)
            big = (first * (4 * (1 << 20) // max(len(first), 1) + 1))[:4 << 20]
            js = res["jobs_strata"] = jobs_scaling(big, None, tmp)
            print(f"--jobs 2, strata, 4 x 1 MiB frames: {js['jobs1_s']:.1f} s -> {js['jobs2_s']:.1f} s "
                  f"({js['speedup']:.2f}x)", flush=True)
            kind0 = next(iter(res["kinds"]), None)
            if kind0:
                jb = res["jobs_braid"] = jobs_scaling(big[:2 << 20], os.path.join(a.models, f"{kind0}-braid.lcmodel"), tmp)
                print(f"--jobs 2, braid, 2 x 1 MiB frames: {jb['jobs1_s']:.1f} s -> {jb['jobs2_s']:.1f} s "
                      f"({jb['speedup']:.2f}x); peak RSS of the --jobs 1 pack {jb['jobs1_peak_rss_mb']:.0f} MB",
                      flush=True)
    targets = {}
    for kind, row in res["kinds"].items():
        b = row["braid"]
        targets[f"{kind}: braid decode >= 600 KB/s"] = b["decode_kb_s"] >= 600
        targets[f"{kind}: braid encode >= 800 KB/s"] = b["encode_kb_s"] >= 800
        targets[f"{kind}: braid decode <= 15x ppmd-o8"] = b["decode_x_ppmd"] <= 15
        if "braid_tree" in row:
            targets[f"{kind}: braid-tree decode >= 300 KB/s"] = row["braid_tree"]["decode_kb_s"] >= 300
    targets["strata >= 1.5 MB/s both ways"] = min(s["encode_kb_s"], s["decode_kb_s"]) >= 1500
    if "small_input" in res:
        sm = res["small_input"]
        targets["40 KB pack/unpack <= 2x import numpy, numba"] = max(sm["pack_ratio"], sm["unpack_ratio"]) <= 2
        targets["40 KB pack/unpack peak RSS <= 150 MB"] = max(sm["pack_peak_rss_mb"], sm["unpack_peak_rss_mb"]) <= 150
        targets["--jobs 2 >= 1.7x (strata)"] = res["jobs_strata"]["speedup"] >= 1.7
        if "jobs_braid" in res:
            targets["--jobs 2 >= 1.7x (braid)"] = res["jobs_braid"]["speedup"] >= 1.7
    res["targets"] = targets
    print("\ntargets:")
    for k, v in targets.items():
        print(f"  {'MET   ' if v else 'MISSED'} {k}")
    path = os.path.join(a.out, "speed.json")
    with open(path, "w") as f:
        json.dump(res, f, indent=2)
    print(f"\nwritten {path}; load average at start {res['load_average']:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
