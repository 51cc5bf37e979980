#!/usr/bin/env bash
# Side-by-side comparison with NumPy/SciPy (and PyTorch on CPU with --torch).
# Builds tapmap, makes a Python environment in target/bench-venv, runs bench/compare.py.
# PyTorch from the package registry brings several GB of GPU libraries, so it is
# installed only when asked.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --example bench_workload --bin tapmap
# W7 reads peak memory with GNU time.
if [ ! -x /usr/bin/time ]; then
  apt-get install -y --no-install-recommends time || echo "GNU time missing: W7's peak memory cannot be read"
fi
python3 -m venv target/bench-venv
target/bench-venv/bin/pip install --quiet --disable-pip-version-check numpy scipy
if [ "${1:-}" = "--torch" ]; then
  target/bench-venv/bin/pip install --quiet --disable-pip-version-check torch
fi
target/bench-venv/bin/python bench/compare.py
