#!/usr/bin/env python3
"""Exact minimum classification margins of the digits MLP fixtures, computed by
a mixed-integer linear program (big-M encoding of every unstable ReLU) solved
with scipy.optimize.milp (the HiGHS branch-and-cut solver bundled in scipy).

This is the outside reference for ballast's complete verification
(src/search/, tests/search.rs) and the baseline of its benchmark
(docs/benchmarks/search.md).

Run from the project root:
    /work/venv/bin/python tests/reference/milp_reference.py            # fixtures
    /work/venv/bin/python tests/reference/milp_reference.py --bench    # timing
    (--bench --only digits_mlp_deep --eps-deep 0.06 --out F: one model, output
    elsewhere; benches/wide_compare.sh uses this)

Problem, per sample (x0, true class y) and other class j:
    minimise  logit_y(x) - logit_j(x)
    over      x with |x_i - x0_i| <= eps and 0 <= x_i <= 1   (L-inf ball
              clipped to the model's input range)
The ReLU network is encoded exactly: for a hidden unit with pre-activation
bounds l < 0 < u (unstable) the standard big-M constraints
    a >= z, a >= 0, a <= u d, a <= z - l (1 - d), d binary
and for stable units a = z (l >= 0) or a = 0 (u <= 0). The bounds l, u come
from interval arithmetic, tightened for the second and later hidden layers by
the triangle LP relaxation (scipy.optimize.linprog, HiGHS); any valid bounds
give the same exact minimum, tighter ones only make the solver faster.

Also recorded: the minimum of the triangle LP relaxation (binaries relaxed to
[0, 1]), so the fixture shows where the LP and the exact answer differ.

Outputs:
    tests/reference/out/milp_digits_mlp.json     fixture (per sample, target)
    tests/reference/out/milp_bench.json         --bench: HiGHS wall times (or --out)
"""
import argparse
import csv
import json
import os
import platform
import sys
import time

import numpy as np
import scipy
from scipy.optimize import Bounds, LinearConstraint, linprog, milp
from scipy.sparse import lil_matrix

OUT_DIR = os.path.join("tests", "reference", "out")
VERSIONS = {
    "python": platform.python_version(),
    "numpy": np.__version__,
    "scipy": scipy.__version__,
}


def load_model(path):
    with open(path) as f:
        m = json.load(f)
    layers = []
    for layer in m["layers"]:
        if layer["kind"] == "dense":
            layers.append((np.array(layer["weights"], dtype=float), np.array(layer["bias"], dtype=float)))
        elif layer["kind"] != "relu":
            raise ValueError("only dense/relu layers expected, got " + layer["kind"])
    return layers


def load_csv(path):
    with open(path) as f:
        rows = list(csv.reader(f))
    data = np.array([[float(v) for v in r] for r in rows[1:]])
    return data[:, 1:], data[:, 0].astype(int)


def forward(layers, x):
    h = x
    for k, (w, b) in enumerate(layers):
        h = w @ h + b
        if k < len(layers) - 1:
            h = np.maximum(h, 0.0)
    return h


