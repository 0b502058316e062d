#!/usr/bin/env python3
"""Pixel models on the one pipeline, measured: `--jobs 2` against `--jobs 1` on an image
corpus. Not a test: prints figures, writes JSON, marks the target MET or MISSED (exit 0
either way, unless an archive differs between runners or a file does not come back).

    python scripts/bench_pixel_jobs.py [--model FILE] [--mib 8] [--repeat 2] [--json FILE] [--keep DIR]

Target (issue 19, "One frame pipeline"): on an image corpus of at least 8 MB, `lcodec
unpack --jobs 2` is at least 1.6 x as fast as `--jobs 1` (wall time of the command,
start-up included), and `pack --jobs 2` writes the same archive bytes as `--jobs 1`.

Corpus: 8-bit grey PGM files of 512 x 512 samples cut from scikit-image's bundled sample
images (open data that the package ships), each cut at its own offset and flipped or
transposed in turn so that no two files are the same; written to a temporary folder.
Model: a pixel model file (default: the committed tiny golden model
tests/golden/tessel-tiny-structure.lcmodel; a trained model is larger and slower per
sample, so its coding dominates start-up even more). Every run is `python -m lcodec ...`
in a child process. The machine may be shared: the load average (os.getloadavg) is
recorded before and after each run, figures taken under load are lower bounds, and the
CPU seconds of each run (all its processes, sampled with psutil) give the ceiling two
free cores would allow (CPU of --jobs 1 / half the CPU of --jobs 2).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np

ROOT = os.path.abspath(os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
DEFAULT_MODEL = os.path.join(ROOT, "tests", "golden", "tessel-tiny-structure.lcmodel")
SIDE = 512
SAMPLES = ("camera", "moon", "page", "text", "coins", "brick", "grass", "gravel", "horse", "clock")
TARGET = 1.6


def grey_sources() -> list:
    import skimage.data as data

    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name in SAMPLES:
            try:
                a = np.asarray(getattr(data, name)())
            except Exception:  # a sample that needs a download, or is missing in this version
                continue
            if a.ndim == 3:
                a = a[..., :3].mean(axis=2)
            if a.dtype == bool:
                a = a.astype(np.uint8) * 255
            a = np.clip(a, 0, 255).astype(np.uint8)
            if min(a.shape) >= 128:
                out.append((name, a))
    if not out:
        raise SystemExit("no scikit-image sample images found (pip install -e .[images])")
    return out


def make_corpus(folder: str, size: int) -> int:
    """PGM files of SIDE x SIDE samples until `size` bytes are written; returns the count."""
    os.makedirs(folder, exist_ok=True)
    sources = grey_sources()
    written, i = 0, 0
    while written < size:
        name, a = sources[i % len(sources)]
        turn = i // len(sources)
        b = np.tile(a, (-(-SIDE // a.shape[0]) + 1, -(-SIDE // a.shape[1]) + 1))
        r0, c0 = (37 * turn) % a.shape[0], (53 * turn) % a.shape[1]
        b = b[r0:r0 + SIDE, c0:c0 + SIDE]
        b = [b, b[::-1], b[:, ::-1], b.T][turn % 4]
        data = b"P5\n%d %d\n255\n" % (SIDE, SIDE) + np.ascontiguousarray(b).tobytes()
        with open(os.path.join(folder, f"plate-{i:03d}-{name}.pgm"), "wb") as f:
            f.write(data)
        written += len(data)
        i += 1
    return i


def run(args: list, label: str) -> dict:
    """One `python -m lcodec ...`: wall seconds, and the CPU seconds of it and every process
    it started (sampled every 0.1 s with psutil, when installed: worker processes are
    children of the pool's server process, which os.wait4 does not see)."""
    try:
        import psutil
    except ImportError:
        psutil = None
    load0 = os.getloadavg()[0]
    t0 = time.perf_counter()
    cmd = [sys.executable, "-m", "lcodec", *args]
    cpu = {}
    if psutil is None:
        r = subprocess.run(cmd, capture_output=True, text=True)
        rc, err = r.returncode, r.stderr
    else:
        p = psutil.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        while p.poll() is None:
            try:
                procs = [p] + p.children(recursive=True)
            except psutil.Error:
                procs = []
            for q in procs:
                try:
                    t = q.cpu_times()
                    cpu[q.pid] = t.user + t.system
                except psutil.Error:
                    pass
            time.sleep(0.1)
        rc, err = p.returncode, p.stderr.read()
    dt = time.perf_counter() - t0
    if rc != 0:
        raise SystemExit(f"{label} failed ({rc}): {err}")
    res = {"label": label, "seconds": round(dt, 3), "cpu_seconds": round(sum(cpu.values()), 3) if cpu else None,
           "processes": len(cpu) or None, "load_before": load0, "load_after": os.getloadavg()[0]}
    extra = f", CPU {res['cpu_seconds']:.2f} s in {len(cpu)} processes" if cpu else ""
    print(f"  {label}: {dt:.2f} s{extra} (load {load0:.2f} -> {res['load_after']:.2f})", flush=True)
    return res


def same_tree(a: str, b: str) -> bool:
    for name in sorted(os.listdir(a)):
        with open(os.path.join(a, name), "rb") as f, open(os.path.join(b, name), "rb") as g:
            if f.read() != g.read():
                return False
    return True


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--model", default=DEFAULT_MODEL, help="a pixel model file")
    ap.add_argument("--mib", type=float, default=8.0, help="corpus size in MiB (at least 8 MB for the target)")
    ap.add_argument("--repeat", type=int, default=2, help="decodes per setting; the fastest counts")
    ap.add_argument("--json", default=os.path.join("bench-out", "pixel-jobs.json"))
    ap.add_argument("--keep", default=None, help="keep the corpus and archives in this folder")
    a = ap.parse_args(argv)
    work = a.keep or tempfile.mkdtemp(prefix="lcodec-pixel-jobs-")
    try:
        corpus = os.path.join(work, "plates")
        n = make_corpus(corpus, int(a.mib * (1 << 20)))
        size = sum(os.path.getsize(os.path.join(corpus, f)) for f in os.listdir(corpus))
        print(f"corpus: {n} PGM files, {size:,} bytes; model {a.model}", flush=True)
        packs = {}
        for jobs in (1, 2):
            out = os.path.join(work, f"plates-j{jobs}.lcodec")
            packs[jobs] = run(["pack", corpus, "-o", out, "-m", a.model, "--jobs", str(jobs), "--force", "-q"],
                              f"pack --jobs {jobs}")
        with open(os.path.join(work, "plates-j1.lcodec"), "rb") as f, \
                open(os.path.join(work, "plates-j2.lcodec"), "rb") as g:
            identical = f.read() == g.read()
        if not identical:
            print("ARCHIVES DIFFER between --jobs 1 and --jobs 2", file=sys.stderr)
            return 1
        arch = os.path.join(work, "plates-j1.lcodec")
        decodes = {1: [], 2: []}
        for rep in range(a.repeat):
            for jobs in (1, 2):
                out = os.path.join(work, f"out-j{jobs}")
                shutil.rmtree(out, ignore_errors=True)
                decodes[jobs].append(run(["unpack", arch, "-o", out, "-m", a.model, "--jobs", str(jobs), "-q"],
                                         f"unpack --jobs {jobs} (run {rep + 1})"))
                if not same_tree(corpus, os.path.join(out, "plates")):
                    print(f"unpack --jobs {jobs} did not give the originals back", file=sys.stderr)
                    return 1
        best = {j: min(r["seconds"] for r in decodes[j]) for j in (1, 2)}
        ratio = best[1] / best[2]
        cpus = {j: [r["cpu_seconds"] for r in decodes[j] if r["cpu_seconds"]] for j in (1, 2)}
        ceiling = None
        if cpus[1] and cpus[2]:  # what two free cores would give: the work of --jobs 2 split in two
            ceiling = min(cpus[1]) / (min(cpus[2]) / 2)
            print(f"CPU: --jobs 1 {min(cpus[1]):.2f} s, --jobs 2 {min(cpus[2]):.2f} s in all its processes; "
                  f"on two free cores that is x{ceiling:.2f} at most", flush=True)
        met = ratio >= TARGET and size >= 8_000_000
        print(f"unpack: --jobs 1 {best[1]:.2f} s ({size / best[1] / 1e6:.3f} MB/s), --jobs 2 {best[2]:.2f} s "
              f"({size / best[2] / 1e6:.3f} MB/s): x{ratio:.2f} (target x{TARGET}) {'MET' if met else 'MISSED'}; "
              f"archive {os.path.getsize(arch):,} bytes, identical from --jobs 1 and 2", flush=True)
        result = {"corpus_files": n, "corpus_bytes": size, "model": os.path.basename(a.model),
                  "archive_bytes": os.path.getsize(arch), "identical_archives": identical,
                  "pack": packs, "unpack": decodes, "best_unpack_s": best, "speedup": round(ratio, 3),
                  "cpu_bound_ceiling": None if ceiling is None else round(ceiling, 3),
                  "target": TARGET, "met": met, "cores": os.cpu_count()}
        os.makedirs(os.path.dirname(os.path.abspath(a.json)), exist_ok=True)
        with open(a.json, "w") as f:
            json.dump(result, f, indent=1)
        return 0
    finally:
        if a.keep is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
