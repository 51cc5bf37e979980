"""Edge maps, views and statistics for a folder of 12-bit captures in 16-bit grey PNG.

Usage: python batch_pool.py FOLDER OUT

Each PNG in FOLDER is read, divided by 4095 (12-bit white level) and correlated with
Sobel x, Sobel y and the 8-neighbour Laplacian, with mirrored borders
(scipy's 'mirror' is numpy.pad's 'reflect': the edge sample is not repeated), then
the absolute value is taken. Two worker processes share the images. Writes:

  OUT/maps/NAME.npy            3×H×W float32 maps
  OUT/views/NAME/NN-KERNEL.png 8-bit grey view per map, 0 black, the map's max white
  OUT/stats.csv                one row per image and map
"""
import csv
import os
import sys
from multiprocessing import Pool

import numpy as np
from PIL import Image
from scipy import ndimage

WHITE = 4095
KERNELS = {
    "sobel-x": np.array([[-1, 0, 1], [-2, 0, 2], [-1, 0, 1]], dtype=np.float32),
    "sobel-y": np.array([[-1, -2, -1], [0, 0, 0], [1, 2, 1]], dtype=np.float32),
    "laplace-8": np.array([[1, 1, 1], [1, -8, 1], [1, 1, 1]], dtype=np.float32),
}
COLUMNS = ["path", "channel", "name", "width", "height", "min", "max", "mean", "std",
           "p01", "p50", "p99", "zero_fraction", "count", "non_finite"]


def map_stats(m):
    """min, max, mean, population std, 1st/50th/99th percentiles, zero fraction,
    finite count and non-finite count of one map (statistics over finite samples)."""
    finite = np.isfinite(m)
    count = int(np.count_nonzero(finite))
    v = m if count == m.size else m[finite]
    p01, p50, p99 = np.percentile(v, [1, 50, 99])
    return [float(v.min()), float(v.max()), float(v.mean(dtype=np.float64)),
            float(v.std(dtype=np.float64)), float(p01), float(p50), float(p99),
            np.count_nonzero(m == 0) / m.size, count, m.size - count]


def process(job):
    """Maps, views and stats rows of one image."""
    src, name, out = job
    stem = os.path.splitext(name)[0]
    img = np.asarray(Image.open(src), dtype=np.float32) / WHITE
    maps = np.stack([np.abs(ndimage.correlate(img, k, mode="mirror")) for k in KERNELS.values()])
    np.save(os.path.join(out, "maps", stem + ".npy"), maps)

    view_dir = os.path.join(out, "views", stem)
    os.makedirs(view_dir, exist_ok=True)
    rows = []
    for c, (kname, m) in enumerate(zip(KERNELS, maps)):
        hi = float(m.max())
        level = np.rint(m * (255.0 / hi)) if hi > 0 else np.zeros_like(m)
        Image.fromarray(level.astype(np.uint8)).save(os.path.join(view_dir, "%02d-%s.png" % (c, kname)))
        rows.append([name, c, kname, m.shape[1], m.shape[0], *map_stats(m)])
    return rows


def main(folder, out):
    names = sorted(f for f in os.listdir(folder) if f.lower().endswith(".png"))
    os.makedirs(os.path.join(out, "maps"), exist_ok=True)
    with Pool(2) as pool:
        per_image = pool.map(process, [(os.path.join(folder, n), n, out) for n in names], chunksize=1)
    with open(os.path.join(out, "stats.csv"), "w", newline="") as f:
        writer = csv.writer(f)
        writer.writerow(COLUMNS)
        for rows in per_image:
            writer.writerows(rows)


if __name__ == "__main__":
    main(*sys.argv[1:3])
