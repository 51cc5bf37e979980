#!/usr/bin/env python3
"""Whole-process benchmark of `tapmap apply --follow` against a batch run of the
same command over the same files (run by bench/follow.sh).

Captures: 5-megapixel (2592 x 1944) 16-bit PNGs with 12 bits used, as a line
camera writes them, made once with NumPy and Pillow. Job: the shipped line-A
recipe with the default outputs (maps, views, stats, manifest).

1. Batch rate: N captures / wall time of `tapmap apply` over them.
2. Sustained follow rate: a follower waits on an empty folder; all N captures
   are renamed into it at once; rate = N / time from the first rename to the
   N-th row in images.csv (outputs are on disk before their row).
   Batch and follow runs alternate, RUNS pairs; the ratio is the median of the
   pairs' ratios (goal: follow within 10 % of batch, ratio >= 0.9).
3. Lag at half the batch rate: the follower starts with one capture already
   in its folder (its first image after start-up: on a virtual machine that
   hands idle memory back to its host, the first image's buffers are fresh
   memory and it took 0.4-1.0 s; files present at the start are not counted
   in the lags), then M captures are renamed in one at a time at half the
   median batch rate; the lag p99 is the follower's own (manifest.json,
   follow.lag_p99_s: arrival to outputs and rows on disk). Compared with the
   processing time of one image: the median wall time of `tapmap apply` over
   one capture, the whole process (goal: lag p99 < 2 x that).

Environment: TAPMAP (binary), RUNS (pairs, default 5), N (default 24),
M (default 40), WORK (default target/bench-follow).
"""
import json
import os
import shutil
import signal
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = Path(__file__).resolve().parent.parent
TAPMAP = os.environ.get("TAPMAP", str(ROOT / "target/release/tapmap"))
RUNS = int(os.environ.get("RUNS", "5"))
N = int(os.environ.get("N", "24"))
M = int(os.environ.get("M", "40"))
WORK = Path(os.environ.get("WORK", str(ROOT / "target/bench-follow")))
RECIPE = str(ROOT / "kernels/line-a-edges.recipe.toml")
W, H = 2592, 1944


def make_captures(src: Path, n: int) -> None:
    """n distinct 12-bit captures in 16-bit PNGs: a lit tile with grain and a
    few dark scratches, different in each."""
    src.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20261204)
    yy, xx = np.mgrid[0:H, 0:W].astype(np.float32)
    base = 2400 + 600 * np.cos((xx - W / 2) / W * 2.0) * np.cos((yy - H / 2) / H * 2.0)
    for i in range(n):
        p = src / f"cap-{i:04d}.png"
        if p.exists():
            continue
        img = base + rng.normal(0, 40, size=(H, W)).astype(np.float32)
        for _ in range(3):
            x0, y0 = rng.integers(200, W - 200), rng.integers(200, H - 200)
            ang = rng.uniform(0, np.pi)
            d = np.abs((xx - x0) * np.sin(ang) - (yy - y0) * np.cos(ang))
            along = np.abs((xx - x0) * np.cos(ang) + (yy - y0) * np.sin(ang))
            img -= 900 * ((d < 2.5) & (along < 150))
        arr = np.clip(img, 0, 4095).astype(np.uint16)
        tmp = p.with_suffix(".tmp.png")
        Image.fromarray(arr).save(tmp)
        tmp.rename(p)


def tapmap(*args: str) -> list:
    return [TAPMAP, "apply", "--recipe", RECIPE, "-q", *args]


def batch(src: Path, out: Path) -> float:
    shutil.rmtree(out, ignore_errors=True)
    t = time.perf_counter()
    subprocess.run(tapmap("--out", str(out), str(src)), check=True)
    return time.perf_counter() - t


def rows(out: Path) -> int:
    try:
        with open(out / "images.csv", "rb") as f:
            return max(0, f.read().count(b"\n") - 1)
    except FileNotFoundError:
        return 0


