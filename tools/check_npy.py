"""Interoperability check: numpy.load reads every map tapmap wrote, as float32
C x H x W arrays. Usage: python3 tools/check_npy.py MAPS_DIR [EXPECTED_CHANNELS]"""
import pathlib
import sys

import numpy as np

root = pathlib.Path(sys.argv[1])
want_c = int(sys.argv[2]) if len(sys.argv) > 2 else None
files = sorted(root.rglob("*.npy"))
if not files:
    sys.exit(f"no .npy files under {root}")
for f in files:
    a = np.load(f)
    if a.dtype != np.float32 or a.ndim != 3 or not a.flags["C_CONTIGUOUS"]:
        sys.exit(f"{f}: dtype {a.dtype}, ndim {a.ndim}; expected float32 C x H x W")
    if want_c is not None and a.shape[0] != want_c:
        sys.exit(f"{f}: {a.shape[0]} channels, expected {want_c}")
    if not np.isfinite(a).all():
        sys.exit(f"{f}: non-finite values")
    print(f"{f}: {a.shape} {a.dtype} min {a.min():.4g} max {a.max():.4g}")
print(f"numpy {np.__version__} read {len(files)} map file(s)")
