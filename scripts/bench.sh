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
.venv/bin/python -m pytest -q -m slow || [ $? = 5 ]
