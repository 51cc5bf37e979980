"""Whole-process benchmark: tapmap against the script a user would write instead.

Every measurement is one whole process from start to exit, with the outputs a
user asks for: program start-up, reading the input files, filtering, and writing
maps, views and tables. Each pairing runs its two commands on the same input
files, alternately A B A B ..., RUNS times each (default 5; env RUNS), after one
warm-up run of each. The warm-up outputs are compared once before any timing, so
that a fast wrong answer cannot pass unnoticed. Each run writes into a fresh
output folder, removed after the run (outside the timed span).

Pairings (the workloads):
  a   sobel-x + sobel-y over one 4096² float32 .npy image, maps only,
      against a NumPy + SciPy script (bench/ref/sobel_scipy.py)
  b1  eight random 3×3 kernels (8×1×3×3 .npy weights) on the same image, padding 1,
      against PyTorch conv2d on the CPU, 2 threads (bench/ref/conv_torch.py)
  b2  64×3×7×7 random kernels, stride 2, padding 3, on a 3×1024² float32 .npy image,
      against the same PyTorch script
  c   a production batch: 16 captures of 2448×2048 16-bit grey PNG holding 12-bit
      data, Sobel x/y + 8-neighbour Laplacian, reflect padding, abs, with tapmap's
      default outputs (maps, views, stats, manifest), against a 2-process
      Pillow + SciPy + NumPy script writing maps, views and stats.csv
      (bench/ref/batch_pool.py)
  d-a tapmap's default outputs against its own maps-only run, on (a)'s image
  d-c the same on (c)'s batch
  e-probe    `tapmap probe` of 16 random 7×7 kernels over one 4096² 16-bit PNG,
             against `tapmap apply --save maps` of the same bank on the same image
  e-borders  `tapmap borders` of the same bank and image against the same apply
  f-otsu     (a)'s Sobel pair with --combine gradient --drop-sources --threshold otsu
             (magnitude, orientation and every map's edge measures at its own Otsu
             level), default outputs, against the plain Sobel-pair run with default
             outputs; the maps are checked against numpy.hypot / arctan2 of the plain
             run's maps
  f-fixed    the same at --threshold 0.3
  f-none     the same without edge measures (magnitude and orientation only)

Reported per pairing: the median wall time of each side, the median of the
per-pair time ratios with their min-max (for a-c the other program's time over
tapmap's, so above 1 means tapmap is faster; for d and e tapmap's command over
its baseline, so below 1 means the extra outputs cost nothing), the goal, and
each side's peak memory. Peak memory is ru_maxrss from os.wait4 of the child: on
Linux the largest resident set of any single process of the child's tree (the
child and the descendants it waited for), not their sum. A child's figure also
counts what its parent had resident when it started (the kernel carries the
peak across exec), so this driver never loads image data itself: input
generation and output checks run in helper child processes, and the driver's
own small peak is printed as the floor of every figure.

Inputs are generated once, deterministically (fixed seeds), into WORK (default
target/bench-whole; env WORK overrides) and reused while their description
matches. The tapmap binary comes from env TAPMAP (default target/release/tapmap).
The results are printed as a table and written to WORK/results.json.

Options:
  --only a,c    run a subset (pairing groups a b c d e, or ids such as b2, d-c)
  --quick       small sizes (512² images, 2 batch images) to smoke-test this
                script; inputs in WORK/quick, results in WORK/quick/results.json,
                RUNS defaults to 2

Run through bench/whole.sh, which makes the Python environment.
"""
import argparse
import json
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import threading
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
REF = os.path.join(ROOT, "bench", "ref")
PY = sys.executable
RUN_LIMIT_S = 1200        # a run that takes longer than this is killed and reported
RTOL = 1e-5               # maps agree when |a - b| <= RTOL * max |b| of the map

# Input sizes. Images are (height, width); the batch captures are 2448 wide, 2048 high.
FULL = {"a_side": 4096, "b2_planes": 3, "b2_side": 1024, "c_images": 16, "c_shape": [2048, 2448],
        "e_side": 4096}
QUICK = {"a_side": 512, "b2_planes": 3, "b2_side": 256, "c_images": 2, "c_shape": [512, 612],
         "e_side": 512}
SEED = 20261203
INPUTS_VERSION = 1        # bump when the generator changes, so old inputs are redone


# ---------------------------------------------------------------------------
# Helpers run in child processes (they import NumPy; the driver does not).
# ---------------------------------------------------------------------------