class Encoding:
    """Variables and constraints of the network over the input box."""

    def __init__(self, layers, lo, hi, integral):
        self.layers = layers
        self.n_in = len(lo)
        self.lo_x, self.hi_x = lo, hi
        self.integral = integral
        self.pre_bounds = []
        self.build()

    def build(self):
        # variable layout: x | per hidden layer: z, a, d
        layers = self.layers
        self.index = 0
        self.var_lo, self.var_hi, self.var_int = [], [], []

        def new(count, lo, hi, integer):
            start = self.index
            self.index += count
            self.var_lo.extend(lo)
            self.var_hi.extend(hi)
            self.var_int.extend([1 if integer else 0] * count)
            return list(range(start, start + count))

        x = new(self.n_in, self.lo_x, self.hi_x, False)
        self.x = x
        rows = []  # (coefficient dict, lower, upper)
        prev = x
        prev_lo, prev_hi = np.array(self.lo_x), np.array(self.hi_x)
        for k, (w, b) in enumerate(layers[:-1]):
            # interval bounds of the pre-activation
            wp, wn = np.maximum(w, 0), np.minimum(w, 0)
            l = wp @ prev_lo + wn @ prev_hi + b
            u = wp @ prev_hi + wn @ prev_lo + b
            if k > 0:
                l, u = self.tighten(rows, prev, w, b, l, u)
            self.pre_bounds.append((l, u))
            z = new(len(b), l, u, False)
            a = new(len(b), np.maximum(l, 0), np.maximum(u, 0), False)
            d = new(len(b), [0.0] * len(b), [1.0] * len(b), self.integral)
            for i in range(len(b)):
                coef = {z[i]: 1.0}
                for p, wv in zip(prev, w[i]):
                    if wv != 0.0:
                        coef[p] = coef.get(p, 0.0) - wv
                rows.append((coef, b[i], b[i]))  # z - W prev = b
                if l[i] >= 0:
                    rows.append(({a[i]: 1.0, z[i]: -1.0}, 0.0, 0.0))
                    rows.append(({d[i]: 1.0}, 1.0, 1.0))
                elif u[i] <= 0:
                    rows.append(({a[i]: 1.0}, 0.0, 0.0))
                    rows.append(({d[i]: 1.0}, 0.0, 0.0))
                else:
                    rows.append(({a[i]: 1.0, z[i]: -1.0}, 0.0, np.inf))  # a >= z
                    rows.append(({a[i]: 1.0, d[i]: -u[i]}, -np.inf, 0.0))  # a <= u d
                    # a <= z - l (1 - d)  <=>  a - z - l d <= -l
                    rows.append(({a[i]: 1.0, z[i]: -1.0, d[i]: -l[i]}, -np.inf, -l[i]))
            prev = a
            prev_lo, prev_hi = np.maximum(l, 0), np.maximum(u, 0)
        self.rows = rows
        self.last = prev
        self.n_var = self.index

    def constraint(self, rows, n_var):
        a = lil_matrix((len(rows), n_var))
        lo, hi = [], []
        for r, (coef, l, u) in enumerate(rows):
            for c, v in coef.items():
                a[r, c] = v
            lo.append(l)
            hi.append(u)
        return LinearConstraint(a.tocsr(), lo, hi)

    def tighten(self, rows, prev, w, b, l, u):
        """Triangle-LP bounds of W prev + b over the encoding built so far (binaries relaxed)."""
        n_var = self.index
        cons = self.constraint(rows, n_var)
        bounds = list(zip(self.var_lo, self.var_hi))
        split = self._split(cons)
        l_out, u_out = l.copy(), u.copy()
        for i in range(len(b)):
            c = np.zeros(n_var)
            for p, wv in zip(prev, w[i]):
                c[p] = wv
            for sign in (1.0, -1.0):
                res = linprog(
                    sign * c,
                    bounds=bounds,
                    method="highs",
                    **split,
                )
                if res.status != 0:
                    raise RuntimeError("bound LP failed: " + res.message)
                v = sign * res.fun + b[i]
                if sign > 0:
                    l_out[i] = max(l[i], v - 1e-9)
                else:
                    u_out[i] = min(u[i], v + 1e-9)
        return l_out, u_out

    @staticmethod
    def _split(cons):
        # linprog wants A_ub x <= b_ub and A_eq x = b_eq
        a = cons.A.tocsr()
        lo, hi = np.array(cons.lb), np.array(cons.ub)
        eq = np.isclose(lo, hi)
        ub_rows, ub_vals = [], []
        for r in range(a.shape[0]):
            if eq[r]:
                continue
            if np.isfinite(hi[r]):
                ub_rows.append(a[r])
                ub_vals.append(hi[r])
            if np.isfinite(lo[r]):
                ub_rows.append(-a[r])
                ub_vals.append(-lo[r])
        from scipy.sparse import vstack

        out = {"A_eq": a[eq], "b_eq": lo[eq]}
        if ub_rows:
            out["A_ub"] = vstack(ub_rows)
            out["b_ub"] = np.array(ub_vals)
        return out

    def min_margin(self, y, j, relax=False, time_limit=600.0):
        """Minimum of logit_y - logit_j; returns (value, status, seconds, point)."""
        w, b = self.layers[-1]
        c = np.zeros(self.n_var)
        for p, wv in zip(self.last, w[y] - w[j]):
            c[p] = wv
        const = b[y] - b[j]
        cons = self.constraint(self.rows, self.n_var)
        integrality = np.zeros(self.n_var) if relax else np.array(self.var_int)
        start = time.perf_counter()
        res = milp(
            c,
            constraints=cons,
            integrality=integrality,
            bounds=Bounds(self.var_lo, self.var_hi),
            options={"time_limit": time_limit, "mip_rel_gap": 0.0, "disp": False},
        )
        seconds = time.perf_counter() - start
        if res.x is None:
            return None, res.status, seconds, None
        return res.fun + const, res.status, seconds, res.x[: self.n_in]


def pick_samples(layers, X, labels, count):
    chosen = []
    for i in range(len(X)):
        if int(np.argmax(forward(layers, X[i]))) == labels[i]:
            chosen.append(i)
        if len(chosen) == count:
            break
    return chosen


def solve_set(layers, X, labels, indices, eps, with_lp=True):
    out = []
    total = 0.0
    for i in indices:
        x0 = X[i]
        lo, hi = np.maximum(x0 - eps, 0.0), np.minimum(x0 + eps, 1.0)
        enc = Encoding(layers, lo, hi, integral=True)
        unstable = int(sum(((l < 0) & (u > 0)).sum() for l, u in enc.pre_bounds))
        y = int(labels[i])
        targets = []
        for j in range(len(layers[-1][1])):
            if j == y:
                continue
            exact, status, sec, point = enc.min_margin(y, j)
            total += sec
            if status != 0:
                raise RuntimeError(f"sample {i} target {j}: HiGHS status {status}")
            entry = {"target": j, "exact": float(exact), "seconds": sec}
            # the minimiser must give the reported margin in a plain forward pass
            logits = forward(layers, point)
            assert abs((logits[y] - logits[j]) - exact) < 1e-5, (i, j, logits[y] - logits[j], exact)
            if with_lp:
                lp, status, _, _ = enc.min_margin(y, j, relax=True)
                # None when HiGHS stops without an optimal LP (recorded, never guessed)
                entry["lp"] = float(lp) if status == 0 else None
            targets.append(entry)
        out.append({"index": int(i), "label": y, "unstable": unstable, "targets": targets})
    return out, total


