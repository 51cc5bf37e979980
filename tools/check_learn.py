"""bank learn against NumPy and scikit-learn, on the shipped samples.

1. PCA: the components equal numpy.linalg.eigh of numpy.cov of the very
   patches tapmap sampled (written by --keep-patches), up to sign, to 1e-4;
   the explained variances equal the eigenvalues (numpy.linalg.eigh,
   https://numpy.org/doc/stable/reference/generated/numpy.linalg.eigh.html).
2. Lloyd k-means on the same whitened patches: tapmap's objective equals the
   inertia of its centroids computed here, and is within 1% of
   sklearn.cluster.KMeans(algorithm="lloyd") with the same number of starts
   (https://scikit-learn.org/stable/modules/generated/sklearn.cluster.KMeans.html).

Usage: python3 tools/check_learn.py path/to/tapmap
"""
import subprocess
import sys
import tempfile
import tomllib
from pathlib import Path

import numpy as np


def learn(tapmap, out, *args):
    subprocess.run(
        [tapmap, "bank", "learn", "-q", "--force", "-o", str(out), *args, "sample_data/line-a"],
        check=True,
    )
    with open(out, "rb") as f:
        return tomllib.load(f)


def taps(bank):
    return np.array([np.ravel(k.get("taps", k.get("planes"))) for k in bank["kernel"]])


def main():
    tapmap = sys.argv[1]
    work = Path(tempfile.mkdtemp())

    bank = learn(tapmap, work / "pca.toml", "--method", "pca", "--size", "7", "--count", "8",
                 "--patches", "40000", "--keep-patches", str(work / "pca.npy"))
    x = np.load(work / "pca.npy").astype(np.float64)
    values, vectors = np.linalg.eigh(np.cov(x, rowvar=False))
    order = np.argsort(values)[::-1]
    values, vectors = values[order], vectors[:, order]
    t = taps(bank)
    worst = 0.0
    for j in range(len(t)):
        v = vectors[:, j] * np.sign(vectors[:, j] @ t[j])
        worst = max(worst, np.abs(v - t[j]).max())
    ev = np.array(bank["learned"]["explained_variance"])
    ev_err = np.abs(ev - values[: len(ev)]).max() / values[0]
    print(f"pca: components differ from numpy.linalg.eigh by at most {worst:.2e}; "
          f"variances by {ev_err:.2e} of the largest")
    assert worst < 1e-4 and ev_err < 1e-6

    from sklearn.cluster import KMeans

    k, starts = 16, 10
    bank = learn(tapmap, work / "lloyd.toml", "--method", "lloyd", "--size", "7", "--count",
                 str(k), "--patches", "40000", "--restarts", str(starts), "--iterations", "300",
                 "--tolerance", "0", "--keep-patches", str(work / "k.npy"))
    x = np.load(work / "k.npy").astype(np.float64)
    mean = np.load(work / "k-mean.npy")
    w = np.load(work / "k-whitening.npy")
    z = (x - mean) @ w
    # The bank's taps are W c (and W is invertible): the centroids back in z's space.
    c = np.linalg.solve(w, taps(bank).T).T
    d2 = (z * z).sum(1)[:, None] - 2 * z @ c.T + (c * c).sum(1)[None, :]
    ours = float(np.maximum(d2.min(1), 0).sum())
    said = bank["learned"]["objective"][-1]
    theirs = KMeans(n_clusters=k, algorithm="lloyd", n_init=starts, max_iter=300, tol=0,
                    random_state=0).fit(z.astype(np.float32)).inertia_
    rel = (said - theirs) / theirs
    print(f"lloyd: tapmap objective {said:.6e} (recomputed here {ours:.6e}); "
          f"scikit-learn inertia {theirs:.6e}; tapmap is {100 * rel:+.2f}%")
    assert abs(ours - said) <= 1e-4 * said
    assert abs(rel) <= 0.01


main()
