#!/usr/bin/env bash
# Set up (if needed) and run the test suite; fails when no test ran (pytest exit 5).
set -euo pipefail
cd "$(dirname "$0")/.."
[ -x .venv/bin/lcodec ] || bash scripts/setup.sh
set +e
.venv/bin/python -m pytest -q "$@"
rc=$?
set -e
if [ "$rc" = 5 ]; then
  echo "no tests were collected: failing" >&2
  exit 1
fi
exit "$rc"
