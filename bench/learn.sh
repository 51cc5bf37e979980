#!/usr/bin/env bash
# Whole-process benchmark of `tapmap bank learn` against the script a user would
# write instead (bench/learn_reference.py: NumPy + Pillow + scikit-learn, 2 threads).
#
# Builds tapmap (cargo build --release), makes or reuses a Python environment in
# target/bench-venv with NumPy, Pillow and scikit-learn, makes once (cached under
# WORK) 24 textured 16-bit grey PNG captures of 1024×1024, then times whole
# processes, paired: tapmap then the reference, RUNS times each (after one warm-up
# run of each, whose printed objectives are shown beside the times so that a fast
# wrong answer shows), 200,000 patches of 7×7 from 12 images:
#   lloyd    tapmap --method lloyd (Euclidean k-means, k-means++ starts), 64 clusters,
#            20 updates, tolerance 0   vs  ZCA + sklearn KMeans(lloyd, 20 iterations, tol 0)
#   kmeans   tapmap --method kmeans (spherical), the same count and updates, vs the same
#            reference (a different algorithm, not a like-for-like pairing)
#   pca      tapmap --method pca --count 49  vs  sklearn PCA(49)
# and then the peak memory of both at 50,000 and 200,000 patches from 12 and 24
# images (lloyd, 64 clusters, 5 updates): the sample is held, the images are not.
#
# Wall time is read around each process (date +%s%N), peak memory is GNU time's
# maximum resident set (the largest single process). Quoted: the median of each
# side, and the median (min–max) of the per-pair ratios reference / tapmap
# (above 1: tapmap faster).
# Environment: RUNS (default 5), MEM_RUNS (default 3), WORK (default target/bench-learn).
set -euo pipefail
cd "$(dirname "$0")/.."
RUNS=${RUNS:-5}
MEM_RUNS=${MEM_RUNS:-3}
WORK=${WORK:-target/bench-learn}
VENV=target/bench-venv
PY=$VENV/bin/python
TAPMAP=./target/release/tapmap
INPUTS_VERSION=1   # bump when the generator below changes

cargo build --release
if [ ! -x /usr/bin/time ]; then
  apt-get install -y --no-install-recommends time || { echo "GNU time (/usr/bin/time) is needed for peak memory"; exit 1; }
fi
if ! "$PY" -c "import numpy, PIL" 2>/dev/null; then
  python3 -m venv "$VENV"
  "$VENV/bin/pip" install --quiet --disable-pip-version-check numpy pillow
fi
if ! "$PY" -c "import sklearn" 2>/dev/null; then
  "$VENV/bin/pip" install --quiet --disable-pip-version-check scikit-learn
fi

# ---------------------------------------------------------------------------
# Inputs: 24 captures in WORK/pool; WORK/inputs holds the first 12 (hard links),
# WORK/inputs-24 all of them.
# ---------------------------------------------------------------------------
mkdir -p "$WORK"
if [ "$(cat "$WORK/inputs.version" 2>/dev/null)" != "$INPUTS_VERSION" ]; then
  rm -rf "$WORK/pool" "$WORK/inputs" "$WORK/inputs-24"
  echo "making 24 captures of 1024×1024 in $WORK/pool"
  "$PY" - "$WORK/pool" <<'EOF'
"""Invented captures of a machined, scratched surface as 16-bit grey: a smooth
shading with a low-frequency mottle, a few flat-topped regions with sharp edges
(polygons, one or two steps up or down), long straight and curved scratches of
1-3 pixels, small pits, a fine directional grain, and sensor noise."""
import os
import sys

import numpy as np
from PIL import Image, ImageDraw

