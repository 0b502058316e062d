#!/usr/bin/env python3
"""Scale targets, measured on this machine. Not a test: prints figures, writes JSON, and
marks each target MET or MISSED (exit 0 either way, unless an archive differs or fails
to round-trip).

    python scripts/bench_scale.py [--throughput-mib 16] [--rss-mib 64,512] [--rss-jobs 1]
                                  [--json FILE] [--skip-rss] [--skip-throughput] [--verify-rss]

Targets (issue "Scale"):
  * `--jobs 2` packs at least 1.7 x as fast as `--jobs 1` on 2 cores (same input, same
    archive bytes: checked);
  * peak RSS packing 512 MiB is at most 1.2 x peak RSS packing 64 MiB (streaming: memory
    does not grow with the input beyond the frame buffers and the model).

Input: the Python standard library's own .py files, concatenated in a shuffled order per
pass, each pass with a line of its own before every file (so passes differ), repeated
until the size is reached; written to a temporary folder and deleted afterwards.
Every run is `python -m lcodec pack FILE -o OUT --jobs N -q` in a child process; its
peak RSS is the child's own (os.wait4's ru_maxrss, which covers the waited-for
children too: the largest single process), and, sampled every 0.2 s with psutil, the
peak of the sum over the child and its worker processes. The machine is shared: the
load average (os.getloadavg) is recorded before and after each run, and figures taken
under load are lower bounds for speed.
"""
from __future__ import annotations

import argparse
import json
import os
import random
import shutil
import subprocess
import sys
import sysconfig
import tempfile
import time

