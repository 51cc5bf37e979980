"""The script a user would write instead of `tapmap bank learn`: NumPy, Pillow and
scikit-learn, limited to 2 threads. The yardstick of bench/learn.sh.

1. Sample: --patches patch positions drawn uniformly, without replacement, over
   every position where a SIZE×SIZE patch fits inside an image, over all images
   (image sizes are read from the file headers first; then each image is read
   once, into float64 in 0…1 (16-bit / 65535, 8-bit / 255), and its patches are
   cut out, so only one image is held at a time).
2. Normalise each patch: x' = (x − mean) / sqrt(var + ε), var the population
   variance, ε = --contrast-eps (default 10/255²).
3. pca: sklearn.decomposition.PCA(n_components=K).fit(x'); prints the share
   of the variance of the first components.
   kmeans: ZCA whitening with NumPy (numpy.cov, numpy.linalg.eigh,
   W = U diag(1/sqrt(λ + ε_w)) Uᵀ, ε_w = 0.1), then
   sklearn.cluster.KMeans(algorithm="lloyd", init="k-means++", n_init=1,
   tol=0, max_iter=N) on the whitened patches as float32; prints the inertia
   (Σ‖z − c‖², the same objective as tapmap's --method lloyd) and the
   iterations run.

Nothing large is written. Usage:
  python bench/learn_reference.py --method kmeans|pca [--count K] [--size N]
      [--patches M] [--iterations N] [--seed S] FOLDER
"""
import os

# Threads are fixed before NumPy and scikit-learn load their BLAS and OpenMP.
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "2")

import argparse  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402
from PIL import Image  # noqa: E402


def list_images(folder):
    out = []
    for root, _dirs, files in os.walk(folder):
        out += [os.path.join(root, f) for f in files if f.lower().endswith((".png", ".tif", ".tiff"))]
    return sorted(out)


def read_unit(path):
    """An image as float64 in 0…1, greyscale."""
    im = Image.open(path)
    a = np.asarray(im)
    if a.ndim == 3:
        a = a[..., :3].mean(axis=2) if a.dtype != np.uint16 else a[..., 0]
    if a.dtype == np.uint16 or im.mode.startswith("I;16"):
        return a.astype(np.float64) / 65535.0
    if a.dtype == np.uint8:
        return a.astype(np.float64) / 255.0
    return a.astype(np.float64)


def sample_patches(paths, size, m, rng):
    """m patches (m × size²), uniform over all valid positions of all images."""
    dims = []
    for p in paths:
        with Image.open(p) as im:
            w, h = im.size
        dims.append((h, w))
    counts = np.array([max(h - size + 1, 0) * max(w - size + 1, 0) for h, w in dims], dtype=np.int64)
    total = int(counts.sum())
    m = min(m, total)
    picks = np.sort(rng.choice(total, size=m, replace=False))
    starts = np.concatenate([[0], np.cumsum(counts)])
    out = np.empty((m, size * size), dtype=np.float64)
    at = 0
    for i, p in enumerate(paths):
        lo, hi = np.searchsorted(picks, [starts[i], starts[i + 1]])
        if hi == lo:
            continue
        local = picks[lo:hi] - starts[i]
        pw = dims[i][1] - size + 1
        ys, xs = local // pw, local % pw
        img = read_unit(p)
        windows = np.lib.stride_tricks.sliding_window_view(img, (size, size))
        out[at:at + len(local)] = windows[ys, xs].reshape(len(local), -1)
        at += len(local)
    return out[:at], total


def normalise(x, eps):
    mean = x.mean(axis=1, keepdims=True)
    var = x.var(axis=1, keepdims=True)
    return (x - mean) / np.sqrt(var + eps)


def zca(x, eps):
    mu = x.mean(axis=0)
    values, vectors = np.linalg.eigh(np.cov(x, rowvar=False))
    w = vectors @ np.diag(1.0 / np.sqrt(np.maximum(values, 0.0) + eps)) @ vectors.T
    return (x - mu) @ w


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--method", choices=("kmeans", "pca"), required=True)
    ap.add_argument("--count", type=int, default=64)
    ap.add_argument("--size", type=int, default=7)
    ap.add_argument("--patches", type=int, default=200_000)
    ap.add_argument("--iterations", type=int, default=20)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--contrast-eps", type=float, default=10.0 / 255.0 ** 2)
    ap.add_argument("--whiten-eps", type=float, default=0.1)
    ap.add_argument("folder")
    a = ap.parse_args()

    paths = list_images(a.folder)
    if not paths:
        sys.exit("no images in %s" % a.folder)
    rng = np.random.default_rng(a.seed)
    x, positions = sample_patches(paths, a.size, a.patches, rng)
    x = normalise(x, a.contrast_eps)
    if a.method == "pca":
        from sklearn.decomposition import PCA

        p = PCA(n_components=a.count).fit(x)
        shown = ", ".join("%.1f%%" % (100 * r) for r in p.explained_variance_ratio_[:4])
        print("reference: pca of %d patches of %d image(s) (%d positions); variance explained %s"
              % (len(x), len(paths), positions, shown))
    else:
        from sklearn.cluster import KMeans

        z = zca(x, a.whiten_eps).astype(np.float32)
        km = KMeans(n_clusters=a.count, algorithm="lloyd", init="k-means++", n_init=1,
                    max_iter=a.iterations, tol=0, random_state=a.seed).fit(z)
        print("reference: kmeans (lloyd) of %d patches of %d image(s) (%d positions); "
              "objective %.6e after %d iteration(s)" % (len(z), len(paths), positions, km.inertia_, km.n_iter_))


main()
