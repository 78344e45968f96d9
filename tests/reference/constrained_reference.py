#!/usr/bin/env python3
"""Outside reference for constrained retraining on a convex case: a linear
(softmax-regression) classifier trained to "minimise the clean cross-entropy
subject to robust cross-entropy <= level" for one or two L-inf budgets,
solved by a general-purpose convex solver (cvxpy with Clarabel, cross-checked
with SCS).

Run from the project root:
    /work/venv/bin/python tests/reference/constrained_reference.py

Data: scikit-learn's bundled load_breast_cancer (569 rows, 30 features, 2
classes) and load_wine (178 rows, 13 features, 3 classes); X min-max scaled
into [0, 1] with MinMaxScaler over all rows, then
train_test_split(test_size=0.3, random_state=0, stratify=y).

The robust loss of sample (x, y) at radius eps is the cross-entropy on worst-case
logits: log(1 + sum_{j != y} exp(-m_j)) with m_j the exact minimum of the margin
z_y - z_j = (w_y - w_j) . x' + b_y - b_j over the box {x' : |x' - x|_inf <= eps,
0 <= x' <= 1}. For a linear model the minimum over the box is attained
coordinate-wise: m_j = (w_y - w_j) . mid + b_y - b_j - |w_y - w_j| . half with
mid / half the centre and half-width of the clipped box. Each m_j is concave
in the weights, so the robust loss is convex and the problem has zero duality
gap (Slater's condition holds: the reported minimum robust loss is below each
level).

For each case the script records the optimal clean cross-entropy (mean over
the training rows), the robust losses at the optimum, the multiplier of each
constraint from both solvers, and a finite-difference check of the
multiplier's meaning as a price (Boyd & Vandenberghe, Convex Optimization,
section 5.6): the optimum re-solved at level +- 0.005 gives
-(p*(c + h) - p*(c - h)) / 2h, which must agree with the multiplier.

Writes:
    tests/data/breast_cancer_{train,test}.csv   label,f0..f29 (features in [0, 1])
    tests/data/wine_{train,test}.csv            label,f0..f12
    tests/data/breast_cancer_linear.model.json  ballast.model/1 linear model, zero weights
    tests/data/wine_linear.model.json           ballast.model/1 linear model, zero weights
    tests/reference/out/constrained_linear.json the optima, multipliers and checks

Deterministic: fixed random_state, interior-point solves.
"""
import csv
import json
import os
import platform

import cvxpy as cp
import numpy as np
import sklearn
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.model_selection import train_test_split
from sklearn.preprocessing import MinMaxScaler

DATA_DIR = os.path.join("tests", "data")
OUT = os.path.join("tests", "reference", "out", "constrained_linear.json")
SOURCE = (
    "scikit-learn {name} (bundled copy), X min-max scaled into [0, 1] over all rows "
    "(MinMaxScaler, clipped to [0, 1] against rounding), train_test_split(test_size=0.3, random_state=0, stratify=y)"
)
STEP = 0.005  # level step of the finite-difference price check

# (case, dataset, [(eps, level, class or None = all rows), ...]); every constraint is active at the
# optimum (checked below).
CASES = [
    ("breast_cancer_one", "breast_cancer", [(0.03, 0.2, None)]),
    ("breast_cancer_per_class", "breast_cancer", [(0.03, 0.25, 0), (0.03, 0.14, 1)]),
    ("wine_one", "wine", [(0.1, 0.6, None)]),
    ("wine_per_class", "wine", [(0.1, 0.6, 0), (0.1, 0.8, 1), (0.1, 0.5, 2)]),
    # Two budgets: every row at one epsilon, one class's rows at another, both active. (Two levels
    # over all rows leave almost no feasible room on these data: the robust losses at two epsilons
    # move together, and the solvers fail near the edge.)
    ("breast_cancer_two_budgets", "breast_cancer", [(0.03, 0.2, None), (0.06, 0.56, 0)]),
    ("wine_two_budgets", "wine", [(0.1, 0.6, None), (0.05, 0.25, 1)]),
]


