"""Round trip of weights through NumPy itself: numpy.save and numpy.savez write
them, `tapmap bank import` reads them, and every tap must equal the value NumPy
holds (after conversion to float32, exactly).

Usage: python3 tools/numpy_weights_roundtrip.py PATH/TO/tapmap
Needs numpy; Python 3.11+ for tomllib.
"""
import os
import subprocess
import sys
import tempfile
import tomllib

import numpy as np

BIN = sys.argv[1]


def import_bank(path, *args):
    out = path + ".toml"
    subprocess.run([BIN, "bank", "import", path, "-o", out, *args], check=True, capture_output=True)
    with open(out, "rb") as f:
        return tomllib.load(f)


def taps_of(bank):
    """Bank taps as an out x in x kh x kw float array."""
    ks = bank["kernel"]
    planes = [k["planes"] if "planes" in k else [k["taps"]] for k in ks]
    return np.array(planes, dtype=np.float64)


def check(name, want, bank, bias=None):
    got = taps_of(bank)
    want32 = want.astype(np.float32).astype(np.float64)
    if got.shape != want32.shape or not np.array_equal(got, want32):
        sys.exit("%s: taps differ (shape %s vs %s)" % (name, got.shape, want32.shape))
    if bias is not None:
        b = np.array([k["bias"] for k in bank["kernel"]])
        if not np.array_equal(b, bias.astype(np.float32).astype(np.float64)):
            sys.exit("%s: bias differs" % name)
    print("%s: %d kernels of %s exact" % (name, got.shape[0], "x".join(map(str, got.shape[1:]))))


rng = np.random.default_rng(20261202)
with tempfile.TemporaryDirectory() as d:
    w = rng.standard_normal((6, 3, 5, 5))
    for dtype in (np.float32, np.float64, np.float16):
        p = os.path.join(d, "w_%s.npy" % np.dtype(dtype).name)
        np.save(p, w.astype(dtype))
        check(os.path.basename(p), w.astype(dtype), import_bank(p))
    p = os.path.join(d, "w_fortran.npy")
    np.save(p, np.asfortranarray(w.astype(np.float32)))
    check("w_fortran.npy", w.astype(np.float32), import_bank(p))
    p = os.path.join(d, "w_big_endian.npy")
    np.save(p, w.astype(">f4"))
    check("w_big_endian.npy", w.astype(">f4"), import_bank(p))
    b = rng.standard_normal(6)
    p = os.path.join(d, "model.npz")
    np.savez(p, conv1_w=w.astype(np.float32), conv1_b=b.astype(np.float32), other=np.zeros((2, 2)))
    check("model.npz", w.astype(np.float32), import_bank(p, "--tensor", "conv1_w", "--bias", "conv1_b"), b)
    p = os.path.join(d, "packed.npz")
    np.savez_compressed(p, weights=w.astype(np.float32))
    check("packed.npz (deflated)", w.astype(np.float32), import_bank(p))
    hwio = np.transpose(w, (2, 3, 1, 0)).astype(np.float32)
    p = os.path.join(d, "hwio.npy")
    np.save(p, hwio)
    check("hwio.npy", w.astype(np.float32), import_bank(p, "--layout", "hwio"))
print("numpy %s: weights round-trip exactly" % np.__version__)
