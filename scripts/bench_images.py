#!/usr/bin/env python3
"""The pixel model's targets (issue "Pixel models"), measured in one run.

Data (all shipped inside packages, no download):
  8-bit grey, train: scikit-image's brick, grass, gravel, cell, clock, microaneurysms,
      text, and grey versions (Pillow's "L" conversion) of astronaut, chelsea, coffee,
      immunohistochemistry;
  8-bit grey, test: camera, moon, coins, page (PGM files written from skimage.data);
  16-bit, train: pydicom's J2K_pixelrep_mismatch.dcm, JPEG2000.dcm and 693_J2KI.dcm,
      decoded with imagecodecs (the last two were lossy-compressed, so they are smoother
      than raw scans), saved as NPY;
  16-bit, test: pydicom's CT_small.dcm, MR_small.dcm (16 bits stored) and
      examples_overlay.dcm (12 bits stored), packed as the DICOM files they are.

Targets:
  8-bit grey test total <= 0.90 x JPEG XL lossless effort 9;
  16-bit medical test total smaller than JPEG-LS and JPEG 2000 reversible, like for
      like both ways: lcodec's samples against the bare codestreams, and lcodec's whole
      archives against the codestreams plus the files' other bytes (DICOM headers, which
      lcodec keeps byte-exact and the codestreams leave out) packed by xz -9e;
  decode >= 200,000 pixels per second on 2 cores (the 8-bit test archive, the faster of
      1 and 2 threads).

    python scripts/bench_images.py [--time-limit 600] [--model M] [--json bench-out/images.json]

With --held-out-regions, a second experiment (not the targets' setting): each test image
is cut at an even row near its middle; the top part joins the training set (with every
training image above) and the model is tested on the bottom parts alone, which every
codec also codes (the 16-bit parts as NPY files of the samples pydicom reads, no header).

Without --model it trains one (lcodec train --kind image on both training sets).
Timing figures are lower bounds when other work shares the machine: the load is printed.
"""
import argparse
import io
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))

import numpy as np  # noqa: E402

from lcodec import api
from lcodec.measure import imagebench as IB  # noqa: E402

TRAIN8 = ["brick", "grass", "gravel", "cell", "clock", "microaneurysms", "text"]
TRAIN8_COLOUR = ["astronaut", "chelsea", "coffee", "immunohistochemistry"]
TEST8 = ["camera", "moon", "coins", "page"]
TRAIN16 = ["J2K_pixelrep_mismatch.dcm", "JPEG2000.dcm", "693_J2KI.dcm"]
TEST16 = ["CT_small.dcm", "MR_small.dcm", "examples_overlay.dcm"]


def make_sets(root):
    import imagecodecs
    import pydicom
    import skimage.data as skd
    from PIL import Image
    from pydicom.data import get_testdata_file
    from pydicom.encaps import generate_frames

    warnings.simplefilter("ignore")
    dirs = {k: os.path.join(root, k) for k in ("train", "test8", "test16")}
    for d in dirs.values():
        os.makedirs(d, exist_ok=True)
    for n in TRAIN8:
        Image.fromarray(getattr(skd, n)()).save(os.path.join(dirs["train"], n + ".pgm"))
    for n in TRAIN8_COLOUR:
        Image.fromarray(getattr(skd, n)()).convert("L").save(os.path.join(dirs["train"], n + "_grey.pgm"))
    for n in TEST8:
        Image.fromarray(getattr(skd, n)()).save(os.path.join(dirs["test8"], n + ".pgm"))
    for n in TRAIN16:
        ds = pydicom.dcmread(get_testdata_file(n))
        a = imagecodecs.jpeg2k_decode(next(generate_frames(ds.PixelData, number_of_frames=1)))
        np.save(os.path.join(dirs["train"], n[:-4] + ".npy"), a)
    for n in TEST16:
        shutil.copy(get_testdata_file(n), os.path.join(dirs["test16"], n))
    return dirs