folder = sys.argv[1]
os.makedirs(folder, exist_ok=True)
H = W = 1024
for i in range(24):
    rng = np.random.default_rng(20261207 + i)
    y = np.linspace(-1, 1, H)[:, None]
    x = np.linspace(-1, 1, W)[None, :]
    img = 30000 - 6000 * ((x - rng.uniform(-.4, .4)) ** 2 + (y - rng.uniform(-.4, .4)) ** 2)
    # Mottle: white noise blurred in the frequency domain.
    f = np.fft.rfft2(rng.standard_normal((H, W)))
    fy = np.fft.fftfreq(H)[:, None]
    fx = np.fft.rfftfreq(W)[None, :]
    f *= np.exp(-(fx ** 2 + fy ** 2) / (2 * 0.01 ** 2))
    mottle = np.fft.irfft2(f, s=(H, W))
    img += 1500 * mottle / mottle.std()
    # Grain: a fine stripe pattern along one direction, its phase wandering.
    a = rng.uniform(0, np.pi)
    u = np.cos(a) * np.arange(W)[None, :] + np.sin(a) * np.arange(H)[:, None]
    img += 400 * np.sin(2 * np.pi * u / rng.uniform(3, 9) + 2 * mottle / mottle.std())
    # Regions with sharp edges.
    steps = Image.new("L", (W, H), 128)
    d = ImageDraw.Draw(steps)
    for _ in range(int(rng.integers(3, 7))):
        cx, cy, r = rng.uniform(0, W), rng.uniform(0, H), rng.uniform(40, 220)
        n = int(rng.integers(3, 8))
        t = np.sort(rng.uniform(0, 2 * np.pi, n))
        pts = [(cx + r * np.cos(v), cy + r * np.sin(v)) for v in t]
        d.polygon(pts, fill=int(rng.choice([60, 96, 160, 200])))
    img += (np.asarray(steps, dtype=np.float64) - 128) * 60
    # Scratches (dark) and pits, drawn into a mask.
    mask = Image.new("L", (W, H), 0)
    d = ImageDraw.Draw(mask)
    for _ in range(int(rng.integers(15, 40))):
        px, py = rng.uniform(0, W), rng.uniform(0, H)
        ang, bend = rng.uniform(0, 2 * np.pi), rng.normal(0, 0.02)
        pts = [(px, py)]
        for _ in range(int(rng.integers(10, 80))):
            ang += bend + rng.normal(0, 0.01)
            px, py = px + 6 * np.cos(ang), py + 6 * np.sin(ang)
            pts.append((px, py))
        d.line(pts, fill=int(rng.integers(80, 256)), width=int(rng.integers(1, 4)))
    for _ in range(int(rng.integers(20, 80))):
        px, py, r = rng.uniform(0, W), rng.uniform(0, H), rng.uniform(1, 4)
        d.ellipse([px - r, py - r, px + r, py + r], fill=int(rng.integers(100, 256)))
    img -= np.asarray(mask, dtype=np.float64) * (12000 / 255)
    img += rng.normal(0, 300, (H, W))
    a16 = np.clip(np.rint(img), 0, 65535).astype(np.uint16)
    im = Image.fromarray(a16)
    assert im.mode == "I;16", im.mode
    im.save(os.path.join(folder, "cap-%02d.png" % i))
EOF
  mkdir -p "$WORK/inputs" "$WORK/inputs-24"
  for i in $(seq -w 0 23); do
    ln "$WORK/pool/cap-$i.png" "$WORK/inputs-24/cap-$i.png" 2>/dev/null || cp "$WORK/pool/cap-$i.png" "$WORK/inputs-24/"
    if [ "$i" -lt 12 ]; then
      ln "$WORK/pool/cap-$i.png" "$WORK/inputs/cap-$i.png" 2>/dev/null || cp "$WORK/pool/cap-$i.png" "$WORK/inputs/"
    fi
  done
  echo "$INPUTS_VERSION" > "$WORK/inputs.version"
fi

# ---------------------------------------------------------------------------
# Timing.
# ---------------------------------------------------------------------------
T="$WORK/times"
L="$WORK/logs"
rm -rf "$T" "$L" "$WORK/out"
mkdir -p "$T" "$L" "$WORK/out"

# run_one FILE LOG CMD...: runs CMD once, appends "wall_seconds peak_kib" to FILE.
run_one() {
  local file=$1 log=$2
  shift 2
  local t0 t1
  t0=$(date +%s%N)
  if ! /usr/bin/time -f '%M' -o "$WORK/rss.tmp" "$@" >>"$log" 2>&1; then
    echo "failed: $* (see $log):"
    tail -3 "$log"
    exit 1
  fi
  t1=$(date +%s%N)
  printf '%d.%06d %s\n' $(( (t1 - t0) / 1000000000 )) $(( (t1 - t0) / 1000 % 1000000 )) "$(tail -1 "$WORK/rss.tmp")" >>"$file"
}

# pair ID: the arrays A (tapmap) and B (reference), one warm-up each, then RUNS pairs A B.
pair() {
  local id=$1 r
  echo "== $id: ${A[*]}"
  echo "   vs ${B[*]}"
  run_one "$T/$id.warm-a" "$L/$id-a.warm.log" "${A[@]}"
  run_one "$T/$id.warm-b" "$L/$id-b.warm.log" "${B[@]}"
  for r in $(seq "$RUNS"); do
    run_one "$T/$id.a" "$L/$id-a.log" "${A[@]}"
    run_one "$T/$id.b" "$L/$id-b.log" "${B[@]}"
  done
}

IN="$WORK/inputs"
REF=("$PY" bench/learn_reference.py)
COMMON=(--size 7 --patches 200000 --force)

