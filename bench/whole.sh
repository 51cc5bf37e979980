#!/usr/bin/env bash
# Whole-process benchmark of tapmap against the scripts a user would write instead
# (bench/ref/). Makes a Python environment in target/bench-venv with NumPy, SciPy,
# Pillow and PyTorch, or reuses it when those import, then runs bench/whole.py with
# this script's arguments (--only a,c, --quick).
#
# tapmap itself is not built here: build it first (cargo build --release) or point
# TAPMAP at a binary. Environment: TAPMAP (default target/release/tapmap), RUNS
# (default 5), WORK (default target/bench-whole).
# PyTorch from the package registry brings several GB of GPU libraries; only its
# CPU side is used.
set -euo pipefail
cd "$(dirname "$0")/.."
VENV=target/bench-venv
if ! "$VENV/bin/python" -c "import numpy, scipy, PIL, torch" 2>/dev/null; then
  python3 -m venv "$VENV"
  "$VENV/bin/pip" install --quiet --disable-pip-version-check numpy scipy pillow torch
fi
exec "$VENV/bin/python" bench/whole.py "$@"
