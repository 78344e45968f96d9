#!/usr/bin/env python3
"""Reference L-inf PGD written directly in numpy, used as an outside check of
ballast's attack on the digits MLP fixture.

Algorithm (textbook projected gradient descent, Madry et al. 2018, on the
margin loss of Carlini & Wagner 2017):
  loss(x)  = z_y(x) - max_{j != y} z_j(x)       (negative = misclassified)
  restart 0 starts at the clean point, restarts 1.. start uniformly at random
  in [x - eps, x + eps] clipped to the input range [0, 1];
  each step: x <- clip(x - alpha * sign(grad loss(x)), box), with the fixed
  step alpha = 2.5 * eps / steps (a rule of thumb for PGD step sizes, quoted
  from memory);
  a sample counts as attacked successfully as soon as an iterate (or the
  final point) is predicted as another class by numpy's argmax (first index
  wins ties, as in ballast) and lies inside the box.
Gradients are backpropagated by hand through the dense / relu layers of the
ballast.model/1 file (no autodiff library).

Run from the project root:
    /work/venv/bin/python tests/reference/pgd_reference.py            # counts
    /work/venv/bin/python tests/reference/pgd_reference.py --benchmark  # timing

Writes tests/reference/out/pgd_digits.json (counts per eps with the budget,
seed and library versions). --benchmark prints one JSON line of samples per
second (full budget, no early exit, correctly classified samples among the
first --samples rows) and writes nothing.
"""
import argparse
import csv
import json
import os
import platform
import sys
import time

import numpy as np

MODEL = os.path.join("tests", "data", "digits_mlp.model.json")
DATA = os.path.join("tests", "data", "digits_test.csv")
OUT = os.path.join("tests", "reference", "out", "pgd_digits.json")
EPSILONS = [0.02, 0.05, 0.1]
STEPS = 100
RESTARTS = 5
SAMPLES = 540
SEED = 20240601


def load_model(path):
    """Dense layers as (W, b) with W of shape out x in, relu flags between."""
    with open(path) as f:
        model = json.load(f)
    dim = model["input"]["dim"]
    lower = model["input"].get("lower", -np.inf)
    upper = model["input"].get("upper", np.inf)
    lower = np.broadcast_to(np.asarray(lower, dtype=np.float64), (dim,)).copy()
    upper = np.broadcast_to(np.asarray(upper, dtype=np.float64), (dim,)).copy()
    layers = []
    for layer in model["layers"]:
        kind = layer["kind"]
        if kind == "dense":
            layers.append(("dense", np.asarray(layer["weights"], dtype=np.float64),
                           np.asarray(layer["bias"], dtype=np.float64)))
        elif kind == "relu":
            layers.append(("relu", None, None))
        elif kind == "normalize":
            std = np.asarray(layer["std"], dtype=np.float64)
            mean = np.asarray(layer["mean"], dtype=np.float64)
            layers.append(("dense", np.diag(1.0 / std), -mean / std))
        else:
            raise ValueError(f"unknown layer kind {kind}")
    return layers, lower, upper


def load_data(path, count):
    with open(path) as f:
        rows = list(csv.reader(f))
    header, rows = rows[0], rows[1 : 1 + count]
    label_index = header.index("label")
    labels = np.array([int(r[label_index]) for r in rows])
    features = np.array(
        [[float(v) for i, v in enumerate(r) if i != label_index] for r in rows]
    )
    return features, labels


def forward(layers, x):
    """x: (n, dim). Returns logits (n, classes) and the cache for backprop."""
    cache = []
    h = x
    for kind, w, b in layers:
        if kind == "dense":
            cache.append(("dense", w))
            h = h @ w.T + b
        else:
            mask = h > 0
            cache.append(("relu", mask))
            h = h * mask
    return h, cache


def backward(cache, grad_out):
    g = grad_out
    for kind, item in reversed(cache):
        if kind == "dense":
            g = g @ item
        else:
            g = g * item
    return g


def margin_grad(layers, x, y):
    """Margin z_y - max_{j != y} z_j for each row and its input gradient."""
    logits, cache = forward(layers, x)
    n = x.shape[0]
    rows = np.arange(n)
    others = logits.copy()
    others[rows, y] = -np.inf
    target = others.argmax(axis=1)
    margin = logits[rows, y] - logits[rows, target]
    grad_out = np.zeros_like(logits)
    grad_out[rows, y] = 1.0
    grad_out[rows, target] -= 1.0
    return margin, backward(cache, grad_out), logits