A=("$TAPMAP" bank learn --method lloyd --count 64 "${COMMON[@]}" --iterations 20 --tolerance 0 -o "$WORK/out/lloyd.toml" "$IN")
B=("${REF[@]}" --method kmeans --count 64 --patches 200000 --iterations 20 "$IN")
pair lloyd
A=("$TAPMAP" bank learn --method kmeans --count 64 "${COMMON[@]}" --iterations 20 --tolerance 0 -o "$WORK/out/kmeans.toml" "$IN")
pair kmeans
A=("$TAPMAP" bank learn --method pca --count 49 "${COMMON[@]}" -o "$WORK/out/pca.toml" "$IN")
B=("${REF[@]}" --method pca --count 49 --patches 200000 "$IN")
pair pca

# Peak memory against patches and images.
for m in 50000 200000; do
  for n in 12 24; do
    dir="$WORK/inputs"
    [ "$n" = 24 ] && dir="$WORK/inputs-24"
    echo "== memory: $m patches of $n images"
    for r in $(seq "$MEM_RUNS"); do
      run_one "$T/mem-$m-$n.a" "$L/mem-$m-$n-a.log" "$TAPMAP" bank learn --method lloyd --count 64 --size 7 \
        --patches "$m" --iterations 5 --tolerance 0 --force -o "$WORK/out/mem.toml" "$dir"
      run_one "$T/mem-$m-$n.b" "$L/mem-$m-$n-b.log" "${REF[@]}" --method kmeans --count 64 --patches "$m" \
        --iterations 5 "$dir"
    done
  done
done

# ---------------------------------------------------------------------------
# The table.
# ---------------------------------------------------------------------------
"$PY" - "$T" "$L" "$RUNS" <<'EOF'
import os
import re
import statistics as st
import sys

import numpy
import PIL
import sklearn
from threadpoolctl import threadpool_info

t, logs, runs = sys.argv[1], sys.argv[2], int(sys.argv[3])


def rows(name):
    with open(os.path.join(t, name)) as f:
        return [(float(a), int(b) / 1024) for a, b in (line.split() for line in f if line.strip())]


def said(path, what):
    with open(path) as f:
        text = f.read()
    if what == "objective":
        m = re.findall(r"objective ([0-9.e+-]+) after (\d+) (?:update|iteration)", text)
        return "objective %s after %s" % m[-1] if m else "?"
    m = re.findall(r"variance explained ([0-9.%, ]+)", text)
    return "variance %s" % m[-1].strip() if m else "?"


blas = ", ".join(sorted({"%s %s (%s threads)" % (i["internal_api"], i.get("version") or "", i["num_threads"])
                         for i in threadpool_info()}))
print()
print("Python %s, NumPy %s, Pillow %s, scikit-learn %s; %s" % (sys.version.split()[0], numpy.__version__,
                                                             PIL.__version__, sklearn.__version__, blas))
print("12 captures of 1024×1024 16-bit grey, 200,000 patches of 7×7; medians of %d paired runs" % runs)
print()
print("%-8s %12s %12s %22s %10s %10s" % ("pairing", "tapmap s", "reference s", "ratio ref/tapmap", "tapmap MiB",
                                          "ref MiB"))
for pid in ("lloyd", "kmeans", "pca"):
    a, b = rows(pid + ".a"), rows(pid + ".b")
    ratios = [rb[0] / ra[0] for ra, rb in zip(a, b)]
    print("%-8s %12.2f %12.2f %10.2f (%.2f–%.2f) %10.0f %10.0f" % (
        pid, st.median(r[0] for r in a), st.median(r[0] for r in b), st.median(ratios), min(ratios), max(ratios),
        st.median(r[1] for r in a), st.median(r[1] for r in b)))
print()
print("What each side printed (warm-up run):")
for pid in ("lloyd", "kmeans", "pca"):
    what = "variance" if pid == "pca" else "objective"
    print("  %-7s tapmap:    %s" % (pid, said(os.path.join(logs, pid + "-a.warm.log"), what)))
    print("  %-7s reference: %s" % ("", said(os.path.join(logs, pid + "-b.warm.log"), what)))
print()
print("Peak memory (MiB, median), lloyd 64 clusters, 5 updates:")
print("%-10s %8s %12s %14s %12s %14s" % ("patches", "images", "tapmap MiB", "tapmap s", "ref MiB", "reference s"))
for m in (50000, 200000):
    for n in (12, 24):
        a, b = rows("mem-%d-%d.a" % (m, n)), rows("mem-%d-%d.b" % (m, n))
        print("%-10d %8d %12.0f %14.2f %12.0f %14.2f" % (m, n, st.median(r[1] for r in a), st.median(r[0] for r in a),
                                                      st.median(r[1] for r in b), st.median(r[0] for r in b)))
EOF
