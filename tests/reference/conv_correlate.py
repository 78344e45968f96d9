#!/usr/bin/env python3
"""Convolution arithmetic on random tensors, computed with scipy.signal.correlate.

Run from the project root:
    /work/venv/bin/python tests/reference/conv_correlate.py

For each case (seeded numpy draws: 1-D or 2-D, 1-3 input channels, 1-4 output
channels, kernel 1-4 per axis, stride 1-3, dilation 1-3, padding 0-2 before and
after each axis, independently), the output channel o is
    b[o] + sum over input channels c of correlate(pad(x[c]), dilate(k[o, c]), "valid")
sampled every `stride` positions, where pad() adds the zeros with numpy.pad and
dilate() spreads the kernel taps `dilation` apart with zeros between them. This
is the cross-correlation ONNX Conv (group = 1) and ballast's conv layer define,
written with scipy's own routine (method="direct", so no FFT rounding).

Writes tests/reference/out/conv_correlate.json: per case the input shape
([C, L] or [C, H, W]), x row-major, the kernel nested [out][in][k] or
[out][in][kh][kw], bias, stride / dilation (one per spatial axis), padding in
ballast's order ([left, right] or [top, left, bottom, right]) and the expected
output row-major ([out, L'] or [out, H', W']). Deterministic.
"""
import json
import os
import platform
import sys

import numpy as np
import scipy
from scipy.signal import correlate

OUT_FILE = os.path.join("tests", "reference", "out", "conv_correlate.json")
CASES = 40


def dilate(kernel, dilation):
    shape = tuple((k - 1) * d + 1 for k, d in zip(kernel.shape, dilation))
    spread = np.zeros(shape)
    spread[tuple(slice(None, None, d) for d in dilation)] = kernel
    return spread


def reference(x, kernel, bias, stride, dilation, before, after):
    """x: [C, *spatial]; kernel: [M, C, *k]; before / after: pads per spatial axis."""
    padded = np.pad(x, [(0, 0)] + list(zip(before, after)))
    out = []
    for o in range(kernel.shape[0]):
        total = sum(correlate(padded[c], dilate(kernel[o, c], dilation), mode="valid", method="direct")
                    for c in range(x.shape[0]))
        out.append(total[tuple(slice(None, None, s) for s in stride)] + bias[o])
    return np.stack(out)


def main():
    if not os.path.isdir(os.path.join("tests", "reference")):
        sys.exit("run from the project root")
    rng = np.random.default_rng(2718)
    cases = []
    while len(cases) < CASES:
        rank = 1 + len(cases) % 2
        channels, out_channels = int(rng.integers(1, 4)), int(rng.integers(1, 5))
        length = int(rng.integers(4, 13))
        spatial = (length,) if rank == 1 else (int(rng.integers(3, 9)), length)
        kernel_size = tuple(int(rng.integers(1, 5)) for _ in range(rank))
        stride = [int(rng.integers(1, 4)) for _ in range(rank)]
        dilation = [int(rng.integers(1, 4)) for _ in range(rank)]
        before = [int(rng.integers(0, 3)) for _ in range(rank)]
        after = [int(rng.integers(0, 3)) for _ in range(rank)]
        reach = [(k - 1) * d + 1 for k, d in zip(kernel_size, dilation)]
        if any(n + b + a < r for n, b, a, r in zip(spatial, before, after, reach)):
            continue  # the kernel does not fit: no output
        x = rng.normal(0, 1, (channels, *spatial))
        kernel = rng.normal(0, 1, (out_channels, channels, *kernel_size))
        bias = rng.normal(0, 0.5, out_channels)
        expected = reference(x, kernel, bias, stride, dilation, before, after)
        padding = [before[0], after[0]] if rank == 1 else [before[0], before[1], after[0], after[1]]
        cases.append({
            "shape": [channels, *spatial],
            "x": x.ravel().tolist(),
            "kernel": kernel.tolist(),
            "bias": bias.tolist(),
            "stride": stride,
            "dilation": dilation,
            "padding": padding,
            "output_shape": list(expected.shape),
            "expected": expected.ravel().tolist(),
        })
    out = {
        "versions": {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__},
        "script": "tests/reference/conv_correlate.py",
        "source": "scipy.signal.correlate(mode='valid', method='direct') on numpy.pad-ded inputs with dilated kernels",
        "cases": cases,
    }
    with open(OUT_FILE, "w") as f:
        json.dump(out, f)
        f.write("\n")
    print(len(cases), "cases;", sum(len(c["shape"]) == 3 for c in cases), "2-D")


if __name__ == "__main__":
    main()
