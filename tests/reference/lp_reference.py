#!/usr/bin/env python3
"""Outside reference for ballast's LP relaxation (triangle relaxation of each
unstable ReLU, Ehlers 2017), solved with scipy.optimize.linprog (HiGHS).

Run from the project root:
    /work/venv/bin/python tests/reference/lp_reference.py

For the first ROWS rows of tests/data/digits_test.csv and the 64-32-10 model
tests/data/digits_mlp.model.json, at L-inf epsilon in EPSILONS:

1. region box: clip(x - eps, lower, upper) .. clip(x + eps, lower, upper) with
   the model's input range;
2. interval pre-activation bounds of the hidden layer with numpy
   (W+ lo + W- hi + b, W+ hi + W- lo + b);
3. per target class j != label, the LP
       min (W1[y] - W1[j]) . h + b1[y] - b1[j]
       s.t. x in box; z = W0 x + b0;
            u <= 0: h = 0;  l >= 0: h = z;
            else: h >= 0, h >= z, h <= u (z - l) / (u - l)
   solved by linprog(method="highs").

Writes tests/reference/out/lp_digits.json with the bounds, the optimal values,
the certified counts (all values > 1e-6, ballast's CERTIFY_TOLERANCE), the
wall time per sample, and the library versions.
"""

import json
import os
import platform
import time

import numpy as np
import scipy
from scipy.optimize import linprog

ROWS = 100
EPSILONS = [0.01, 0.02, 0.05]
TOLERANCE = 1e-6
MODEL = "tests/data/digits_mlp.model.json"
DATA = "tests/data/digits_test.csv"
OUT = "tests/reference/out/lp_digits.json"


def load_model():
    with open(MODEL) as f:
        model = json.load(f)
    dense = [l for l in model["layers"] if l["kind"] == "dense"]
    kinds = [l["kind"] for l in model["layers"]]
    assert kinds == ["dense", "relu", "dense"], kinds
    w0 = np.array(dense[0]["weights"], dtype=float)
    b0 = np.array(dense[0]["bias"], dtype=float)
    w1 = np.array(dense[1]["weights"], dtype=float)
    b1 = np.array(dense[1]["bias"], dtype=float)
    dim = model["input"]["dim"]
    lower = np.broadcast_to(np.array(model["input"]["lower"], dtype=float), (dim,))
    upper = np.broadcast_to(np.array(model["input"]["upper"], dtype=float), (dim,))
    return w0, b0, w1, b1, lower, upper


def load_rows():
    data = np.loadtxt(DATA, delimiter=",", skiprows=1)[:ROWS]
    return data[:, 1:], data[:, 0].astype(int)


def solve_lp(w0, b0, w1, b1, lo, hi, l, u, label, target):
    n_in = w0.shape[1]
    units = [i for i in range(len(l)) if not u[i] <= 0.0]
    n = n_in + len(units)
    a_ub, b_ub, a_eq, b_eq = [], [], [], []
    bounds = [(lo[i], hi[i]) for i in range(n_in)]
    c = np.zeros(n)
    row = w1[label] - w1[target]
    for k, i in enumerate(units):
        h = n_in + k
        c[h] = row[i]
        if l[i] >= 0.0:
            # h - W0[i] x = b0[i]
            r = np.zeros(n)
            r[:n_in] = -w0[i]
            r[h] = 1.0
            a_eq.append(r)
            b_eq.append(b0[i])
            bounds.append((None, None))
        else:
            s = u[i] / (u[i] - l[i])
            # z - h <= 0  ->  W0[i] x - h <= -b0[i]
            r = np.zeros(n)
            r[:n_in] = w0[i]
            r[h] = -1.0
            a_ub.append(r)
            b_ub.append(-b0[i])
            # h - s z <= -s l  ->  h - s W0[i] x <= s b0[i] - s l
            r = np.zeros(n)
            r[:n_in] = -s * w0[i]
            r[h] = 1.0
            a_ub.append(r)
            b_ub.append(s * b0[i] - s * l[i])
            bounds.append((0.0, None))
    result = linprog(
        c,
        A_ub=np.array(a_ub) if a_ub else None,
        b_ub=np.array(b_ub) if b_ub else None,
        A_eq=np.array(a_eq) if a_eq else None,
        b_eq=np.array(b_eq) if b_eq else None,
        bounds=bounds,
        method="highs",
    )
    assert result.status == 0, result.message
    return float(result.fun + b1[label] - b1[target])


def main():
    w0, b0, w1, b1, lower, upper = load_model()
    xs, labels = load_rows()
    cases = []
    for eps in EPSILONS:
        samples = []
        certified = 0
        start = time.perf_counter()
        for r in range(len(labels)):
            x, y = xs[r], int(labels[r])
            lo = np.clip(x - eps, lower, upper)
            hi = np.clip(x + eps, lower, upper)
            wp, wn = np.maximum(w0, 0.0), np.minimum(w0, 0.0)
            l = wp @ lo + wn @ hi + b0
            u = wp @ hi + wn @ lo + b0
            targets = [j for j in range(w1.shape[0]) if j != y]
            values = [solve_lp(w0, b0, w1, b1, lo, hi, l, u, y, j) for j in targets]
            if all(v > TOLERANCE for v in values):
                certified += 1
            samples.append(
                {
                    "row": r,
                    "label": y,
                    "lower": l.tolist(),
                    "upper": u.tolist(),
                    "targets": targets,
                    "values": values,
                }
            )
        seconds = time.perf_counter() - start
        cases.append(
            {
                "epsilon": eps,
                "certified": certified,
                "seconds_per_sample": seconds / len(labels),
                "samples": samples,
            }
        )
        print(f"eps {eps}: certified {certified}/{len(labels)}, {seconds / len(labels) * 1e3:.2f} ms per sample")
    out = {
        "source": "scipy.optimize.linprog(method='highs') on the triangle-relaxation LP with numpy interval bounds",
        "model": MODEL,
        "data": DATA,
        "rows": ROWS,
        "norm": "linf",
        "certify_tolerance": TOLERANCE,
        "versions": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scipy": scipy.__version__,
        },
        "machine": {"cpus": os.cpu_count()},
        "cases": cases,
    }
    with open(OUT, "w") as f:
        json.dump(out, f)


if __name__ == "__main__":
    main()
