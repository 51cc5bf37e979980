"""Records NumPy's figures for the statistics tapmap writes to stats.csv, on
maps the tests can rebuild exactly, as reference values.

Each map is float32 samples v_i = f32((((i * a + b) mod m) - c) / d) for
i = 0 .. n-1 (integer arithmetic, then one division in float64, then rounding
to float32), with some samples set to 0.0 or NaN as each case says. For every
map: numpy.percentile (method 'linear', Hyndman & Fan definition 7, its
default) at 1, 50 and 99 over the finite samples taken as float64, the
minimum, maximum, mean and population standard deviation (ddof 0) in float64,
and the fraction of samples exactly 0.

Run: python3 tools/numpy_stats_cases.py > shared/reference/numpy_stats.json
Needs numpy; the tests read the JSON and do not need numpy.
"""
import json
import math

import numpy as np

CASES = [
    # name, n, a, b, m, c, d, zero_every, nan_every
    ("small ramp", 1001, 7, 3, 1000, 500, 37.0, 0, 0),
    ("small with zeros and NaN", 4097, 7919, 13, 9973, 4000, 101.0, 5, 17),
    ("large, few distinct values", 100003, 31, 7, 9, 4, 1.0, 0, 0),
    ("large, spread", 262147, 104729, 11, 1000003, 500000, 3.0e4, 0, 0),
    ("large, mostly zero", 200001, 48271, 1, 2147483647, 1073741823, 1.0e9, 2, 0),
    ("large with NaN", 131075, 69621, 5, 65537, 30000, 7.0, 0, 3),
]


def build(n, a, b, m, c, d, zero_every, nan_every):
    i = np.arange(n, dtype=np.int64)
    v = ((((i * a + b) % m) - c) / d).astype(np.float32)
    if zero_every:
        v[::zero_every] = 0.0
    if nan_every:
        v[1::nan_every] = np.nan
    return v


out = []
for name, n, a, b, m, c, d, z, q in CASES:
    v = build(n, a, b, m, c, d, z, q)
    f = v[np.isfinite(v)].astype(np.float64)
    p = np.percentile(f, [1, 50, 99])
    out.append({
        "name": name, "n": n, "a": a, "b": b, "m": m, "c": c, "d": d,
        "zero_every": z, "nan_every": q,
        "count": int(f.size), "non_finite": int(n - f.size),
        "min": float(f.min()), "max": float(f.max()), "mean": float(f.mean()),
        "std": float(f.std()), "p01": float(p[0]), "p50": float(p[1]), "p99": float(p[2]),
        "zero_fraction": float(np.count_nonzero(v == 0.0) / n),
    })
print('{"source": %s,' % json.dumps(
    "numpy.percentile (method linear), min, max, mean, std (ddof 0) and the zero fraction, "
    "NumPy %s, recorded by tools/numpy_stats_cases.py" % np.__version__))
print(' "cases": [')
print(",\n".join("  " + json.dumps(c) for c in out))
print(" ]}")
