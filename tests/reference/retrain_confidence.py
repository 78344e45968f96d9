#!/usr/bin/env python3
"""Reference values for retraining under a reviewer's confidence rule
(ballast::train::confidence).

The reviewer passes a model when the one-sided Clopper-Pearson lower bound at
confidence C on K certified of m acceptance samples is at least the floor F:

    L(k) = beta.ppf(1 - C, k, m - k + 1)   (0 when k == 0)
    k*   = least k with L(k) >= F          (none when L(m) < F)

The validation data certify V of n. Under a uniform Beta(1, 1) prior on the
certified rate, K | V ~ BetaBinomial(m, V + 1, n - V + 1), and

    pass(V)          = P(K >= k* | V)          = betabinom.sf(k* - 1, m, V + 1, n - V + 1)
    aimed count      = least V with pass(V) >= q
    expected bound   = sum_k betabinom.pmf(k, ...) * L(k)
    highest floor(V) = L(largest k with P(K >= k | V) >= q)

Source of every number: scipy.stats.beta.ppf and scipy.stats.betabinom
(versions recorded in the output). Cross-checks in this script: the
beta-binomial mass against numerical integration of binom.pmf x beta.pdf
(scipy.integrate.quad), and L(k) against the binomial tail that defines it.

Run from the project root:
    /work/venv/bin/python tests/reference/retrain_confidence.py

Writes tests/reference/out/retrain_confidence.json. Deterministic.
"""
import json
import os
import platform
import sys

import numpy as np
import scipy
from scipy.integrate import quad
from scipy.stats import beta, betabinom, binom

OUT = os.path.join("tests", "reference", "out", "retrain_confidence.json")

FLOORS = [0.5, 0.8, 0.85, 0.9, 0.95]
CONFIDENCES = [0.9, 0.95, 0.99]
ACCEPTANCE = [30, 100, 360, 1000]
VALIDATION = [50, 251, 320]
PASS = [0.5, 0.9, 0.95]

# The configuration tests/confidence.rs runs through `ballast retrain` on the demo data:
# 1,600 training rows, 20% held out for validation (320), 360 acceptance rows.
TABLE = {"floor": 0.8, "confidence": 0.95, "acceptance": 360, "validation": 320, "pass": 0.95}


def lower_bounds(m, c):
    k = np.arange(m + 1)
    out = np.zeros(m + 1)
    out[1:] = beta.ppf(1.0 - c, k[1:], m - k[1:] + 1)
    return out


def passing_count(bounds, floor):
    ok = np.nonzero(bounds >= floor)[0]
    return int(ok[0]) if len(ok) else None


def pass_probabilities(k_star, m, n):
    """pass(V) for V = 0..n."""
    v = np.arange(n + 1)
    return betabinom.sf(k_star - 1, m, v + 1, n - v + 1)


def reached(m, n, v, q):
    """Largest k with P(K >= k | V = v) >= q."""
    tails = betabinom.sf(np.arange(m + 1) - 1, m, v + 1, n - v + 1)
    return int(np.nonzero(tails >= q)[0][-1])


def expected_bound(bounds, m, n, v):
    masses = betabinom.pmf(np.arange(m + 1), m, v + 1, n - v + 1)
    return float(np.dot(masses, bounds))


def main():
    if not os.path.isdir(os.path.join("tests", "reference")):
        sys.exit("run from the project root")
    os.makedirs(os.path.dirname(OUT), exist_ok=True)

    bounds = {(m, c): lower_bounds(m, c) for m in ACCEPTANCE for c in CONFIDENCES}
    for (m, c), b in bounds.items():
        # L(k) solves P(X >= k | p = L(k)) = 1 - C for X ~ Bin(m, p) (the definition).
        for k in [1, m // 2, m - 1, m]:
            assert abs(binom.sf(k - 1, m, b[k]) - (1.0 - c)) < 1e-9, (m, c, k)

    plans = []
    for floor in FLOORS:
        for c in CONFIDENCES:
            for m in ACCEPTANCE:
                b = bounds[(m, c)]
                k_star = passing_count(b, floor)
                for n in VALIDATION:
                    for q in PASS:
                        entry = {"floor": floor, "confidence": c, "acceptance": m,
                                 "validation": n, "pass": q, "passing_count": k_star}
                        probs = pass_probabilities(k_star, m, n) if k_star is not None else None
                        if probs is None or probs[n] < q:
                            entry["reachable"] = False
                            entry["highest_floor"] = float(b[reached(m, n, n, q)])
                        else:
                            v = int(np.nonzero(probs >= q)[0][0])
                            entry.update({
                                "reachable": True,
                                "aimed_count": v,
                                "pass_probability_at_aim": float(probs[v]),
                                "expected_lower_bound": expected_bound(b, m, n, v),
                            })
                        plans.append(entry)

    # Spot values of the predictive, cross-checked by integrating the binomial over the posterior.
    spots = []
    for (v, n, m, k) in [(230, 251, 360, 318), (200, 251, 360, 300), (45, 50, 30, 27),
                         (10, 50, 100, 15), (320, 320, 1000, 990), (0, 50, 30, 0)]:
        a, bb = v + 1, n - v + 1
        pmf = float(betabinom.pmf(k, m, a, bb))
        integral = quad(lambda p: binom.pmf(k, m, p) * beta.pdf(p, a, bb), 0.0, 1.0,
                        epsabs=1e-14, epsrel=1e-10, limit=200)[0]
        assert abs(pmf - integral) < 1e-9, (v, n, m, k, pmf, integral)
        spots.append({"certified": v, "seen": n, "acceptance": m, "k": k, "pmf": pmf,
                      "at_least": float(betabinom.sf(k - 1, m, a, bb)),
                      "mean": float(betabinom.mean(m, a, bb))})

    t = TABLE
    b = bounds[(t["acceptance"], t["confidence"])]
    k_star = passing_count(b, t["floor"])
    n, m, q = t["validation"], t["acceptance"], t["pass"]
    table = dict(t)
    table.update({
        "passing_count": k_star,
        "lower_bound": [float(x) for x in b],
        "pass_probability": [float(x) for x in pass_probabilities(k_star, m, n)],
        "expected_lower_bound": [expected_bound(b, m, n, v) for v in range(n + 1)],
        "highest_floor": [float(b[reached(m, n, v, q)]) for v in range(n + 1)],
    })

    doc = {
        "source": "scipy.stats.beta.ppf (one-sided Clopper-Pearson) and scipy.stats.betabinom; "
                  "the mass cross-checked by scipy.integrate.quad",
        "versions": {"python": platform.python_version(),
                     "numpy": np.__version__, "scipy": scipy.__version__},
        "definition": __doc__.split("Source of every number")[0].strip(),
        "plans": plans,
        "predictive": spots,
        "table": table,
    }
    with open(OUT, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    reachable = sum(p["reachable"] for p in plans)
    print(f"wrote {OUT}: {len(plans)} plans ({reachable} reachable), {len(spots)} spot values")


if __name__ == "__main__":
    main()