def start_follower(inbox: Path, out: Path, already: Path = None) -> subprocess.Popen:
    """A follower of an empty `inbox`, or of one holding a copy of `already`
    (processed at the start, before any arrival, and not counted in the lags)."""
    shutil.rmtree(out, ignore_errors=True)
    shutil.rmtree(inbox, ignore_errors=True)
    inbox.mkdir(parents=True)
    if already is not None:
        shutil.copyfile(already, inbox / "warm-up.png")
        old = time.time() - 3600  # written long ago: taken at once, not settled
        os.utime(inbox / "warm-up.png", (old, old))
    log = out.parent / (out.name + ".status.jsonl")
    log.unlink(missing_ok=True)
    p = subprocess.Popen(
        tapmap("--follow", "--settle", "2s", "--status-every", "200ms",
               "--status-log", str(log), "--out", str(out), str(inbox)))
    # Ready once it logs its first status (the watch is set up before that).
    while not log.exists() or log.stat().st_size == 0 or rows(out) < (already is not None):
        if p.poll() is not None:
            sys.exit(f"follower ended early: {p.returncode}")
        time.sleep(0.02)
    return p


def stop(p: subprocess.Popen, out: Path) -> dict:
    p.send_signal(signal.SIGTERM)
    if p.wait() != 0:
        sys.exit(f"follower ended with {p.returncode}")
    return json.loads((out / "manifest.json").read_text())["follow"]


def stage(src: Path, staging: Path, names: list) -> list:
    """Copies of the captures under the names they arrive with, on the same
    file system as the inbox (so that arriving is a rename)."""
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir(parents=True)
    caps = sorted(src.glob("cap-*.png"))
    staged = []
    for i, name in enumerate(names):
        s = staging / name
        shutil.copyfile(caps[i % len(caps)], s)
        staged.append(s)
    return staged


def follow_burst(src: Path) -> float:
    inbox, out = WORK / "inbox", WORK / "follow-out"
    staged = stage(src, WORK / "staging", [f"burst-{i:04d}.png" for i in range(N)])
    p = start_follower(inbox, out)
    t = time.perf_counter()
    for s in staged:
        os.rename(s, inbox / s.name)
    while rows(out) < N:
        time.sleep(0.005)
    took = time.perf_counter() - t
    stop(p, out)
    return took


def follow_paced(src: Path, every: float) -> dict:
    inbox, out = WORK / "inbox", WORK / "paced-out"
    staged = stage(src, WORK / "staging", [f"paced-{i:04d}.png" for i in range(M)])
    p = start_follower(inbox, out, already=sorted(src.glob("cap-*.png"))[-1])
    t0 = time.perf_counter()
    for i, s in enumerate(staged):
        due = t0 + i * every
        time.sleep(max(0.0, due - time.perf_counter()))
        os.rename(s, inbox / s.name)
    while rows(out) < M + 1:
        time.sleep(0.01)
    return stop(p, out)


def main() -> None:
    if not os.access(TAPMAP, os.X_OK):
        sys.exit(f"{TAPMAP}: build it first (cargo build --release)")
    src = WORK / "captures"
    make_captures(src, N)
    one = WORK / "one"
    one.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(src / "cap-0000.png", one / "cap-0000.png")

    print(f"{N} captures of {W}x{H}, 16-bit PNG, line-A recipe, default outputs; "
          f"{RUNS} pairs", flush=True)
    pairs = []
    for r in range(RUNS):
        b = batch(src, WORK / "batch-out")
        f = follow_burst(src)
        pairs.append((N / b, N / f))
        print(f"  pair {r + 1}: batch {N / b:.2f} images/s, follow {N / f:.2f} images/s, "
              f"ratio {b / f:.3f}", flush=True)
    batch_rate = statistics.median(b for b, _ in pairs)
    follow_rate = statistics.median(f for _, f in pairs)
    ratios = sorted(f / b for b, f in pairs)
    print(f"batch rate (median) {batch_rate:.2f} images/s; sustained follow rate (median) "
          f"{follow_rate:.2f} images/s; follow/batch median {statistics.median(ratios):.3f} "
          f"(range {ratios[0]:.3f}-{ratios[-1]:.3f}; goal >= 0.9)")

    singles = sorted(batch(one, WORK / "one-out") for _ in range(RUNS))
    single = statistics.median(singles)
    every = 2.0 / batch_rate
    print(f"one image, whole process (median of {RUNS}): {single:.3f} s", flush=True)
    rec = follow_paced(src, every)
    p99, p50 = rec["lag_p99_s"], rec["lag_p50_s"]
    print(f"{M} captures at half the batch rate (one every {every:.3f} s): lag p50 "
          f"{p50:.3f} s, p99 {p99:.3f} s = {p99 / single:.2f} x one image's time "
          f"(goal < 2); most queued {rec['most_queued']}")


if __name__ == "__main__":
    main()