def tile_texture(h, w, seed):
    """An invented capture of a glazed tile as 12-bit counts (0..4095) in uint16.

    Smooth shading (an off-centre light falloff and a few long glaze waves),
    sensor noise, a few thin dark cracks (jagged polylines one or two pixels
    wide) and small dark pits.
    """
    import numpy as np
    from PIL import Image, ImageDraw

    rng = np.random.default_rng(seed)
    y = np.linspace(-1.0, 1.0, h, dtype=np.float32)[:, None]
    x = np.linspace(-1.0, 1.0, w, dtype=np.float32)[None, :]
    cy, cx = rng.uniform(-0.3, 0.3, 2)
    img = 2600.0 - 700.0 * ((x - cx) ** 2 + (y - cy) ** 2)
    for _ in range(4):
        fx, fy = rng.uniform(-2.0, 2.0, 2)
        img += np.float32(rng.uniform(40, 120)) * np.cos(
            np.float32(np.pi) * (np.float32(fx) * x + np.float32(fy) * y) + np.float32(rng.uniform(0, 2 * np.pi)))

    # Defects are drawn into a darkness mask (0 = intact, 255 = darkest).
    mask = Image.new("L", (w, h), 0)
    draw = ImageDraw.Draw(mask)
    step = max(h, w) / 90.0
    for _ in range(int(rng.integers(2, 5))):
        px, py = rng.uniform(0, w), rng.uniform(0, h)
        angle = rng.uniform(0, 2 * np.pi)
        points = [(px, py)]
        for _ in range(int(rng.integers(20, 60))):
            angle += rng.normal(0, 0.35)
            px, py = px + step * np.cos(angle), py + step * np.sin(angle)
            points.append((px, py))
        draw.line(points, fill=int(rng.integers(150, 256)), width=int(rng.integers(1, 3)))
    for _ in range(int(rng.integers(5, 16))):
        px, py, r = rng.uniform(0, w), rng.uniform(0, h), rng.uniform(1.5, 5.0)
        draw.ellipse([px - r, py - r, px + r, py + r], fill=int(rng.integers(120, 256)))
    img -= np.asarray(mask, dtype=np.float32) * np.float32(1400.0 / 255.0)

    img += rng.normal(0.0, 30.0, (h, w)).astype(np.float32)
    return np.clip(np.rint(img), 0, 4095).astype(np.uint16)


def save_png16(arr, path):
    """Write a uint16 array as a 16-bit grey PNG (Pillow mode 'I;16')."""
    from PIL import Image

    im = Image.fromarray(arr)
    assert im.mode == "I;16", im.mode
    im.save(path)


def helper_generate(folder, spec_json):
    """Write every input file into folder; the spec file is written last, so a
    folder without it (an interrupted generation) is made again."""
    import numpy as np

    spec = json.loads(spec_json)
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(SEED)

    def weights(shape):
        # Random kernels with the usual first-layer scale 1/sqrt(fan-in).
        fan_in = shape[1] * shape[2] * shape[3]
        return (rng.standard_normal(shape) / np.sqrt(fan_in)).astype(np.float32)

    s = spec["a_side"]
    np.save(os.path.join(folder, "image.npy"), tile_texture(s, s, SEED + 1).astype(np.float32) / np.float32(4095))
    np.save(os.path.join(folder, "w8x1x3x3.npy"), weights((8, 1, 3, 3)))

    c, s = spec["b2_planes"], spec["b2_side"]
    planes = [tile_texture(s, s, SEED + 10 + i).astype(np.float32) / np.float32(4095) for i in range(c)]
    np.save(os.path.join(folder, "rgb.npy"), np.stack(planes))
    np.save(os.path.join(folder, "w64x3x7x7.npy"), weights((64, c, 7, 7)))

    batch = os.path.join(folder, "batch")
    os.makedirs(batch, exist_ok=True)
    h, w = spec["c_shape"]
    for i in range(spec["c_images"]):
        save_png16(tile_texture(h, w, SEED + 100 + i), os.path.join(batch, "cap-%02d.png" % i))

    s = spec["e_side"]
    save_png16(tile_texture(s, s, SEED + 2), os.path.join(folder, "capture.png"))
    np.save(os.path.join(folder, "w16x1x7x7.npy"), weights((16, 1, 7, 7)))

    with open(os.path.join(folder, "spec.json"), "w") as f:
        f.write(spec_json)
    print(json.dumps({"ok": True}))


