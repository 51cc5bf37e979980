"""Batch-run measurements, printed side by side in one run.

1. Peak memory against the number of inputs: the same 1024x768 16-bit capture
   hard-linked 50 and 500 times, each folder run by `tapmap apply`; peak resident
   set size from GNU time. Flat figures mean memory does not grow with the inputs.
2. Throughput of the README's main job on sample_data/: median of 5 runs.

Run after `cargo build --release`:  python3 tools/bench_batch.py
Needs /usr/bin/time (GNU time). Nothing here is a test: figures vary with the machine.
"""
import os
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BIN = os.path.join(ROOT, "target", "release", "tapmap")
RECIPE = os.path.join(ROOT, "kernels", "line-a-edges.recipe.toml")


def write_pgm16(path, w, h):
    """A 16-bit binary PGM (Netpbm P5, maxval 4095 stored big-endian): a tile-like ramp."""
    rows = bytearray()
    for y in range(h):
        for x in range(w):
            v = (2000 + (x * 3 + y * 2) % 1500 + (400 if (x - y) % 97 == 0 else 0)) & 0xFFFF
            rows += v.to_bytes(2, "big")
    with open(path, "wb") as f:
        f.write(b"P5\n%d %d\n65535\n" % (w, h))
        f.write(rows)


def peak_rss_kib(args):
    out = subprocess.run(["/usr/bin/time", "-v"] + args, capture_output=True, text=True)
    if out.returncode not in (0,):
        sys.exit("run failed: %s\n%s" % (" ".join(args), out.stderr[-2000:]))
    m = re.search(r"Maximum resident set size \(kbytes\): (\d+)", out.stderr)
    return int(m.group(1))


def main():
    if not os.path.exists(BIN):
        sys.exit("build first: cargo build --release")
    tmp = tempfile.mkdtemp(prefix="tapmap-bench-")
    try:
        src = os.path.join(tmp, "capture.pgm")
        write_pgm16(src, 1024, 768)
        print("peak memory against the number of inputs (1024x768 16-bit, recipe line-a-edges, --jobs 2)")
        results = {}
        for n in (50, 500):
            d = os.path.join(tmp, "in%d" % n)
            os.makedirs(d)
            for i in range(n):
                os.link(src, os.path.join(d, "tile-%04d.pgm" % i))
            out = os.path.join(tmp, "out%d" % n)
            t0 = time.monotonic()
            kib = peak_rss_kib([BIN, "apply", "--recipe", RECIPE, "--save", "maps,stats,manifest",
                                "--jobs", "2", "-q", "--out", out, d])
            secs = time.monotonic() - t0
            results[n] = kib
            print("  %4d inputs: peak RSS %7.1f MiB, %6.1f s, %5.1f images/s" % (n, kib / 1024, secs, n / secs))
            shutil.rmtree(out)
        print("  ratio 500/50: %.2f" % (results[500] / results[50]))

        print("sample run (README main job), median of 5")
        times = []
        for _ in range(5):
            out = os.path.join(tmp, "sample")
            t0 = time.monotonic()
            subprocess.run([BIN, "apply", "--recipe", RECIPE, "--save", "all", "-q", "--out", out,
                            os.path.join(ROOT, "sample_data")], check=True)
            times.append(time.monotonic() - t0)
            shutil.rmtree(out)
        exts = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".pnm", ".pgm", ".ppm")
        n = sum(1 for _, _, fs in os.walk(os.path.join(ROOT, "sample_data"))
                for f in fs if f.lower().endswith(exts))
        med = statistics.median(times)
        print("  %d images: median %.3f s (runs %s), %.1f images/s"
              % (n, med, ", ".join("%.3f" % t for t in times), n / med))
    finally:
        shutil.rmtree(tmp)


if __name__ == "__main__":
    main()