def load(name):
    data = load_breast_cancer() if name == "breast_cancer" else load_wine()
    # MinMaxScaler's (x - min) * scale can round one ulp above 1: clip to the model's input range.
    x = np.clip(MinMaxScaler().fit_transform(data.data.astype(np.float64)), 0.0, 1.0)
    y = data.target.astype(np.int64)
    assert x.min() >= 0.0 and x.max() <= 1.0
    return train_test_split(x, y, test_size=0.3, random_state=0, stratify=y)


def worst_case_loss(w, b, x, y, classes, eps):
    """Mean cross-entropy on exact worst-case logits over the L-inf ball of radius `eps` ∩ [0, 1]
    (eps = 0: the clean cross-entropy), written as log(1 + sum_j exp(-m_j)) per sample."""
    lo = np.maximum(0.0, x - eps)
    hi = np.minimum(1.0, x + eps)
    mid, half = (lo + hi) / 2.0, (hi - lo) / 2.0
    total = 0
    for label in range(classes):
        rows = np.flatnonzero(y == label)
        negative_margins = []
        for j in range(classes):
            if j == label:
                continue
            d = w[label] - w[j]
            margin = mid[rows] @ d + (b[label] - b[j])
            if eps > 0:
                margin = margin - half[rows] @ cp.abs(d)
            negative_margins.append(-margin)
        if len(negative_margins) == 1:
            total = total + cp.sum(cp.logistic(negative_margins[0]))
        else:
            stacked = cp.vstack([np.zeros(len(rows))] + negative_margins)
            total = total + cp.sum(cp.log_sum_exp(stacked, axis=0))
    return total / x.shape[0]


def constraint_loss(w, b, x, y, classes, constraint):
    """The robust loss a constraint bounds: over every training row, or over one class's rows
    (the mean over that class, a per-class constraint)."""
    eps, _, only = constraint
    if only is None:
        return worst_case_loss(w, b, x, y, classes, eps)
    rows = y == only
    return worst_case_loss(w, b, x[rows], y[rows], classes, eps)


def gauge(w, b):
    """Softmax logits are defined up to a common shift: fixing the last class's row at zero removes
    that direction of the solution set (the losses are unchanged) so the interior-point solve is
    well posed."""
    return [w[-1] == 0, b[-1] == 0]


def solve(x, y, constraints, solver):
    classes = int(y.max()) + 1
    w = cp.Variable((classes, x.shape[1]))
    b = cp.Variable(classes)
    clean = worst_case_loss(w, b, x, y, classes, 0.0)
    robust = [constraint_loss(w, b, x, y, classes, c) for c in constraints]
    cons = [r <= c[1] for r, c in zip(robust, constraints)]
    problem = cp.Problem(cp.Minimize(clean), cons + gauge(w, b))
    options = {"eps": 1e-9, "max_iters": 200000} if solver == cp.SCS else {}
    problem.solve(solver=solver, **options)
    assert problem.status == cp.OPTIMAL, (solver, problem.status)
    return {
        "clean_loss": float(problem.value),
        "robust_losses": [float(r.value) for r in robust],
        "multipliers": [float(c.dual_value) for c in cons],
        "weights": w.value,
        "bias": b.value,
    }


def solve_any(x, y, constraints):
    """The optimum by Clarabel, or by SCS when Clarabel stops on a numerical failure (it does on
    some perturbed levels of the two-budget cases)."""
    try:
        return solve(x, y, constraints, cp.CLARABEL)
    except (cp.error.SolverError, AssertionError):
        return solve(x, y, constraints, cp.SCS)


def minimum_robust(x, y, constraint):
    classes = int(y.max()) + 1
    w = cp.Variable((classes, x.shape[1]))
    b = cp.Variable(classes)
    problem = cp.Problem(cp.Minimize(constraint_loss(w, b, x, y, classes, constraint)), gauge(w, b))
    problem.solve(solver=cp.CLARABEL)
    return float(problem.value)