def compare_maps(a_path, b_path, rtol=RTOL):
    """Worst |a - b| over the channels, relative to each channel's max |b|."""
    import numpy as np

    a, b = np.load(a_path, mmap_mode="r"), np.load(b_path, mmap_mode="r")
    if a.shape != b.shape:
        return {"agree": False, "text": "shapes differ: %s vs %s" % (a.shape, b.shape)}
    a3, b3 = a.reshape((-1,) + a.shape[-2:]), b.reshape((-1,) + b.shape[-2:])
    worst = 0.0
    for ca, cb in zip(a3, b3):
        ca, cb = np.asarray(ca, dtype=np.float32), np.asarray(cb, dtype=np.float32)
        scale = max(float(np.max(np.abs(cb))), 1e-30)
        worst = max(worst, float(np.max(np.abs(ca - cb))) / scale)
    ok = worst <= rtol
    return {"agree": ok, "worst": worst,
            "text": ("agree" if ok else "DIFFER") + " (worst %.1e of max |value|)" % worst}


def helper_check_maps(a_path, b_path):
    print(json.dumps(compare_maps(a_path, b_path)))


def helper_check_gradient(comb_out, plain_out):
    """(f): magnitude and orientation equal hypot and degrees(arctan2) of the
    plain run's sobel-x, sobel-y maps (orientation modulo 360)."""
    import numpy as np

    c = np.load(os.path.join(comb_out, "maps", "image.npy"))
    p = np.load(os.path.join(plain_out, "maps", "image.npy"))
    mag = np.hypot(p[0], p[1])
    ori = np.degrees(np.arctan2(p[1], p[0]))
    dm = float(np.max(np.abs(c[0] - mag) / np.maximum(mag, 1e-30)))
    d = np.abs(c[1] - ori) % 360.0
    da = float(np.max(np.minimum(d, 360.0 - d)))
    ok = dm <= 1e-6 and da <= 1e-3
    print(json.dumps({"agree": ok, "text": "%s (magnitude %.1e relative, orientation %.1e deg)"
                      % ("agree" if ok else "DIFFER", dm, da)}))


def helper_check_batch(tap_out, ref_out, inputs):
    """(c): every image's maps, every stats.csv number, and the first image's views."""
    import csv

    import numpy as np
    from PIL import Image

    names = sorted(f[:-4] for f in os.listdir(inputs) if f.endswith(".png"))
    worst, bad = 0.0, []
    for n in names:
        r = compare_maps(os.path.join(tap_out, "maps", n + ".npy"), os.path.join(ref_out, "maps", n + ".npy"))
        worst = max(worst, r.get("worst", float("inf")))
        if not r["agree"]:
            bad.append("%s: %s" % (n, r["text"]))
    ok = not bad
    text = ("maps agree" if ok else "maps DIFFER") + " (worst %.1e of max |value|)" % worst

    # Statistics: values relative to the map's max |value|, fractions and counts as they are.
    def rows(path):
        with open(path, newline="") as f:
            return {(r["path"], r["channel"]): r for r in csv.DictReader(f)}
    tap, ref = rows(os.path.join(tap_out, "stats.csv")), rows(os.path.join(ref_out, "stats.csv"))
    stat_worst, zero_worst, stat_bad = 0.0, 0.0, []
    if set(tap) != set(ref):
        stat_bad.append("rows differ: %d vs %d" % (len(tap), len(ref)))
    for key in sorted(set(tap) & set(ref)):
        t, s = tap[key], ref[key]
        for col in ("name", "width", "height", "count", "non_finite"):
            if t[col] != s[col]:
                stat_bad.append("%s %s: %s vs %s" % (key, col, t[col], s[col]))
        scale = max(abs(float(s["max"])), abs(float(s["min"])), 1e-30)
        for col in ("min", "max", "mean", "std", "p01", "p50", "p99"):
            stat_worst = max(stat_worst, abs(float(t[col]) - float(s[col])) / scale)
        zero_worst = max(zero_worst, abs(float(t["zero_fraction"]) - float(s["zero_fraction"])))
    stats_ok = not stat_bad and stat_worst <= RTOL
    text += "; stats %s (worst %.1e of max |value|, zero_fraction off by up to %.2g)" % (
        "agree" if stats_ok else "DIFFER", stat_worst, zero_worst)

    # Views of the first image: 8-bit levels, 0 to the map's max.
    vdir_t, vdir_r = os.path.join(tap_out, "views", names[0]), os.path.join(ref_out, "views", names[0])
    level_worst = 0
    for f in sorted(os.listdir(vdir_r)):
        vt = np.asarray(Image.open(os.path.join(vdir_t, f)))
        vr = np.asarray(Image.open(os.path.join(vdir_r, f)))
        if vt.shape != vr.shape:
            level_worst = 999
            text += "; view %s shape %s vs %s" % (f, vt.shape, vr.shape)
            continue
        level_worst = max(level_worst, int(np.max(np.abs(vt.astype(int) - vr.astype(int)))))
    text += "; views of %s within %d level(s)" % (names[0], level_worst)
    print(json.dumps({"agree": ok, "worst": worst, "stats_agree": stats_ok, "stats_worst": stat_worst,
                      "zero_fraction_worst": zero_worst, "view_levels_worst": level_worst,
                      "problems": (bad + stat_bad)[:10], "text": text}))


