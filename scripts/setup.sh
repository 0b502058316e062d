#!/usr/bin/env bash
# Set up lcodec in ./.venv: the CPU build of torch first (pinned, so nothing pulls a
# multi-gigabyte GPU build), then lcodec with its bench, test, images and cluster extras
# (test holds every package the tests need; images: image readers and codecs; cluster:
# dask.distributed for --cluster).
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip >/dev/null 2>&1 || true
if [ "${LCODEC_NO_TORCH:-0}" != 1 ]; then
  .venv/bin/python -m pip install -q torch==2.13.0
fi
.venv/bin/python -m pip install -q -e '.[bench,test,images,cluster]'
echo "lcodec installed in $(pwd)/.venv ($(.venv/bin/lcodec --version))"
