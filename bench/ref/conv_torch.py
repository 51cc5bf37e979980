"""One convolution layer over one .npy image with PyTorch on the CPU.

Usage: python conv_torch.py IMAGE.npy WEIGHTS.npy OUT.npy STRIDE PADDING

IMAGE is a float32 H×W or C×H×W array, WEIGHTS a float32 out×in×kh×kw array (the
layout of torch's conv2d weight). Writes the out×H'×W' float32 result of
conv2d(image, weights, stride=STRIDE, padding=PADDING) (zero padding, no bias).
"""
import sys

import numpy as np
import torch
import torch.nn.functional as F

torch.set_num_threads(2)


def main(src, weights, dst, stride, padding):
    img = np.load(src)
    if img.ndim == 2:
        img = img[None]                         # one channel
    x = torch.from_numpy(img)[None]             # 1×C×H×W
    w = torch.from_numpy(np.load(weights))
    with torch.inference_mode():
        y = F.conv2d(x, w, stride=int(stride), padding=int(padding))
    np.save(dst, y[0].numpy().astype(np.float32, copy=False))


if __name__ == "__main__":
    main(*sys.argv[1:6])