def helper_check_same(a_out, b_out, inputs_json):
    """(d): the default run's maps are those of the maps-only run, bit for bit,
    and the default run also wrote views, stats.csv and manifest.json."""
    import numpy as np

    stems = json.loads(inputs_json)
    problems = []
    for n in stems:
        a, b = np.load(os.path.join(a_out, "maps", n + ".npy")), np.load(os.path.join(b_out, "maps", n + ".npy"))
        if a.shape != b.shape or not np.array_equal(a, b):
            problems.append("maps of %s differ" % n)
        if not os.path.isdir(os.path.join(a_out, "views", n)):
            problems.append("no views for %s" % n)
    for f in ("stats.csv", "manifest.json"):
        if not os.path.isfile(os.path.join(a_out, f)):
            problems.append("no " + f)
    ok = not problems
    print(json.dumps({"agree": ok, "problems": problems,
                      "text": "agree (identical maps; views, stats, manifest written)" if ok
                      else "DIFFER: " + "; ".join(problems[:5])}))


def helper_check_probe(probe_out, apply_out, stem):
    """(e-probe): every hit's response is the apply map's value at its (x, y),
    and each kernel's first hit is that map's maximum."""
    import csv

    import numpy as np

    maps = np.load(os.path.join(apply_out, "maps", stem + ".npy"), mmap_mode="r")
    with open(os.path.join(probe_out, "probe.csv"), newline="") as f:
        hits = list(csv.DictReader(f))
    worst, top_worst, problems = 0.0, 0.0, []
    scale = {}
    for h in hits:
        c = int(h["channel"])
        if c not in scale:
            scale[c] = max(float(np.max(np.abs(maps[c]))), 1e-30)
        v = float(maps[c, int(h["y"]), int(h["x"])])
        worst = max(worst, abs(float(h["response"]) - v) / scale[c])
        if h["rank"] == "1":
            top_worst = max(top_worst, abs(float(h["response"]) - float(np.max(maps[c]))) / scale[c])
    kernels = len({h["channel"] for h in hits})
    if kernels != maps.shape[0]:
        problems.append("hits for %d of %d kernels" % (kernels, maps.shape[0]))
    for f in ("overview.png",):
        if not os.path.isfile(os.path.join(probe_out, f)):
            problems.append("no " + f)
    ok = not problems and worst <= RTOL and top_worst <= RTOL
    print(json.dumps({"agree": ok, "worst": worst, "top_worst": top_worst, "hits": len(hits), "problems": problems,
                      "text": "%s (%d hits; responses vs apply's maps worst %.1e, rank-1 vs map max worst %.1e)%s"
                      % ("agree" if ok else "DIFFER", len(hits), worst, top_worst,
                         "; " + "; ".join(problems) if problems else "")}))


def helper_check_borders(borders_out, apply_out, stem):
    """(e-borders): the tables and plot are there, with a band row per channel and edge."""
    import csv

    import numpy as np

    channels = np.load(os.path.join(apply_out, "maps", stem + ".npy"), mmap_mode="r").shape[0]
    problems = []
    for f in ("borders.csv", "bands.csv", "summary.csv", "plot.png"):
        if not os.path.isfile(os.path.join(borders_out, f)):
            problems.append("no " + f)
    bands = 0
    if os.path.isfile(os.path.join(borders_out, "bands.csv")):
        with open(os.path.join(borders_out, "bands.csv"), newline="") as f:
            bands = sum(1 for _ in csv.DictReader(f))
        if bands != 4 * channels:
            problems.append("bands.csv has %d rows, expected %d" % (bands, 4 * channels))
    ok = not problems
    print(json.dumps({"agree": ok, "problems": problems,
                      "text": "outputs complete (%d band rows)" % bands if ok else "INCOMPLETE: " + "; ".join(problems)}))


