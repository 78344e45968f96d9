#!/usr/bin/env python3
"""Per-sample numpy backward linear relaxation (Zhang et al. 2018, CROWN with
adaptive lower slopes) of a ReLU classifier over the L-inf ball clipped to the
model's input range; the reference side of benches/wide_compare.sh.

For each correctly classified sample (x0, y), region [max(x0 - eps, lower),
min(x0 + eps, upper)]:
  - first hidden layer: interval bounds (exact for one affine map over a box);
  - every later hidden layer k: interval bounds from the previous layer's
    bounds, then, for the units those leave unstable, the backward pass from
    layer k to the input through the ReLU relaxations of the earlier layers,
    keeping the tighter of the two (both are sound);
  - the margins z_y - z_j (all j != y) by the same backward pass.
ReLU relaxation of a unit with pre-activation bounds l < 0 < u: upper line
u / (u - l) * (z - l); lower line a * z with a = 1 if u > -l else 0 (the
adaptive choice); stable units are exact. A backward pass carries
coefficients Lambda (rows = bounds wanted): positive entries take the lower
line, negative ones the upper line; the result is concretised over the box as
Lambda @ centre - |Lambda| @ radius + constant. All work per sample is matrix
products; there are no Python loops over units.

A sample is certified when every margin lower bound is > 0. Timed: only the
loop over the samples (clean forward pass and bounds), not loading. After the
timing, a soundness self-check evaluates each sample's margins at random
points of its region and at the box corner minimising each final linear bound
and asserts none is below its bound.

Run from the project root:
    /work/venv/bin/python tests/reference/crown_reference.py --model M --data D --eps 0.02 [0.03 ...]
        [--json out.json]
"""
import argparse
import json
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from ballast_files import forward, load_data, load_model  # noqa: E402


def relaxation(l, u):
    """Per unit: lower slope, upper slope, upper intercept (relu(z) between the lines on [l, u])."""
    unstable = (l < 0) & (u > 0)
    active = l >= 0
    s_up = np.where(unstable, u / np.where(unstable, u - l, 1.0), active.astype(float))
    t_up = np.where(unstable, -s_up * l, 0.0)
    s_lo = np.where(unstable, (u > -l).astype(float), active.astype(float))
    return s_lo, s_up, t_up


def backward(layers, relax, lam, const, k, centre, radius):
    """Lower bounds of lam @ relu(z_{k-1}) + const over the box, back through layers k-1 .. 0."""
    for j in range(k - 1, -1, -1):
        s_lo, s_up, t_up = relax[j]
        neg = np.minimum(lam, 0.0)
        pos = lam - neg
        const = const + neg @ t_up
        lam = pos * s_lo + neg * s_up  # now acting on z_j = W_j relu(z_{j-1}) + b_j
        w, b = layers[j]
        const = const + lam @ b
        lam = lam @ w
    return lam @ centre - np.abs(lam) @ radius + const, lam


def margin_bounds(layers, abs_w0, x0, label, lo, hi):
    """Lower bounds of z_label - z_j for all j != label, and the final input coefficients."""
    centre, radius = (lo + hi) / 2, (hi - lo) / 2
    w0, b0 = layers[0]
    z = w0 @ centre + b0
    l, u = z - abs_w0 @ radius, z + abs_w0 @ radius
    relax = [relaxation(l, u)]
    for k in range(1, len(layers) - 1):
        w, b = layers[k]
        # interval step from the previous bounds
        a_lo, a_hi = np.maximum(l, 0.0), np.maximum(u, 0.0)
        mid, rad = w @ ((a_lo + a_hi) / 2) + b, np.abs(w) @ ((a_hi - a_lo) / 2)
        l, u = mid - rad, mid + rad
        open_ = np.flatnonzero((l < 0) & (u > 0))
        if open_.size:
            rows = w[open_]
            lam = np.vstack([rows, -rows])
            const = np.concatenate([b[open_], -b[open_]])
            bound, _ = backward(layers, relax, lam, const, k, centre, radius)
            l[open_] = np.maximum(l[open_], bound[: open_.size])
            u[open_] = np.minimum(u[open_], -bound[open_.size:])
        relax.append(relaxation(l, u))
    w, b = layers[-1]
    others = np.array([j for j in range(len(b)) if j != label])
    lam = w[label] - w[others]
    const = b[label] - b[others]
    return backward(layers, relax, lam, const, len(layers) - 1, centre, radius), others


def run(layers, lower, upper, x, y, eps):
    abs_w0 = np.abs(layers[0][0])
    start = time.perf_counter()
    correct = forward(layers, x).argmax(axis=1) == y
    bounds = {}
    for i in np.flatnonzero(correct):
        lo, hi = np.maximum(x[i] - eps, lower), np.minimum(x[i] + eps, upper)
        bounds[i] = margin_bounds(layers, abs_w0, x[i], y[i], lo, hi)
    seconds = time.perf_counter() - start
    certified = [int(i) for i, ((b, _), _) in bounds.items() if (b > 0).all()]
    return correct, bounds, certified, seconds


def self_check(layers, lower, upper, x, y, eps, bounds, points=64, seed=0):
    """Margins at random points and at the minimising corners are never below the bounds."""
    rng = np.random.default_rng(seed)
    for i, ((bound, lam), others) in bounds.items():
        lo, hi = np.maximum(x[i] - eps, lower), np.minimum(x[i] + eps, upper)
        corners = np.where(lam < 0, hi, lo)  # minimiser of each final linear function over the box
        pts = np.vstack([rng.uniform(lo, hi, size=(points, len(lo))), corners])
        logits = forward(layers, pts)
        margins = logits[:, [y[i]]] - logits[:, others]
        slack = 1e-9 * (1 + np.abs(margins))
        assert (margins >= bound - slack).all(), f"row {i}: a margin below its lower bound"


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", required=True)
    parser.add_argument("--data", required=True)
    parser.add_argument("--eps", type=float, nargs="+", required=True)
    parser.add_argument("--json", help="write the results here")
    args = parser.parse_args()
    layers, lower, upper, model = load_model(args.model)
    x, y = load_data(args.data, model)
    results = []
    for eps in args.eps:
        correct, bounds, certified, seconds = run(layers, lower, upper, x, y, eps)
        self_check(layers, lower, upper, x, y, eps, bounds)
        n_correct = int(correct.sum())
        result = {"epsilon": eps, "samples": len(y), "correct": n_correct, "certified": len(certified),
                  "open": n_correct - len(certified), "seconds": seconds, "certified_rows": certified}
        results.append(result)
        print(f"eps {eps}: certified {len(certified)} of {n_correct} correctly classified ({len(y)} rows), "
              f"open {n_correct - len(certified)} ({(n_correct - len(certified)) / n_correct:.1%}); "
              f"bound loop {seconds:.2f} s (self-check passed)")
    if args.json:
        with open(args.json, "w") as f:
            json.dump({"source": "tests/reference/crown_reference.py", "model": args.model, "data": args.data,
                       "numpy": np.__version__, "results": results}, f, indent=1)
            f.write("\n")


if __name__ == "__main__":
    main()