def make_region_sets(root):
    """Training images plus the top part of every test image; test sets of the bottom parts."""
    import pydicom
    import skimage.data as skd
    from PIL import Image

    base = make_sets(root)
    dirs = {k: os.path.join(root, "regions", k) for k in ("train", "test8", "test16")}
    for d in dirs.values():
        os.makedirs(d, exist_ok=True)
    for f in os.listdir(base["train"]):
        shutil.copy(os.path.join(base["train"], f), os.path.join(dirs["train"], f))

    def cut(a):
        return (a.shape[0] // 2) & ~1  # even: keeps 2x2 blocks whole

    for n in TEST8:
        a = getattr(skd, n)()
        h = cut(a)
        Image.fromarray(a[:h]).save(os.path.join(dirs["train"], n + "_top.pgm"))
        Image.fromarray(a[h:]).save(os.path.join(dirs["test8"], n + "_bottom.pgm"))
    for n in TEST16:
        a = pydicom.dcmread(os.path.join(base["test16"], n)).pixel_array
        h = cut(a)
        np.save(os.path.join(dirs["train"], n[:-4] + "_top.npy"), np.ascontiguousarray(a[:h]))
        np.save(os.path.join(dirs["test16"], n[:-4] + "_bottom.npy"), np.ascontiguousarray(a[h:]))
    return dirs


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--time-limit", type=float, default=600)
    ap.add_argument("--model", default=None, help="use this pixel model instead of training one")
    ap.add_argument("--json", default="bench-out/images.json")
    ap.add_argument("--keep", default=None, help="keep the data sets and the model in this folder")
    ap.add_argument("--held-out-regions", action="store_true",
                    help="train also on the top part of each test image, test on the bottom parts")
    args = ap.parse_args()
    root = args.keep or tempfile.mkdtemp(prefix="lcodec-images-")
    dirs = make_region_sets(root) if args.held_out_regions else make_sets(root)
    if args.held_out_regions:
        print("held-out regions: trained on the training images and the top part of each test image; "
              "tested on the bottom parts (not the targets' setting)")
    model = args.model
    if model is None:
        from lcodec.training.train import train_image
        model = os.path.join(root, "images-regions.lcmodel" if args.held_out_regions else "images.lcmodel")
        train_image([dirs["train"]], model, time_limit=args.time_limit, force=True)
    msize = os.path.getsize(model)
    load = os.getloadavg()
    out = {"model": os.path.abspath(model), "model_bytes": msize, "load_before": load}
    lines = []
    for key, d in (("grey8", dirs["test8"]), ("medical16", dirs["test16"])):
        rows = [IB.bench_file(f, model) for f in IB.image_files([d])]
        print(f"\n== {key}: {d}")
        for line in IB.format_rows(rows):
            print(line)
        out[key] = {"rows": rows, "totals": IB.totals(rows)}
    # decode speed: the 8-bit test images in one archive, decoded with 1 and 2 threads in a
    # fresh process, as `lcodec unpack` runs (model load included, interpreter start not).
    # In this process, after packing, a threaded decode was seen to collapse (docs/notes/model-tessel.md, "Decoding threads")
    blob, st = api.pack_paths([dirs["test8"]], model=model)
    n = sum(i["samples"] for i in st.images)
    arch = os.path.join(root, "test8.lcodec")
    with open(arch, "wb") as f:
        f.write(blob)
    probe = ("import sys, time, json; from lcodec import api; b = open(sys.argv[1], 'rb').read(); out = {}\n"
             "for w in (1, 2, 1, 2):\n"
             "    t0 = time.perf_counter(); api.decode(b, sys.argv[2], workers=w); dt = time.perf_counter() - t0\n"
             "    out[w] = min(out.get(w, dt), dt)\n"
             "print(json.dumps(out))")
    res = subprocess.run([sys.executable, "-c", probe, arch, model], capture_output=True, text=True, check=True,
                         env=dict(os.environ, PYTHONPATH=os.path.join(os.path.dirname(__file__), "..")))
    secs = {int(k): v for k, v in json.loads(res.stdout.strip().splitlines()[-1]).items()}
    speed = {w: n / v for w, v in secs.items()}
    # the target counts samples the model decodes: a block-replicated image's copies are
    # repeated, not decoded, so they are left out here (pixels written per second beside it)
    coded = 0
    for fr in api.info(blob)["frames"]:
        im = fr.get("image")
        if im and "rows" in im:
            rr, rc = im.get("replicated", [1, 1])
            coded += im["rows"] * im["columns"] * im["channels"] // (rr * rc)
    out["decode_pixels_per_s"] = speed
    out["decode_coded_samples_per_s"] = coded_speed = {w: coded / v for w, v in secs.items()}
    out["load_after"] = os.getloadavg()
    t8, t16 = out["grey8"]["totals"], out["medical16"]["totals"]
    r8 = t8["lcodec"] / t8["jpegxl"]
    lines.append(f"{'MET' if r8 <= 0.90 else 'MISSED'}: 8-bit grey total {t8['lcodec']:.3f} bits per sub-pixel = "
                 f"{r8:.3f} x JPEG XL effort 9 ({t8['jpegxl']:.3f}); target <= 0.90 (model file {msize:,} bytes)")
    for c in ("jpegls", "jpeg2000"):
        # like for like, twice: lcodec's samples against the codec's bare codestreams, and
        # lcodec's whole archives (every byte of the files) against the codestreams plus the
        # files' other bytes (the DICOM headers) packed by xz -9e; "smaller" must hold for both
        px, whole = t16["lcodec_pixels"] / t16[c], t16["lcodec"] / t16[c + "+xz_side"]
        ok = px < 1 and whole < 1
        lines.append(f"{'MET' if ok else 'MISSED'}: 16-bit medical total vs {c}: samples {t16['lcodec_pixels']:.3f} vs "
                     f"{t16[c]:.3f} = {px:.3f} x; whole files {t16['lcodec']:.3f} (lcodec's archives) vs "
                     f"{t16[c + '+xz_side']:.3f} (codestreams + the other bytes under xz -9e) = {whole:.3f} x; "
                     f"whole archives vs bare codestreams {t16['lcodec'] / t16[c]:.3f} x; target < 1 on both "
                     f"like-for-like figures (model file {msize:,} bytes)")
    best = max(coded_speed.values())
    lines.append(f"{'MET' if best >= 200_000 else 'MISSED'}: decode {best:,.0f} samples/s through the model, the faster "
                 f"of 2 threads ({coded_speed[2]:,.0f}) and 1 ({coded_speed[1]:,.0f}); {max(speed.values()):,.0f} pixels "
                 f"written/s (replicated images' copies are repeated, not decoded); target >= 200,000 on 2 cores "
                 f"(load {load[0]:.1f} before, {out['load_after'][0]:.1f} after: a lower bound when the machine is shared)")
    # the speed issue's pixel target: 600,000 samples/s decoding with 2 threads
    lines.append(f"{'MET' if coded_speed[2] >= 600_000 else 'MISSED'}: decode {coded_speed[2]:,.0f} samples/s with 2 threads; "
                 f"speed issue's target >= 600,000")
    if args.held_out_regions:
        lines = ["[held-out regions, not the targets' setting] " + x for x in lines]
    print()
    for line in lines:
        print(line)
    out["targets"] = lines
    if args.json:
        os.makedirs(os.path.dirname(os.path.abspath(args.json)), exist_ok=True)
        with open(args.json, "w") as f:
            json.dump(out, f, indent=1)
        print(f"\nwrote {args.json}")


if __name__ == "__main__":
    main()