def helper_versions():
    import numpy
    import PIL
    import scipy
    out = {"python": platform.python_version(), "numpy": numpy.__version__, "scipy": scipy.__version__,
           "pillow": PIL.__version__}
    try:
        import torch
        out["torch"] = torch.__version__
    except ImportError:
        out["torch"] = None
    print(json.dumps(out))


HELPERS = {"generate": helper_generate, "check-maps": helper_check_maps, "check-batch": helper_check_batch,
           "check-same": helper_check_same, "check-probe": helper_check_probe,
           "check-borders": helper_check_borders, "check-gradient": helper_check_gradient,
           "versions": helper_versions}


def helper(name, *args):
    """Run a helper in a child Python and return its JSON answer."""
    r = subprocess.run([PY, os.path.abspath(__file__), "_helper", name, *args],
                       stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    if r.returncode != 0:
        return {"agree": False, "text": "check failed: " + (r.stderr.strip().splitlines() or ["?"])[-1]}
    return json.loads(r.stdout.strip().splitlines()[-1])


# ---------------------------------------------------------------------------
# The driver.
# ---------------------------------------------------------------------------

class RunError(Exception):
    pass


def run_once(argv, out, log_path):
    """One whole process: wall time (s) and peak resident set (MiB) of its tree.
    out is created fresh before and removed after, both outside the timed span."""
    if os.path.exists(out):
        shutil.rmtree(out)
    os.makedirs(out)
    argv = [a.replace("{OUT}", out) for a in argv]
    with open(log_path, "w") as log:
        t0 = time.perf_counter()
        p = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=log, stderr=log, cwd=ROOT)
        timer = threading.Timer(RUN_LIMIT_S, p.kill)
        timer.start()
        _, status, usage = os.wait4(p.pid, 0)
        dt = time.perf_counter() - t0
        timer.cancel()
    p.returncode = os.waitstatus_to_exitcode(status)   # reaped here, not by Popen
    if p.returncode != 0:
        with open(log_path) as f:
            tail = " | ".join(f.read().strip().splitlines()[-3:])
        raise RunError("exit %d: %s: %s" % (p.returncode, " ".join(os.path.basename(a) for a in argv[:3]), tail))
    return dt, usage.ru_maxrss / 1024.0


class Pairing:
    """Two commands on the same inputs. {OUT} in an argv stands for the run's output folder.

    kind "speedup": ratio = other / tapmap (above 1: tapmap faster);
    kind "cost":    ratio = tapmap / other (tapmap's command relative to its baseline)."""

    def __init__(self, pid, title, tapmap, other, other_label, kind, goal, check, mem_goal=None):
        self.id, self.title, self.tapmap, self.other = pid, title, tapmap, other
        self.other_label, self.kind, self.goal, self.mem_goal, self.check = other_label, kind, goal, mem_goal, check


def met(value, goal):
    op, g = goal
    return value >= g if op == ">=" else value <= g


def measure(p, runs, runs_dir):
    """Warm-up A and B, check their outputs, then A B A B ... timed."""
    out_a, out_b = os.path.join(runs_dir, p.id + "-tapmap"), os.path.join(runs_dir, p.id + "-other")
    log_a, log_b = out_a + ".log", out_b + ".log"
    res = {"id": p.id, "title": p.title, "other": p.other_label, "ratio_is":
           "other/tapmap" if p.kind == "speedup" else "tapmap/baseline",
           "tapmap_cmd": p.tapmap, "other_cmd": p.other, "goal": "%s %g" % p.goal,
           "mem_goal": ("%s %g" % p.mem_goal) if p.mem_goal else None}
    try:
        run_once(p.tapmap, out_a, log_a)
        run_once(p.other, out_b, log_b)
        res["check"] = p.check(out_a, out_b)
        shutil.rmtree(out_a)
        shutil.rmtree(out_b)
        ta, tb, ma, mb = [], [], [], []
        for _ in range(runs):
            for argv, out, log, ts, ms in ((p.tapmap, out_a, log_a, ta, ma), (p.other, out_b, log_b, tb, mb)):
                t, m = run_once(argv, out, log)
                shutil.rmtree(out)
                ts.append(t)
                ms.append(m)
    except RunError as e:
        res["error"] = str(e)
        for d in (out_a, out_b):
            shutil.rmtree(d, ignore_errors=True)
        return res
    ratios = [b / a for a, b in zip(ta, tb)] if p.kind == "speedup" else [a / b for a, b in zip(ta, tb)]
    res.update({"tapmap_s": ta, "other_s": tb, "ratios": ratios, "tapmap_peak_mib_runs": ma, "other_peak_mib_runs": mb,
                "tapmap_median_s": statistics.median(ta), "other_median_s": statistics.median(tb),
                "ratio_median": statistics.median(ratios), "ratio_min": min(ratios), "ratio_max": max(ratios),
                "tapmap_peak_mib": max(ma), "other_peak_mib": max(mb)})
    res["mem_ratio"] = res["tapmap_peak_mib"] / res["other_peak_mib"]
    res["goal_met"] = met(res["ratio_median"], p.goal)
    if p.mem_goal:
        res["mem_goal_met"] = met(res["mem_ratio"], p.mem_goal)
    return res