def write_csv(path, x, y):
    with open(path, "w", newline="") as f:
        out = csv.writer(f, lineterminator="\n")
        out.writerow(["label"] + [f"f{i}" for i in range(x.shape[1])])
        for row, label in zip(x, y):
            out.writerow([int(label)] + [repr(float(v)) for v in row])


def write_model(path, name, features, classes):
    model = {
        "format": "ballast.model/1",
        "name": f"{name}-linear-zero",
        "input": {"dim": features, "names": [f"f{i}" for i in range(features)], "lower": 0.0, "upper": 1.0},
        "classes": [str(c) for c in range(classes)],
        "layers": [{"kind": "dense", "weights": [[0.0] * features for _ in range(classes)], "bias": [0.0] * classes}],
        "provenance": {"made_by": "tests/reference/constrained_reference.py", "note": "all weights zero"},
    }
    with open(path, "w") as f:
        json.dump(model, f, indent=1)
        f.write("\n")


def main():
    splits = {name: load(name) for name in ("breast_cancer", "wine")}
    for name, (x_train, x_test, y_train, y_test) in splits.items():
        write_csv(os.path.join(DATA_DIR, f"{name}_train.csv"), x_train, y_train)
        write_csv(os.path.join(DATA_DIR, f"{name}_test.csv"), x_test, y_test)
        write_model(os.path.join(DATA_DIR, f"{name}_linear.model.json"), name, x_train.shape[1], int(y_train.max()) + 1)
    cases = []
    for case, name, constraints in CASES:
        x, _, y, _ = splits[name]
        main_solve = solve(x, y, constraints, cp.CLARABEL)
        check = solve(x, y, constraints, cp.SCS)
        prices = []
        step = STEP
        for k in range(len(constraints)):
            up = [(e, l + step if i == k else l, c) for i, (e, l, c) in enumerate(constraints)]
            down = [(e, l - step if i == k else l, c) for i, (e, l, c) in enumerate(constraints)]
            slope = -(solve_any(x, y, up)["clean_loss"] - solve_any(x, y, down)["clean_loss"]) / (2 * step)
            prices.append(slope)
            assert main_solve["multipliers"][k] > 1e-3, (case, k, "constraint not active")
            assert abs(slope - main_solve["multipliers"][k]) < 0.05 * main_solve["multipliers"][k], (case, k, slope)
        assert abs(main_solve["clean_loss"] - check["clean_loss"]) < 1e-5 * max(1.0, main_solve["clean_loss"]) + 1e-6, case
        for a, c in zip(main_solve["multipliers"], check["multipliers"]):
            assert abs(a - c) < 1e-2 * a, (case, a, c)
        minima = [minimum_robust(x, y, c) for c in constraints]
        for m, (_, level, _) in zip(minima, constraints):
            assert m < level, (case, m, level)  # strictly feasible: Slater's condition
        cases.append(
            {
                "case": case,
                "dataset": name,
                "train_csv": f"tests/data/{name}_train.csv",
                "model": f"tests/data/{name}_linear.model.json",
                "train_rows": int(x.shape[0]),
                "constraints": [{"epsilon": e, "level": l, "class": c} for e, l, c in constraints],
                "clean_loss": main_solve["clean_loss"],
                "robust_losses": main_solve["robust_losses"],
                "multipliers": main_solve["multipliers"],
                "scs_clean_loss": check["clean_loss"],
                "scs_multipliers": check["multipliers"],
                "finite_difference_prices": prices,
                "finite_difference_step": step,
                "minimum_robust_losses": minima,
                "weights": main_solve["weights"].tolist(),
                "bias": main_solve["bias"].tolist(),
            }
        )
        print(case, main_solve["clean_loss"], main_solve["multipliers"], check["multipliers"], prices, minima)
    out = {
        "script": "tests/reference/constrained_reference.py",
        "source": {name: SOURCE.format(name=f"load_{name}") for name in splits},
        "versions": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scikit-learn": sklearn.__version__,
            "cvxpy": cp.__version__,
            "solvers": ["CLARABEL", "SCS (eps 1e-9)"],
        },
        "finite_difference_step": STEP,
        "cases": cases,
    }
    with open(OUT, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
