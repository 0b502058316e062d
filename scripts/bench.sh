#!/usr/bin/env bash
# The project's size and speed targets (figures, MET/MISSED) plus the slow tests.
set -euo pipefail
cd "$(dirname "$0")/.."
[ -x .venv/bin/lcodec ] || bash scripts/setup.sh
.venv/bin/python scripts/bench_targets.py --out bench-out "$@"
# the learned model's targets: three kinds of real files, one large file, ablation, presets
# (trains five braid models: about an hour on 2 cores)
.venv/bin/python scripts/bench_braid.py --out bench-out
# the neural model alone (weft, hashed contexts) on the standard library: trains 480 s
.venv/bin/python scripts/bench_weft.py --out bench-out --time-limit 480
# hostile inputs: a 64 MiB claim refused within 5 s, crafted archives and model files within
# 2x the memory of honest ones (bench-out/hostile.json)
.venv/bin/python scripts/bench_hostile.py --mib 4 --json bench-out/hostile.json
# the long coverage-guided fuzzing run: up to 1,000,000 executions or 20 minutes per parser
# (bench-out/fuzz/fuzz.json; crashes and hangs kept there, each to become a regression test)
.venv/bin/python scripts/bench_fuzz.py --runs 1000000 --seconds 1200 --out bench-out/fuzz
.venv/bin/python -m pytest -q -m slow || [ $? = 5 ]