def pairings(tapmap, inp, side):
    """All pairings. Every tapmap flag used here is in tapmap 0.1.0's --help of
    apply, probe and borders; the 8-neighbour Laplacian is the family laplace-8."""
    j = lambda *p: os.path.join(inp, *p)  # noqa: E731 - short path helper
    img, w8, rgb, w64 = j("image.npy"), j("w8x1x3x3.npy"), j("rgb.npy"), j("w64x3x7x7.npy")
    batch, cap, w16 = j("batch"), j("capture.png"), j("w16x1x7x7.npy")
    batch_stems = sorted(f[:-4] for f in os.listdir(batch) if f.endswith(".png"))
    maps = lambda out, stem: os.path.join(out, "maps", stem + ".npy")  # noqa: E731
    quiet = ["--quiet", "--out", "{OUT}"]
    edges = [tapmap, "apply", "--bank", "sobel-x+sobel-y+laplace-8", "--white", "4095", "--pad", "reflect",
             "--act", "abs"] + quiet + [batch]
    sobel2 = [tapmap, "apply", "--bank", "sobel-x+sobel-y", "--pad", "zero"] + quiet + [img]
    e_apply = [tapmap, "apply", "--bank", w16, "--white", "4095", "--save", "maps"] + quiet + [cap]
    # The I/O floor of a maps-only run: the same bytes read and written by the
    # plainest processes there are, no computation (cat, head). On a machine
    # where writing to the page cache costs as much as it does here, this bounds
    # the speed-up any program can reach against a script that writes the same.

    def floor(img_path, maps):
        nbytes = maps * side * side * 4 + 128
        return ["sh", "-c", "cat '%s' > /dev/null && head -c %d /dev/zero > {OUT}/maps.npy" % (img_path, nbytes)]

    no_check = lambda a, b: {"agree": True, "text": "I/O floor: nothing to compare"}  # noqa: E731
    return [
        Pairing("a-floor", "(a)'s maps-only run against reading its input and writing as many bytes",
                sobel2[:4] + ["--save", "maps"] + sobel2[4:], floor(img, 2),
                "cat + head (I/O floor)", "cost", ("<=", 1.5), no_check),
        Pairing("b1-floor", "(b1)'s run against reading its input and writing as many bytes",
                [tapmap, "apply", "--bank", w8, "--pad-width", "1", "--save", "maps"] + quiet + [img],
                floor(img, 8), "cat + head (I/O floor)", "cost", ("<=", 1.5), no_check),
        Pairing("a", "sobel-x+sobel-y, one float32 .npy image, maps only",
                sobel2[:4] + ["--save", "maps"] + sobel2[4:],
                [PY, os.path.join(REF, "sobel_scipy.py"), img, "{OUT}/maps.npy"],
                "NumPy+SciPy script", "speedup", (">=", 5),
                lambda a, b: helper("check-maps", maps(a, "image"), os.path.join(b, "maps.npy"))),
        Pairing("b1", "8x1x3x3 random kernels, pad 1, same image, maps only",
                [tapmap, "apply", "--bank", w8, "--pad-width", "1", "--save", "maps"] + quiet + [img],
                [PY, os.path.join(REF, "conv_torch.py"), img, w8, "{OUT}/maps.npy", "1", "1"],
                "PyTorch conv2d script", "speedup", (">=", 6),
                lambda a, b: helper("check-maps", maps(a, "image"), os.path.join(b, "maps.npy"))),
        Pairing("b2", "64x3x7x7 random kernels, stride 2, pad 3, 3-plane .npy, maps only",
                [tapmap, "apply", "--bank", w64, "--color", "rgb", "--stride", "2", "--pad-width", "3",
                 "--save", "maps"] + quiet + [rgb],
                [PY, os.path.join(REF, "conv_torch.py"), rgb, w64, "{OUT}/maps.npy", "2", "3"],
                "PyTorch conv2d script", "speedup", (">=", 2),
                lambda a, b: helper("check-maps", maps(a, "rgb"), os.path.join(b, "maps.npy"))),
        Pairing("c", "batch of %d 16-bit PNG: sobel x/y + laplace-8, reflect, abs; maps, views, stats"
                % len(batch_stems),
                edges, [PY, os.path.join(REF, "batch_pool.py"), batch, "{OUT}"],
                "2-process Pillow+SciPy script", "speedup", (">=", 5),
                lambda a, b: helper("check-batch", a, b, batch)),
        Pairing("d-a", "default outputs vs --save maps, (a)'s image",
                sobel2, sobel2[:4] + ["--save", "maps"] + sobel2[4:],
                "tapmap --save maps", "cost", ("<=", 1.5),
                lambda a, b: helper("check-same", a, b, json.dumps(["image"]))),
        Pairing("d-c", "default outputs vs --save maps, (c)'s batch",
                edges, edges[:10] + ["--save", "maps"] + edges[10:],
                "tapmap --save maps", "cost", ("<=", 1.5),
                lambda a, b: helper("check-same", a, b, json.dumps(batch_stems))),
        Pairing("e-probe", "probe --top 9, 16x1x7x7 bank, one 16-bit PNG",
                [tapmap, "probe", "--bank", w16, "--white", "4095", "--top", "9"] + quiet + [cap],
                e_apply, "tapmap apply --save maps", "cost", ("<=", 1), mem_goal=("<=", 1.5),
                check=lambda a, b: helper("check-probe", a, b, "capture")),
        Pairing("e-borders", "borders (5 pad modes), same bank and image",
                [tapmap, "borders", "--bank", w16, "--white", "4095"] + quiet + [cap],
                e_apply, "tapmap apply --save maps", "cost", ("<=", 1.5), mem_goal=("<=", 1.5),
                check=lambda a, b: helper("check-borders", a, b, "capture")),
    ] + [
        Pairing("f-" + tag, "sobel pair + gradient, sources dropped%s; default outputs vs the plain pair" % what,
                sobel2[:4] + ["--combine", "gradient", "--drop-sources"] + measure + sobel2[4:], sobel2,
                "tapmap plain Sobel pair", "cost", ("<=", 1.2),
                lambda a, b: helper("check-gradient", a, b))
        for tag, what, measure in [
            ("otsu", ", edge measures at each map's Otsu level", ["--threshold", "otsu"]),
            ("fixed", ", edge measures at 0.3", ["--threshold", "0.3"]),
            ("none", "", []),
        ]
    ]