def pgd_sample(layers, x0, y, eps, lower, upper, rng, steps, restarts, early_exit=True):
    """Per-sample PGD; returns True when a counterexample was found."""
    lo = np.maximum(x0 - eps, lower)
    hi = np.minimum(x0 + eps, upper)
    alpha = 2.5 * eps / steps
    found = False
    yy = np.array([y])
    for r in range(restarts):
        x = x0.copy() if r == 0 else rng.uniform(lo, hi)
        for _ in range(steps):
            _, g, logits = margin_grad(layers, x[None, :], yy)
            if logits[0].argmax() != y:
                found = True
                if early_exit:
                    return True
            x = np.clip(x - alpha * np.sign(g[0]), lo, hi)
        logits, _ = forward(layers, x[None, :])
        if logits[0].argmax() != y:
            found = True
            if early_exit:
                return True
    return found


def pgd_batch_full_budget(layers, x0, y, eps, lower, upper, rng, steps, restarts):
    """All samples at once (vectorised over samples), full budget, no early exit."""
    lo = np.maximum(x0 - eps, lower)
    hi = np.minimum(x0 + eps, upper)
    alpha = 2.5 * eps / steps
    found = np.zeros(x0.shape[0], dtype=bool)
    for r in range(restarts):
        x = x0.copy() if r == 0 else rng.uniform(lo, hi)
        for _ in range(steps):
            _, g, logits = margin_grad(layers, x, y)
            found |= logits.argmax(axis=1) != y
            x = np.clip(x - alpha * np.sign(g), lo, hi)
        logits, _ = forward(layers, x)
        found |= logits.argmax(axis=1) != y
    return found


def counts():
    layers, lower, upper = load_model(MODEL)
    features, labels = load_data(DATA, SAMPLES)
    logits, _ = forward(layers, features)
    correct = logits.argmax(axis=1) == labels
    results = []
    for eps in EPSILONS:
        rng = np.random.default_rng(SEED)
        found = [
            bool(correct[i]) and pgd_sample(layers, features[i], labels[i], eps, lower, upper,
                                             rng, STEPS, RESTARTS)
            for i in range(len(labels))
        ]
        results.append({
            "epsilon": eps,
            "counterexamples": int(sum(found)),
            "found": [i for i, f in enumerate(found) if f],
        })
        print(f"eps {eps}: {sum(found)} counterexamples among {int(correct.sum())} "
              f"correctly classified samples", file=sys.stderr)
    out = {
        "source": "tests/reference/pgd_reference.py: per-sample numpy PGD (L-inf, margin loss)",
        "model": MODEL,
        "data": f"{DATA}, first {SAMPLES} rows",
        "norm": "linf",
        "steps": STEPS,
        "restarts": RESTARTS,
        "step_size": "2.5 * eps / steps (fixed)",
        "seed": SEED,
        "samples": SAMPLES,
        "clean_correct": int(correct.sum()),
        "misclassified": [int(i) for i in np.nonzero(~correct)[0]],
        "results": results,
        "versions": {"python": platform.python_version(), "numpy": np.__version__},
    }
    os.makedirs(os.path.dirname(OUT), exist_ok=True)
    with open(OUT, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")


def benchmark(samples, eps):
    layers, lower, upper = load_model(MODEL)
    features, labels = load_data(DATA, samples)
    logits, _ = forward(layers, features)
    correct = logits.argmax(axis=1) == labels
    features, labels = features[correct], labels[correct]
    rng = np.random.default_rng(SEED)
    start = time.perf_counter()
    for i in range(len(labels)):
        pgd_sample(layers, features[i], labels[i], eps, lower, upper, rng, STEPS, RESTARTS,
                   early_exit=False)
    per_sample = time.perf_counter() - start
    start = time.perf_counter()
    pgd_batch_full_budget(layers, features, labels, eps, lower, upper, rng, STEPS, RESTARTS)
    batched = time.perf_counter() - start
    print(json.dumps({
        "samples": len(labels),
        "steps": STEPS,
        "restarts": RESTARTS,
        "epsilon": eps,
        "numpy_per_sample_samples_per_second": len(labels) / per_sample,
        "numpy_batched_samples_per_second": len(labels) / batched,
        "numpy": np.__version__,
    }))


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--benchmark", action="store_true")
    parser.add_argument("--samples", type=int, default=100)
    parser.add_argument("--eps", type=float, default=0.05)
    args = parser.parse_args()
    if args.benchmark:
        benchmark(args.samples, args.eps)
    else:
        counts()


if __name__ == "__main__":
    main()
