"""Sobel x and y of one float32 .npy image with NumPy and SciPy.

Usage: python sobel_scipy.py IMAGE.npy OUT.npy

Correlates the image with the 3×3 Sobel taps (zero outside the image, output the
size of the input) and writes a 2×H×W float32 array: [sobel-x, sobel-y].
"""
import sys

import numpy as np
from scipy import ndimage

# x to the right, y downwards: positive where brightness rises to the right / downwards.
SOBEL_X = np.array([[-1, 0, 1],
                    [-2, 0, 2],
                    [-1, 0, 1]], dtype=np.float32)
SOBEL_Y = SOBEL_X.T


def main(src, dst):
    img = np.load(src)
    gx = ndimage.correlate(img, SOBEL_X, mode="constant", cval=0.0)
    gy = ndimage.correlate(img, SOBEL_Y, mode="constant", cval=0.0)
    np.save(dst, np.stack([gx, gy]).astype(np.float32, copy=False))


if __name__ == "__main__":
    main(*sys.argv[1:3])