def selected(pid, only):
    return only is None or pid in only or pid.split("-")[0][0] in only or pid.split("-")[0] in only


def table(results, out=sys.stdout):
    head = "%-10s %9s %9s  %-22s %-8s %-4s %10s %10s %7s %-8s %-4s %s" % (
        "pairing", "tapmap s", "other s", "ratio med (min-max)", "goal", "met", "tapmap MiB", "other MiB",
        "mem", "mem goal", "met", "outputs")
    print(head, file=out)
    print("-" * len(head), file=out)
    for r in results:
        if "error" in r:
            print("%-10s ERROR %s" % (r["id"], r["error"]), file=out)
            continue
        chk = r["check"]
        print("%-10s %9.3f %9.3f  %-22s %-8s %-4s %10.0f %10.0f %6.2fx %-8s %-4s %s" % (
            r["id"], r["tapmap_median_s"], r["other_median_s"],
            "%.2fx (%.2f-%.2f)" % (r["ratio_median"], r["ratio_min"], r["ratio_max"]),
            r["goal"] + "x", "yes" if r["goal_met"] else "no",
            r["tapmap_peak_mib"], r["other_peak_mib"], r["mem_ratio"],
            (r["mem_goal"] + "x") if r["mem_goal"] else "", ("yes" if r["mem_goal_met"] else "no") if r["mem_goal"] else "",
            "agree" if chk.get("agree") else "DIFFER"), file=out)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--only", help="comma-separated pairings or groups: a,b,c,d,e or b2,d-c,e-probe ...")
    ap.add_argument("--quick", action="store_true", help="small sizes, to smoke-test this script")
    args = ap.parse_args()
    only = set(s.strip() for s in args.only.split(",")) if args.only else None
    runs = int(os.environ.get("RUNS", "2" if args.quick else "5"))
    tapmap = os.path.abspath(os.path.join(ROOT, os.environ.get("TAPMAP", "target/release/tapmap")))
    work = os.path.abspath(os.path.join(ROOT, os.environ.get("WORK", "target/bench-whole")))
    if args.quick:
        work = os.path.join(work, "quick")
    spec = dict(QUICK if args.quick else FULL, version=INPUTS_VERSION, seed=SEED)
    spec_json = json.dumps(spec, sort_keys=True)
    inp, runs_dir = os.path.join(work, "inputs"), os.path.join(work, "runs")

    if not os.access(tapmap, os.X_OK):
        sys.exit("tapmap binary not found at %s (set TAPMAP)" % tapmap)
    version = subprocess.run([tapmap, "--version"], capture_output=True, text=True).stdout.strip()

    # Inputs: reuse them when their description matches, else make them again.
    spec_path = os.path.join(inp, "spec.json")
    if not (os.path.isfile(spec_path) and open(spec_path).read() == spec_json):
        shutil.rmtree(inp, ignore_errors=True)
        print("generating inputs in %s ..." % inp, flush=True)
        t = time.perf_counter()
        r = helper("generate", inp, spec_json)
        if not r.get("ok"):
            sys.exit("input generation failed: %s" % r.get("text"))
        print("  done in %.0f s" % (time.perf_counter() - t), flush=True)
    shutil.rmtree(runs_dir, ignore_errors=True)
    os.makedirs(runs_dir)

    versions = helper("versions")
    floor = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print("%s; %d cores; RUNS=%d after one warm-up each, alternating; %s" % (
        version, os.cpu_count(), runs, " ".join("%s %s" % kv for kv in versions.items())))
    print("sizes: %s" % json.dumps({k: v for k, v in spec.items() if k not in ("version", "seed")}))
    print("peak MiB: ru_maxrss of the child from os.wait4, i.e. the largest single process of its tree "
          "(not the sum); this driver's own %.0f MiB is the floor of every figure" % floor, flush=True)

    results = []
    for p in pairings(tapmap, inp, spec["a_side"]):
        if not selected(p.id, only):
            continue
        print("  %-10s %s ..." % (p.id, p.title), flush=True)
        t = time.perf_counter()
        r = measure(p, runs, runs_dir)
        r["elapsed_s"] = time.perf_counter() - t
        if "error" in r:
            print("    ERROR %s" % r["error"], flush=True)
        else:
            print("    %.3f s vs %.3f s, ratio %.2fx; %s  [%.0f s]" % (
                r["tapmap_median_s"], r["other_median_s"], r["ratio_median"], r["check"]["text"], r["elapsed_s"]),
                flush=True)
        results.append(r)
    shutil.rmtree(runs_dir, ignore_errors=True)

    print()
    print("ratio: for a-c the other program's median time over tapmap's (above 1: tapmap faster); for d and e")
    print("tapmap's command over its baseline (default outputs over --save maps; probe or borders over apply).")
    print("mem: tapmap's peak over the other side's. Times are medians of %d runs in seconds." % runs)
    table(results)
    print()
    for r in results:
        if "error" not in r:
            print("%-10s %s; other side: %s. Outputs: %s" % (r["id"], r["title"], r["other"], r["check"]["text"]))
    with open(os.path.join(work, "results.json"), "w") as f:
        json.dump({"tapmap": tapmap, "tapmap_version": version, "cores": os.cpu_count(), "runs": runs,
                   "quick": args.quick, "sizes": spec, "versions": versions, "driver_peak_mib": floor,
                   "peak_memory": "ru_maxrss from os.wait4 of the child: largest single process of its tree",
                   "pairings": results}, f, indent=1)
    print("\nresults: %s" % os.path.join(work, "results.json"))
    failed = [r["id"] for r in results if "error" in r or not r["check"].get("agree")]
    return 1 if failed else 0


if __name__ == "__main__":
    if len(sys.argv) > 2 and sys.argv[1] == "_helper":
        HELPERS[sys.argv[2]](*sys.argv[3:])
    else:
        sys.exit(main())
