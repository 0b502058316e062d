#!/usr/bin/env bash
# Set up (if needed) and run the main job on the bundled demo corpus.
set -euo pipefail
cd "$(dirname "$0")/.."
[ -x .venv/bin/lcodec ] || bash scripts/setup.sh
exec .venv/bin/lcodec demo "$@"