def fixture():
    layers = load_model("tests/data/digits_mlp.model.json")
    X, labels = load_csv("tests/data/digits_test.csv")
    indices = pick_samples(layers, X, labels, 40)
    budgets = []
    for eps in (0.05, 0.08):
        samples, total = solve_set(layers, X, labels, indices, eps)
        robust = sum(all(t["exact"] > 0 for t in s["targets"]) for s in samples)
        lp_proved = sum(all(t["lp"] is not None and t["lp"] > 0 for t in s["targets"]) for s in samples)
        print(f"eps {eps}: exact robust {robust}/{len(samples)}, LP proves {lp_proved}, HiGHS {total:.2f} s")
        for s in samples:
            for t in s["targets"]:
                del t["seconds"]
        budgets.append({"epsilon": eps, "robust": robust, "lp_proved": lp_proved, "samples": samples})
    out = {
        "source": "tests/reference/milp_reference.py: big-M MILP solved by scipy.optimize.milp (HiGHS)",
        "model": "tests/data/digits_mlp.model.json",
        "data": "tests/data/digits_test.csv",
        "norm": "linf",
        "input_range": [0.0, 1.0],
        "selection": "first 40 test rows the model classifies correctly (numpy forward pass)",
        "versions": VERSIONS,
        "budgets": budgets,
    }
    path = os.path.join(OUT_DIR, "milp_digits_mlp.json")
    with open(path, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")
    print("wrote", path)


def bench(args):
    X, labels = load_csv("tests/data/digits_test.csv")
    runs = []
    for stem, eps in ((("digits_mlp", args.eps_mlp)), (("digits_mlp_deep", args.eps_deep))):
        if args.only and stem != args.only:
            continue
        layers = load_model(f"tests/data/{stem}.model.json")
        indices = pick_samples(layers, X, labels, 30)
        start = time.perf_counter()
        samples, milp_seconds = solve_set(layers, X, labels, indices, eps, with_lp=True)
        wall = time.perf_counter() - start
        robust = [all(t["exact"] > 0 for t in s["targets"]) for s in samples]
        lp_proved = [all(t["lp"] is not None and t["lp"] > 0 for t in s["targets"]) for s in samples]
        undecided_by_lp = sum(r and not p for r, p in zip(robust, lp_proved))
        print(
            f"{stem} eps {eps}: robust {sum(robust)}/30, LP proves {sum(lp_proved)}, "
            f"MILP solve time {milp_seconds:.2f} s (wall incl. encoding and LP {wall:.2f} s)"
        )
        runs.append(
            {
                "model": f"tests/data/{stem}.model.json",
                "epsilon": eps,
                "samples": [s["index"] for s in samples],
                "robust": robust,
                "lp_proved": lp_proved,
                "robust_but_not_lp_proved": undecided_by_lp,
                "milp_solve_seconds": milp_seconds,
                "wall_seconds_with_encoding_and_lp": wall,
                "min_margin": [min(t["exact"] for t in s["targets"]) for s in samples],
            }
        )
    out = {
        "source": "tests/reference/milp_reference.py --bench",
        "versions": VERSIONS,
        "machine": f"{platform.machine()}, {os.cpu_count()} cores",
        "runs": runs,
    }
    with open(args.out, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")
    print("wrote", args.out)


def explore():
    X, labels = load_csv("tests/data/digits_test.csv")
    for stem in ("digits_mlp", "digits_mlp_deep"):
        layers = load_model(f"tests/data/{stem}.model.json")
        indices = pick_samples(layers, X, labels, 10)
        for eps in (0.01, 0.02, 0.03, 0.05, 0.08):
            samples, total = solve_set(layers, X, labels, indices, eps)
            robust = sum(all(t["exact"] > 0 for t in s["targets"]) for s in samples)
            lp = sum(all(t["lp"] is not None and t["lp"] > 0 for t in s["targets"]) for s in samples)
            unst = np.mean([s["unstable"] for s in samples])
            print(f"{stem} eps {eps}: robust {robust}/10 lp {lp}/10 unstable {unst:.1f} milp {total:.2f}s")
            sys.stdout.flush()


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--bench", action="store_true")
    parser.add_argument("--explore", action="store_true")
    parser.add_argument("--eps-mlp", type=float, default=0.05)
    parser.add_argument("--eps-deep", type=float, default=0.02)
    parser.add_argument("--only", choices=["digits_mlp", "digits_mlp_deep"], help="--bench one model only")
    parser.add_argument("--out", default=os.path.join(OUT_DIR, "milp_bench.json"), help="--bench output")
    args = parser.parse_args()
    if args.explore:
        explore()
    elif args.bench:
        bench(args)
    else:
        fixture()
