#!/usr/bin/env python3
"""The long coverage-guided fuzzing run: every target of fuzz/harness.py, up to a number
of executions or a time limit each, with its figures (executions, exec/s, coverage,
features, corpus, crashes and hangs) as JSON.

    python scripts/bench_fuzz.py [--runs 1000000] [--seconds 1200] [--targets a,b] [--json F]

Crashes and hangs are kept in bench-out/fuzz/TARGET/ (libFuzzer's crash-*, timeout-* and
oom-* files); each becomes a regression test in tests/test_fuzz_regressions.py after
minimising (`python fuzz/harness.py TARGET -minimize_crash=1 -runs=10000 FILE`). The
corpus each run grows is kept in bench-out/fuzz/TARGET/corpus, so a later run continues
from it. The short run in the test suite is tests/test_fuzz_smoke.py.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
HARNESS = os.path.join(ROOT, "fuzz", "harness.py")
TARGETS = ["descriptor", "images", "container", "modelfile", "salvage-scan", "salvage"]
MAX_LEN = {"modelfile": 1 << 15}  # inputs up to this long (the golden weft and tessel model files fit)
STATS = re.compile(r"#(\d+)\s+(?:DONE|pulse|NEW|REDUCE|INITED)\s+cov: (\d+) ft: (\d+) corp: (\d+)/\S+.*?exec/s: (\d+)")


def run_target(target: str, runs: int, seconds: int, out_dir: str, max_len: int = 4096) -> dict:
    work = os.path.join(out_dir, target)
    corpus = os.path.join(work, "corpus")
    os.makedirs(corpus, exist_ok=True)
    if not os.listdir(corpus):
        subprocess.run([sys.executable, HARNESS, "--seeds", target, corpus], check=True, capture_output=True)
    cmd = [sys.executable, HARNESS, target, f"-runs={runs}", f"-max_total_time={seconds}", f"-max_len={max_len}",
           "-timeout=10", "-rss_limit_mb=2048", f"-artifact_prefix={work}/", "-print_final_stats=1", corpus]
    t0 = time.perf_counter()
    p = subprocess.run(cmd, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    last = None
    for m in STATS.finditer(p.stderr):
        last = m
    found = sorted(f for f in os.listdir(work) if f.split("-")[0] in ("crash", "timeout", "oom", "leak"))
    rows = {"max_len": max_len}
    execs = int(last.group(1)) if last else 0
    final = re.search(r"stat::number_of_executed_units:\s*(\d+)", p.stderr)
    if final:
        execs = int(final.group(1))
    return {"target": target, "executions": execs, "seconds": round(wall, 1),
            "exec_per_s": round(execs / wall, 1) if wall else 0.0,
            "coverage_edges": int(last.group(2)) if last else 0, "features": int(last.group(3)) if last else 0,
            "corpus_inputs": int(last.group(4)) if last else 0,
            "crashes": sum(f.startswith(("crash", "oom", "leak")) for f in found),
            "hangs": sum(f.startswith("timeout") for f in found), "artifacts": found,
            "exit_code": p.returncode, "reached_runs": execs >= runs, **rows}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--runs", type=int, default=1_000_000)
    ap.add_argument("--seconds", type=int, default=1200, help="time limit per target")
    ap.add_argument("--targets", default=",".join(TARGETS))
    ap.add_argument("--out", default=os.path.join(ROOT, "bench-out", "fuzz"))
    ap.add_argument("--json", default=None)
    a = ap.parse_args()
    rows = []
    for t in a.targets.split(","):
        r = run_target(t, a.runs, a.seconds, a.out, MAX_LEN.get(t, 4096))
        rows.append(r)
        print(f"{t:11s} {r['executions']:>9,} executions in {r['seconds']:7.1f} s ({r['exec_per_s']:,.0f}/s), "
              f"coverage {r['coverage_edges']} edges / {r['features']} features, corpus {r['corpus_inputs']}, "
              f"crashes {r['crashes']}, hangs {r['hangs']}", flush=True)
    out = a.json or os.path.join(a.out, "fuzz.json")
    os.makedirs(os.path.dirname(out), exist_ok=True)
    with open(out, "w") as f:
        json.dump({"date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()), "rows": rows}, f, indent=2)
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
