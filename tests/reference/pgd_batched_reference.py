#!/usr/bin/env python3
"""Batched numpy L-inf PGD (Madry et al. 2018) on the margin loss of Carlini &
Wagner (2017), every sample stepped at once as one matrix; the reference side
of benches/wide_compare.sh.

Loss: z_y(x) - max_{j != y} z_j(x) (negative = misclassified), gradient by
hand-written backpropagation. Region per sample: [max(x0 - eps, lower),
min(x0 + eps, upper)]. Schedule, mirroring ballast's untargeted runs
(src/attack/runner.rs, docs/attack.md, AttackSettings::default()):
  - 5 restarts of 100 steps; restart 0 starts at the sample itself (the
    centre), restarts 1..4 uniformly at random in the region (numpy
    default_rng(--seed), drawn for the samples still running);
  - step x <- clip(x - a * eps * sign(grad), region), a starting at 0.25 and
    halved, going back to the run's best point, after 10 steps without a
    lower loss (ballast's step_fraction 0.25 and patience 10);
  - the loss is evaluated before each step and once after the last.
A sample leaves the batch (masking) as soon as an evaluated point is predicted
as another class; that point is then checked by a plain forward pass of that
point alone and must lie inside the region and the input range, otherwise it
is rejected (counted, and the script fails).
--targeted adds the rest of ballast's default schedule: the one-step FGSM
point (Goodfellow et al. 2015) before the restarts, and after them one run
from the centre against each other class, largest clean logit first.

Timed: only the attack (clean forward pass included), not loading.

Run from the project root:
    /work/venv/bin/python tests/reference/pgd_batched_reference.py --model M --data D --eps 0.02
        [--targeted] [--json out.json]
"""
import argparse
import json
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from ballast_files import forward, load_data, load_model  # noqa: E402

STEPS, RESTARTS, STEP_FRACTION, PATIENCE = 100, 5, 0.25, 10


def margin_and_gradient(layers, x, y, target):
    """Loss z_y - z_t per row (t = best other class where target < 0), its input gradient, the logits."""
    masks, h = [], x
    for k, (w, b) in enumerate(layers):
        h = h @ w.T + b
        if k < len(layers) - 1:
            masks.append(h > 0)
            h = h * masks[-1]
    rows = np.arange(len(y))
    others = h.copy()
    others[rows, y] = -np.inf
    t = np.where(target >= 0, target, others.argmax(axis=1))
    g = layers[-1][0][y] - layers[-1][0][t]
    for k in range(len(layers) - 2, -1, -1):
        g = (g * masks[k]) @ layers[k][0]
    return h[rows, y] - h[rows, t], g, h


class Attack:
    def __init__(self, layers, x0, y, eps, lower, upper):
        self.layers, self.x0, self.y = layers, x0, y
        self.lo, self.hi = np.maximum(x0 - eps, lower), np.minimum(x0 + eps, upper)
        self.eps, self.lower, self.upper = eps, lower, upper
        self.found = np.zeros(len(y), dtype=bool)
        self.rejected = 0

    def record(self, rows, points):
        """Plain forward pass of each candidate alone; keeps it only inside region and range."""
        for i, p in zip(rows, points):
            inside = (self.lo[i] <= p).all() and (p <= self.hi[i]).all()
            inside &= (self.lower <= p).all() and (p <= self.upper).all()
            if inside and forward(self.layers, p[None, :])[0].argmax() != self.y[i]:
                self.found[i] = True
            else:
                self.rejected += 1

    def run(self, rows, start, target, steps):
        """One PGD run for `rows` (sample indices) from `start`; rows leave once a point is found."""
        x = np.clip(start, self.lo[rows], self.hi[rows])
        n = len(rows)
        step, stalled = np.full(n, STEP_FRACTION), np.zeros(n, dtype=int)
        best_loss, best_x, best_g = np.full(n, np.inf), x.copy(), np.zeros_like(x)
        for s in range(steps + 1):
            loss, g, logits = margin_and_gradient(self.layers, x, self.y[rows], target)
            hit = logits.argmax(axis=1) != self.y[rows]
            if hit.any():
                self.record(rows[hit], x[hit])
                keep = ~hit
                rows, x, g, loss, target = rows[keep], x[keep], g[keep], loss[keep], target[keep]
                step, stalled, best_loss = step[keep], stalled[keep], best_loss[keep]
                best_x, best_g = best_x[keep], best_g[keep]
            if s == steps or len(rows) == 0:
                return
            better = loss < best_loss
            best_loss[better], best_x[better], best_g[better] = loss[better], x[better], g[better]
            stalled = np.where(better, 0, stalled + 1)
            halve = stalled >= PATIENCE
            step[halve] *= 0.5
            x[halve], g[halve], stalled[halve] = best_x[halve], best_g[halve], 0
            x = np.clip(x - (step * self.eps)[:, None] * np.sign(g), self.lo[rows], self.hi[rows])


def attack(layers, x, y, eps, lower, upper, seed, targeted):
    start = time.perf_counter()
    clean = forward(layers, x)
    correct = clean.argmax(axis=1) == y
    a = Attack(layers, x, y, eps, lower, upper)
    rng = np.random.default_rng(seed)
    untargeted = lambda rows: np.full(len(rows), -1)  # noqa: E731
    open_ = lambda: np.flatnonzero(correct & ~a.found)  # noqa: E731
    if targeted:  # the FGSM point: one full-radius sign step from the centre
        rows = open_()
        _, g, _ = margin_and_gradient(layers, x[rows], y[rows], untargeted(rows))
        a.run(rows, x[rows] - eps * np.sign(g), untargeted(rows), 0)
    for r in range(RESTARTS):
        rows = open_()
        begin = x[rows] if r == 0 else rng.uniform(a.lo[rows], a.hi[rows])
        a.run(rows, begin, untargeted(rows), STEPS)
    if targeted:
        others = clean.copy()
        others[np.arange(len(y)), y] = -np.inf
        order = np.argsort(-others, axis=1, kind="stable")[:, : clean.shape[1] - 1]
        for t in range(order.shape[1]):
            rows = open_()
            a.run(rows, x[rows], order[rows, t], STEPS)
    return correct, a, time.perf_counter() - start


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", required=True)
    parser.add_argument("--data", required=True)
    parser.add_argument("--eps", type=float, required=True)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--targeted", action="store_true", help="ballast's full default schedule")
    parser.add_argument("--json", help="write the results here")
    args = parser.parse_args()
    layers, lower, upper, model = load_model(args.model)
    x, y = load_data(args.data, model)
    correct, a, seconds = attack(layers, x, y, args.eps, lower, upper, args.seed, args.targeted)
    schedule = "FGSM + 5x100 untargeted + targeted runs" if args.targeted else "5x100 untargeted"
    print(f"eps {args.eps} ({schedule}): found {int(a.found.sum())} among {int(correct.sum())} correctly "
          f"classified ({len(y)} rows), rejected {a.rejected}; attack {seconds:.2f} s")
    if args.json:
        with open(args.json, "w") as f:
            json.dump({"source": "tests/reference/pgd_batched_reference.py", "model": args.model,
                       "data": args.data, "epsilon": args.eps, "schedule": schedule, "seed": args.seed,
                       "samples": len(y), "correct": int(correct.sum()), "found": int(a.found.sum()),
                       "found_rows": [int(i) for i in np.flatnonzero(a.found)], "rejected": a.rejected,
                       "seconds": seconds, "numpy": np.__version__}, f, indent=1)
            f.write("\n")
    if a.rejected:
        sys.exit(f"{a.rejected} candidate points failed the plain check")


if __name__ == "__main__":
    main()
