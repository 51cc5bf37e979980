"""Records numpy.pad outputs for pads wider than the array, and for 1-sample
arrays, as reference values for tapmap's border tests.

Run: python3 tools/numpy_pad_cases.py > shared/reference/numpy_pad_wide.json
Needs numpy; the tests read the JSON and do not need numpy.
"""
import json

import numpy as np

MODES = {"zero": ("constant", {"constant_values": 0}), "replicate": ("edge", {}),
         "reflect": ("reflect", {}), "symmetric": ("symmetric", {}), "wrap": ("wrap", {})}
ARRAYS = [[1, 2, 3, 4, 5], [7, 9], [4], [1, 2, 3]]
PADS = [(2, 3), (6, 0), (0, 9), (11, 7), (1, 1)]

cases = []
for a in ARRAYS:
    for before, after in PADS:
        for ours, (np_mode, kw) in MODES.items():
            out = np.pad(np.array(a, dtype=np.int64), (before, after), mode=np_mode, **kw)
            cases.append({"input": a, "before": before, "after": after, "mode": ours,
                          "numpy_mode": np_mode, "output": [int(v) for v in out]})
# One case per line keeps the file short and diffs readable.
print('{"source": %s,' % json.dumps(
    "numpy.pad output, NumPy %s, recorded by tools/numpy_pad_cases.py" % np.__version__))
print(' "cases": [')
print(",\n".join("  " + json.dumps(c) for c in cases))
print(" ]}")
