"""Side-by-side comparison of tapmap with general-purpose libraries, in one run.

Each workload runs in tapmap (in-process timing by examples/bench_workload.rs)
and in the reference library (in-process timing here), alternating, RUNS times
each; the table gives medians, the ratio, GFLOP/s (2 flops per multiply-add) and
whether the outputs agree. Inputs are generated once as .npy files.

tapmap's time is per image in steady state: each tapmap process runs the
workload three times, as a batch runs image after image, and the runs after the
first (whose buffers are reused) count; the "1st run" column shows the first run
of a process, which also pays for fresh memory. The reference library is timed
call by call in one long-lived Python process.

Run through bench/compare.sh (it builds tapmap and makes the Python environment).
"""
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time

import numpy as np
import scipy.ndimage as ndi
import scipy.signal as sig

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BIN = os.path.join(ROOT, "target", "release", "examples", "bench_workload")
RUNS = int(os.environ.get("RUNS", "5"))

try:
    import torch
    import torch.nn.functional as F
    torch.set_num_threads(os.cpu_count())
    HAVE_TORCH = True
except Exception as e:  # noqa: BLE001 - any import failure means "no torch"
    HAVE_TORCH = False
    TORCH_WHY = str(e).splitlines()[0][:120]


def gaussian_taps(sigma, radius):
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    g = np.exp(-x * x / (2 * sigma * sigma))
    return g / g.sum()


def run_tapmap(inp, bank, pad, extent, stride, out, extra=()):
    r = subprocess.run([BIN, inp, bank, pad, extent, str(stride), "3", out, *extra],
                       check=True, capture_output=True, text=True)
    return json.loads(r.stdout)


def timed(fn):
    t = time.perf_counter()
    y = fn()
    return time.perf_counter() - t, y


def best_of(variants):
    """The fastest of several ways to run the reference (median of 3 each)."""
    times = {k: statistics.median([timed(f)[0] for _ in range(3)]) for k, f in variants.items()}
    best = min(times, key=times.get)
    return best, variants[best]


def workload(name, inp, bank, pad, extent, stride, ref_name, ref_fn, extra=(), tol=1e-4):
    d = os.path.dirname(inp)
    out = os.path.join(d, name + "-tapmap.npy")
    ours, first, theirs, info = [], [], [], None
    ref_y = None
    for _ in range(RUNS):  # alternate the two, so machine noise hits both alike
        # tapmap: one process runs the workload 3 times, as a batch runs images;
        # the time is that of the runs after the first (buffers reused), and the
        # first run (fresh memory) is shown beside it.
        info = run_tapmap(inp, bank, pad, extent, stride, out, extra)
        ours.append(info["warm_median_s"])
        first.append(info["times_s"][0])
        t, ref_y = timed(ref_fn)
        theirs.append(t)
    y = np.load(out)
    ref_y = np.asarray(ref_y, dtype=np.float64).reshape(y.shape)
    err = float(np.max(np.abs(y - ref_y)) / max(1e-30, float(np.max(np.abs(ref_y)))))
    mo, mt = statistics.median(ours), statistics.median(theirs)
    gflops = 2 * info["multiply_adds"] / mo / 1e9
    print("%-4s %-44s %10.1f %10.1f %10.1f %7.2fx %8.1f  %-9s %s" % (
        name, ref_name, mo * 1e3, statistics.median(first) * 1e3, mt * 1e3, mt / mo, gflops, info["engine"],
        "agree (rel %.1e)" % err if err < tol else "DIFFER (rel %.1e)" % err))


def main():  # noqa: C901 - one table, one function
    rng = np.random.default_rng(20261202)
    with tempfile.TemporaryDirectory() as d:
        big = rng.random((4096, 4096), dtype=np.float32)
        p_big = os.path.join(d, "big.npy")
        np.save(p_big, big)
        mid = rng.random((2048, 2048), dtype=np.float32)
        p_mid = os.path.join(d, "mid.npy")
        np.save(p_mid, mid)
        k31 = rng.standard_normal((31, 31))
        bank31 = os.path.join(d, "k31.toml")
        with open(bank31, "w") as f:
            f.write('name = "k31"\nop = "convolve"\n[[kernel]]\nname = "r31"\ntaps = [%s]\n'
                    % ", ".join("[" + ", ".join(repr(float(v)) for v in row) + "]" for row in k31))
        print("machine: %d cores; RUNS=%d; times are medians in ms" % (os.cpu_count(), RUNS))
        print("%-4s %-44s %10s %10s %10s %8s %8s  %-9s %s" % ("", "reference", "tapmap", "1st run", "reference", "ratio", "GFLOP/s", "engine", "outputs"))
        sx = np.array([[-1, 0, 1], [-2, 0, 2], [-1, 0, 1]], dtype=np.float64)
        workload("W1", p_big, "sobel-x+sobel-y", "zero", "same", 1,
                 "scipy.ndimage.correlate x2 (constant 0)",
                 lambda: np.stack([ndi.correlate(big, sx, mode="constant", cval=0.0),
                                   ndi.correlate(big, sx.T, mode="constant", cval=0.0)]))
        g = gaussian_taps(2.0, 6)
        workload("W2", p_big, "gaussian:sigma=2", "reflect", "same", 1,
                 "scipy.ndimage.gaussian_filter (truncate 3)",
                 lambda: ndi.gaussian_filter(big, 2.0, mode="mirror", truncate=3.0))
        workload("W3", p_mid, bank31, "zero", "same", 1,
                 "scipy.signal.fftconvolve (mode same)",
                 lambda: sig.fftconvolve(mid, k31, mode="same"), tol=1e-3)
        if HAVE_TORCH:
            x3 = rng.random((3, 1024, 1024), dtype=np.float32)
            p3 = os.path.join(d, "x3.npy")
            np.save(p3, x3)
            w = rng.standard_normal((64, 3, 7, 7)).astype(np.float32)
            wb = os.path.join(d, "w.npy")
            np.save(wb, w)
            xt = torch.from_numpy(x3[None])
            wt = torch.from_numpy(w)
            # PyTorch's best layout on this machine: NCHW or channels-last.
            cl = torch.channels_last
            xl, wl = xt.contiguous(memory_format=cl), wt.contiguous(memory_format=cl)
            with torch.no_grad():
                w4 = best_of({
                    "NCHW": lambda: F.conv2d(xt, wt, stride=2, padding=3).numpy()[0],
                    "channels-last": lambda: F.conv2d(xl, wl, stride=2, padding=3).numpy()[0],
                })
                workload("W4", p3, wb, "zero", "3", 2, "torch conv2d 64x3x7x7 s2 p3 (%s)" % w4[0], w4[1])
                w5 = best_of({
                    "NCHW": lambda: F.max_pool2d(F.relu(F.conv2d(xt, wt, stride=2, padding=3)), 2).numpy()[0],
                    "channels-last": lambda: F.max_pool2d(F.relu(F.conv2d(xl, wl, stride=2, padding=3)), 2).numpy()[0],
                })
                workload("W5", p3, wb, "zero", "3", 2, "torch conv+relu+max_pool2d (%s)" % w5[0], w5[1],
                         extra=("relu", "maxpool2"))
                w8 = rng.standard_normal((8, 1, 3, 3)).astype(np.float32)
                w8p = os.path.join(d, "w8.npy")
                np.save(w8p, w8)
                bt = torch.from_numpy(big[None, None])
                workload("W6", p_big, w8p, "zero", "same", 1, "torch conv2d 8x1x3x3 pad 1",
                         lambda: F.conv2d(bt, torch.from_numpy(w8), padding=1).numpy()[0])
        else:
            print("W4-W6 skipped: PyTorch is not importable here (%s)" % TORCH_WHY)
        w7(d, rng)


