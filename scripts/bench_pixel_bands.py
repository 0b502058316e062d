#!/usr/bin/env python3
"""Large images (1 megapixel or more) with a pixel model: decoding speed on 1 and 2 threads,
and what coding them in bands costs in size. Not a test: prints figures, writes JSON, marks
the target MET or MISSED (exit 0 either way, unless a file does not come back exactly).

    python scripts/bench_pixel_bands.py --model-dir DIR [--repeat 2] [--json FILE] [--keep DIR]

Target (issue 21, "Pixel models"): decoding at least 300,000 samples per second on 2 cores
for images of 1 megapixel or more, model load included once. Measured as a user meets it:
`lcodec unpack --threads N` of a one-image archive in a fresh process, wall time, start-up,
imports and model load included, best of --repeat runs (N = 2: the bands decode in forked
workers). Also `lcodec pack --jobs 1` against `--jobs 2` (a lone image's bands coded by 2
forked workers; the archives must be the same bytes), best of --repeat. Samples are rows x columns x
channels (a 16-bit sample counts once, though the model codes it as two symbols).

Images (open data shipped inside packages, no download):
  grey8      scikit-image's retina photograph (1411 x 1411), Pillow's "L" conversion, PGM;
  rgb8       the same photograph in colour (1411 x 1411 x 3), PPM;
  medical16  pydicom-data's MR2_UNCR.dcm (MR, 1024 x 1024, 12 bits stored), the DICOM file.
Models: DIR/same-grey8.lcmodel, same-rgb8.lcmodel and same-medical16.lcmodel (what
`scripts/bench_images.py --same-kind --keep DIR` trains). Decoding speed depends on the
network's shape and the model's stages, not on how long it trained.

Size cost of bands: the image's frame coded in one stream and in the bands the encoder
picks (lcodec.inputs.layout.choose_bands), with the same model, bytes of the frame payload.
Baseline in the same run: JPEG XL lossless, effort 9 (imagecodecs), its size and its
decoding time in this process (its own thread count).

The machine may be shared: the load average is printed before and after each run, and
figures taken under load are lower bounds.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np

ROOT = os.path.abspath(os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
sys.path.insert(0, ROOT)

TARGET = 300_000  # samples per second on 2 cores, start-up and model load included


def make_images(d: str) -> dict:
    import pydicom
    import skimage.data as skd
    from PIL import Image
    import data_store  # the pydicom-data wheel (bench extra)

    warnings.simplefilter("ignore")
    os.makedirs(d, exist_ok=True)
    ret = skd.retina()
    paths = {"grey8": os.path.join(d, "retina-grey.pgm"), "rgb8": os.path.join(d, "retina.ppm")}
    Image.fromarray(ret).convert("L").save(paths["grey8"])
    Image.fromarray(ret).save(paths["rgb8"])
    src = os.path.join(os.path.dirname(data_store.__file__), "data", "MR2_UNCR.dcm")
    paths["medical16"] = os.path.join(d, "MR2_UNCR.dcm")
    with open(src, "rb") as f, open(paths["medical16"], "wb") as g:
        g.write(f.read())
    assert pydicom.dcmread(paths["medical16"]).pixel_array.shape == (1024, 1024)
    return paths


def _lcodec(*args) -> float:
    t = time.perf_counter()
    subprocess.run([sys.executable, "-m", "lcodec", *args], check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t


def band_sizes(path: str, model: str) -> dict:
    """Frame payload bytes and sample NLL in one stream and in the encoder's bands."""
    from lcodec.frames.imageframe import encode_image_frame
    from lcodec.inputs.images import analyse
    from lcodec.inputs.layout import choose_bands, region_values, replication
    from lcodec.models import load_model

    m = load_model(model)
    raw = open(path, "rb").read()
    found = analyse(raw)
    lay = found.layout
    v = region_values(found.content, lay)
    fr, fc = replication(v)
    picked = choose_bands(v.shape[0] // fr, v.shape[1] // fc, v.shape[2])
    out = {"bands": picked}
    for n in sorted({1, picked}):
        t = time.process_time()
        pay, _, nll = encode_image_frame(m, found.content, lay, bands=n)
        out[f"bands_{n}"] = {"payload_bytes": len(pay), "sample_nll_bits": nll,
                             "encode_cpu_s": time.process_time() - t}
    return out


def jpegxl(path: str) -> dict:
    import imagecodecs
    import pydicom
    from PIL import Image

    a = pydicom.dcmread(path).pixel_array if path.endswith(".dcm") else np.asarray(Image.open(path))
    b = imagecodecs.jpegxl_encode(a, lossless=True, effort=9)
    best = None
    for _ in range(2):
        t = time.perf_counter()
        back = imagecodecs.jpegxl_decode(b)
        best = min(best or 1e9, time.perf_counter() - t)
    assert np.array_equal(back, a)
    return {"bytes": len(b), "decode_s": best, "samples": int(a.size)}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--model-dir", required=True, help="folder with same-grey8/rgb8/medical16.lcmodel")
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--kinds", default="grey8,rgb8,medical16")
    ap.add_argument("--json", default="bench-out/pixel-bands.json")
    ap.add_argument("--keep", default=None, help="keep the images and archives in this folder")
    args = ap.parse_args()
    work = args.keep or tempfile.mkdtemp(prefix="lcodec-bands-")
    paths = make_images(work)
    rows = {}
    for kind in args.kinds.split(","):
        model = os.path.join(args.model_dir, f"same-{kind}.lcmodel")
        src = paths[kind]
        arc = src + ".lcodec"
        row = {"image": os.path.basename(src), "model": model, "model_bytes": os.path.getsize(model),
               "load_before": os.getloadavg()}
        row.update(band_sizes(src, model))
        row["jpegxl"] = jpegxl(src)
        samples = row["jpegxl"]["samples"]
        for jobs in (1, 2):  # a lone image: --jobs 2 codes its bands in 2 forked workers
            out = arc if jobs == 1 else os.path.join(work, f"{kind}-jobs2.lcodec")
            row[f"pack_{jobs}_s"] = min(_lcodec("pack", src, "-o", out, "-m", model, "--force", "-q", "--jobs",
                                                str(jobs)) for _ in range(args.repeat))
        if open(arc, "rb").read() != open(os.path.join(work, f"{kind}-jobs2.lcodec"), "rb").read():
            print(f"{kind}: pack --jobs 2 wrote other bytes than --jobs 1", file=sys.stderr)
            return 1
        row["archive_bytes"] = os.path.getsize(arc)
        for threads in (1, 2):
            out = os.path.join(work, f"back-{kind}-{threads}")
            best = min(_lcodec("unpack", arc, "-o", out, "-m", model, "--threads", str(threads), "--force", "-q")
                       for _ in range(args.repeat))
            if open(out, "rb").read() != open(src, "rb").read():
                print(f"{kind}: unpack --threads {threads} did not give the file back", file=sys.stderr)
                return 1
            row[f"unpack_{threads}_s"] = best
            row[f"samples_per_s_{threads}"] = samples / best
        row["load_after"] = os.getloadavg()
        rows[kind] = row
        b1, bp = row["bands_1"]["payload_bytes"], row[f"bands_{row['bands']}"]["payload_bytes"]
        print(f"{kind:10s} {row['image']} {samples:,} samples | bands {row['bands']}: payload {bp:,} bytes, "
              f"x{bp / b1:.4f} one stream ({b1:,}) | archive {row['archive_bytes']:,} = "
              f"{8 * row['archive_bytes'] / samples:.3f} bits/sample, x{row['archive_bytes'] / row['jpegxl']['bytes']:.3f} "
              f"JPEG XL e9 ({row['jpegxl']['bytes']:,}) | unpack 1 thread {row['unpack_1_s']:.2f} s "
              f"({row['samples_per_s_1']:,.0f}/s), 2 threads {row['unpack_2_s']:.2f} s "
              f"({row['samples_per_s_2']:,.0f}/s), x{row['unpack_1_s'] / row['unpack_2_s']:.2f} | pack --jobs 1 "
              f"{row['pack_1_s']:.2f} s, --jobs 2 {row['pack_2_s']:.2f} s (same bytes), x{row['pack_1_s'] / row['pack_2_s']:.2f} | JPEG XL decode "
              f"{row['jpegxl']['decode_s']:.3f} s, lcodec 2 threads x{row['unpack_2_s'] / row['jpegxl']['decode_s']:.0f} | "
              f"model {row['model_bytes']:,} bytes | load {row['load_before'][0]:.2f} -> {row['load_after'][0]:.2f}")
    verdict = {k: ("MET" if r["samples_per_s_2"] >= TARGET else "MISSED") for k, r in rows.items()}
    print(f"target {TARGET:,} samples/s with 2 threads: " + ", ".join(f"{k} {v}" for k, v in verdict.items()))
    os.makedirs(os.path.dirname(os.path.abspath(args.json)), exist_ok=True)
    with open(args.json, "w") as f:
        json.dump({"rows": rows, "target": TARGET, "verdict": verdict}, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
