#!/usr/bin/env bash
# Whole-process benchmark of apply --follow against a batch run of the same
# command: sustained rate for 5-megapixel 16-bit captures with the default
# outputs, and the lag p99 at half the batch rate (see bench/follow.py).
# Uses the Python environment of bench/whole.sh (NumPy and Pillow suffice here),
# or makes one with those two.
#
# tapmap itself is not built here: build it first (cargo build --release) or
# point TAPMAP at a binary. Environment: TAPMAP, RUNS (default 5), N, M, WORK.
set -euo pipefail
cd "$(dirname "$0")/.."
VENV=target/bench-venv
if ! "$VENV/bin/python" -c "import numpy, PIL" 2>/dev/null; then
  python3 -m venv "$VENV"
  "$VENV/bin/pip" install --quiet --disable-pip-version-check numpy pillow
fi
exec "$VENV/bin/python" bench/follow.py "$@"