ROOT = os.path.abspath(os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
MIB = 1 << 20


def make_input(path: str, size: int, seed: int = 0) -> None:
    """Realistic text: the standard library's .py files, shuffled and marked per pass."""
    lib = sysconfig.get_paths()["stdlib"]
    files = []
    for dp, dns, fns in os.walk(lib):
        dns[:] = sorted(d for d in dns if d not in ("site-packages", "__pycache__", "test", "tests"))
        files += [os.path.join(dp, f) for f in sorted(fns) if f.endswith(".py")]
    rng = random.Random(seed)
    written, npass = 0, 0
    with open(path, "wb") as out:
        while written < size:
            order = files[:]
            rng.shuffle(order)
            for p in order:
                try:
                    with open(p, "rb") as f:
                        data = f.read()
                except OSError:
                    continue
                head = f"# archive pass {npass}, station copy {rng.randrange(10**6):06d}: {os.path.relpath(p, lib)}\n".encode()
                chunk = (head + data)[: size - written]
                out.write(chunk)
                written += len(chunk)
                if written >= size:
                    break
            npass += 1


def run_pack(src: str, out: str, jobs: int) -> dict:
    """One `lcodec pack` in a child process: wall time, peak RSS (own and tree), load."""
    try:
        import psutil
    except ImportError:
        psutil = None
    env = dict(os.environ, PYTHONPATH=ROOT, NUMBA_NUM_THREADS="1", OMP_NUM_THREADS="1")
    load0 = os.getloadavg()
    t0 = time.perf_counter()
    p = subprocess.Popen([sys.executable, "-m", "lcodec", "pack", src, "-o", out, "--jobs", str(jobs), "-q",
                          "--force"], env=env)
    tree_peak, cpu = 0, {}
    proc = psutil.Process(p.pid) if psutil else None
    while True:
        pid, status, ru = os.wait4(p.pid, os.WNOHANG)
        if pid:
            break
        if proc is not None:
            try:
                procs = [proc] + proc.children(recursive=True)
                rss = 0
                for q in procs:
                    try:
                        rss += q.memory_info().rss
                        t = q.cpu_times()
                        cpu[q.pid] = t.user + t.system
                    except (psutil.NoSuchProcess, psutil.AccessDenied):
                        pass
                tree_peak = max(tree_peak, rss)
            except (psutil.NoSuchProcess, psutil.AccessDenied):
                pass
        time.sleep(0.2)
    wall = time.perf_counter() - t0
    p.returncode = os.waitstatus_to_exitcode(status)
    if p.returncode != 0:
        raise SystemExit(f"lcodec pack --jobs {jobs} failed (exit {p.returncode})")
    return {"jobs": jobs, "seconds": wall, "bytes_in": os.path.getsize(src), "bytes_out": os.path.getsize(out),
            "mb_per_s": os.path.getsize(src) / wall / 1e6, "peak_rss_mib": ru.ru_maxrss / 1024,
            "peak_tree_rss_mib": tree_peak / MIB if psutil else None,
            # CPU seconds of the child and its workers (sampled every 0.2 s: a lower bound)
            "cpu_s": max(sum(cpu.values()), ru.ru_utime + ru.ru_stime) if psutil else ru.ru_utime + ru.ru_stime,
            "load_before": load0, "load_after": os.getloadavg()}


def check_round_trip(archive: str, src: str) -> None:
    env = dict(os.environ, PYTHONPATH=ROOT, NUMBA_NUM_THREADS="1", OMP_NUM_THREADS="1")
    r = subprocess.run([sys.executable, "-m", "lcodec", "verify", archive, "--against", src, "--jobs", "2", "-q"],
                       env=env, capture_output=True)
    if r.returncode != 0:
        raise SystemExit(f"verify failed: {r.stderr.decode()}")


def uptime() -> str:
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip()
    except OSError:
        return "load %.2f %.2f %.2f" % os.getloadavg()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--throughput-mib", type=float, default=16)
    ap.add_argument("--rss-mib", default="64,512", help="two sizes in MiB: small,large")
    ap.add_argument("--rss-jobs", type=int, default=1, help="--jobs for the memory runs")
    ap.add_argument("--skip-rss", action="store_true")
    ap.add_argument("--verify-rss", action="store_true",
                    help="also verify the memory runs' archives against their inputs (as long again as packing)")
    ap.add_argument("--skip-throughput", action="store_true")
    ap.add_argument("--json", default=None, help="write the figures here")
    ap.add_argument("--workdir", default=None, help="where the generated inputs go (a temporary folder by default)")
    a = ap.parse_args()
    res = {"uptime_start": uptime(), "cores": os.cpu_count()}
    print(f"uptime at start: {res['uptime_start']}", flush=True)
    work = tempfile.mkdtemp(prefix="lcodec-scale-", dir=a.workdir)
    try:
        if not a.skip_throughput:
            src = os.path.join(work, "tp.txt")
            make_input(src, int(a.throughput_mib * MIB))
            one = run_pack(src, os.path.join(work, "tp1.lcodec"), 1)
            two = run_pack(src, os.path.join(work, "tp2.lcodec"), 2)
            same = open(os.path.join(work, "tp1.lcodec"), "rb").read() == open(os.path.join(work, "tp2.lcodec"), "rb").read()
            if not same:
                print("FAILED: --jobs 2 archive differs from --jobs 1", flush=True)
                return 1
            check_round_trip(os.path.join(work, "tp2.lcodec"), src)
            ratio = two["mb_per_s"] / one["mb_per_s"]
            # What two idle cores would give if the work spread evenly: the ratio of CPU work,
            # 2 x (jobs-1 CPU s) / (jobs-2 CPU s). An estimate, not a measured speed.
            idle = 2 * one["cpu_s"] / two["cpu_s"] if two["cpu_s"] else None
            res["throughput"] = {"jobs1": one, "jobs2": two, "ratio": ratio, "identical": same,
                                 "target": 1.7, "met": ratio >= 1.7, "cpu_ratio_2_over_1": two["cpu_s"] / one["cpu_s"],
                                 "estimate_on_idle_cores": idle}
            for r in (one, two):
                print(f"--jobs {r['jobs']}: {r['bytes_in'] / MIB:.0f} MiB in {r['seconds']:.1f} s = "
                      f"{r['mb_per_s']:.3f} MB/s, {8 * r['bytes_out'] / r['bytes_in']:.3f} bits per byte, "
                      f"{r['cpu_s']:.1f} CPU s; load "
                      f"{r['load_before'][0]:.2f} -> {r['load_after'][0]:.2f}", flush=True)
            print(f"target: --jobs 2 at least 1.7 x --jobs 1: {'MET' if ratio >= 1.7 else 'MISSED'} "
                  f"(x{ratio:.2f}; archives identical)", flush=True)
            print(f"  CPU seconds, --jobs 2 / --jobs 1: {two['cpu_s'] / one['cpu_s']:.3f} (parallel overhead); "
                  f"estimate for 2 idle cores (2 x jobs-1 CPU / jobs-2 CPU): x{idle:.2f}", flush=True)
        if not a.skip_rss:
            small, large = (float(x) for x in a.rss_mib.split(","))
            runs = []
            for size in (small, large):
                src = os.path.join(work, f"rss-{size:g}.txt")
                make_input(src, int(size * MIB), seed=1)
                r = run_pack(src, os.path.join(work, f"rss-{size:g}.lcodec"), a.rss_jobs)
                if a.verify_rss:
                    check_round_trip(os.path.join(work, f"rss-{size:g}.lcodec"), src)
                os.unlink(src)
                os.unlink(os.path.join(work, f"rss-{size:g}.lcodec"))
                r["mib"] = size
                runs.append(r)
                tree = f", tree {r['peak_tree_rss_mib']:.0f} MiB" if r["peak_tree_rss_mib"] else ""
                print(f"pack {size:g} MiB --jobs {a.rss_jobs}: peak RSS {r['peak_rss_mib']:.0f} MiB{tree}, "
                      f"{r['seconds']:.0f} s ({r['mb_per_s']:.3f} MB/s); load {r['load_before'][0]:.2f} -> "
                      f"{r['load_after'][0]:.2f}", flush=True)
            ratio = runs[1]["peak_rss_mib"] / runs[0]["peak_rss_mib"]
            tratio = (runs[1]["peak_tree_rss_mib"] / runs[0]["peak_tree_rss_mib"]
                      if runs[0]["peak_tree_rss_mib"] else None)
            # with worker processes the figure that counts is the whole tree's (parent + workers)
            judged = tratio if (a.rss_jobs > 1 and tratio) else ratio
            res["rss"] = {"runs": runs, "ratio": ratio, "tree_ratio": tratio, "target": 1.2, "met": judged <= 1.2,
                          "judged_on": "process tree" if judged is tratio else "the lcodec process"}
            print(f"target: peak RSS {large:g} MiB at most 1.2 x {small:g} MiB: {'MET' if judged <= 1.2 else 'MISSED'} "
                  f"(lcodec process x{ratio:.3f}" + (f"; process tree x{tratio:.3f})" if tratio else ")"), flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    res["uptime_end"] = uptime()
    print(f"uptime at end: {res['uptime_end']}", flush=True)
    if a.json:
        with open(a.json, "w") as f:
            json.dump(res, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