def w7(d, rng):
    """The whole batch against its I/O floor: 64 16-bit 2048² PNGs through
    sobel-x/y + relu + 2×2 max pool with maps and stats written, against the same
    images through `identity` without pooling (decode, write maps and stats only)."""
    tapmap = os.path.join(ROOT, "target", "release", "tapmap")
    n = int(os.environ.get("W7_IMAGES", "64"))
    arr_dir = os.path.join(d, "w7-arrays")
    os.makedirs(arr_dir)
    base = (rng.random((2048, 2048)) * 0.8 + 0.1).astype(np.float32)
    for i in range(n):
        np.save(os.path.join(arr_dir, "cap-%03d.npy" % i), np.roll(base, 17 * i, axis=1))
    # tapmap writes 16-bit grey PNG views of the identity maps: these are the inputs.
    # (`--act abs` marks the maps non-negative, so their views are grey, not the
    # 8-bit diverging scale of signed maps; the values are positive, so it changes
    # none. The views are moved out of the run folder: tapmap never reads a run's
    # outputs as input.)
    made = os.path.join(d, "w7-made")
    subprocess.run([tapmap, "apply", "-q", "--bank", "identity", "--act", "abs", "--save", "views",
                    "--view-depth", "16", "--view-range", "0,1", "--out", made,
                    os.path.join(arr_dir, "*.npy")], check=True)
    pngs = os.path.join(d, "w7-pngs")
    os.rename(os.path.join(made, "views"), pngs)
    def run(args, inputs=pngs):
        # Time and peak resident memory of one tapmap process. The peak comes from
        # GNU time: a child's own rusage would count this (large) Python process,
        # whose pages a forked child shares until it starts tapmap.
        out = os.path.join(d, "w7-out")
        mem = os.path.join(d, "w7-maxrss")
        t = time.perf_counter()
        subprocess.run(["/usr/bin/time", "-o", mem, "-f", "%M", tapmap, "apply", "-q", "--save", "maps,stats",
                        "--out", out, *args, inputs], check=True)
        dt = time.perf_counter() - t
        subprocess.run(["rm", "-rf", out], check=True)
        with open(mem) as f:
            return dt, int(f.read().split()[-1]) / 1024.0
    recipe = ["--bank", "sobel-x+sobel-y", "--act", "relu", "--pool", "max", "--pool-size", "2"]
    work, floor, rss = [], [], []
    for _ in range(RUNS):
        t, m = run(recipe)
        work.append(t)
        rss.append(m)
        floor.append(run(["--bank", "identity"])[0])
    mw, mf = statistics.median(work), statistics.median(floor)
    print("W7   %d × 2048² 16-bit PNG: sobel x/y+relu+pool %.2f s, I/O floor (identity) %.2f s: %.2f× the floor, %.1f images/s"
          % (n, mw, mf, mw / mf, n / mw))
    # Peak memory must not grow with the number of images: the same run over a
    # quarter of them.
    quarter = os.path.join(d, "w7-quarter")
    os.makedirs(quarter)
    for f in sorted(os.listdir(pngs))[: max(1, n // 4)]:
        os.symlink(os.path.join(pngs, f), os.path.join(quarter, f))
    small = [run(recipe, quarter)[1] for _ in range(3)]
    print("W7   peak memory: %.0f MiB for %d images, %.0f MiB for %d (median of runs): ratio %.2f"
          % (statistics.median(rss), n, statistics.median(small), max(1, n // 4),
             statistics.median(rss) / statistics.median(small)))


if __name__ == "__main__":
    sys.exit(main())
