#!/usr/bin/env python3
"""Reference values for one-sided Clopper-Pearson (exact binomial) confidence
bounds on a success proportion, e.g. certified accuracy k/n.

Source of every number in the grid: scipy.stats.beta.ppf (version recorded in
the output under "versions").

    alpha = 1 - confidence
    lower = beta.ppf(alpha,     k,     n - k + 1)   (0 when k == 0)
    upper = beta.ppf(1 - alpha, k + 1, n - k)       (1 when k == n)

Both are ONE-SIDED bounds at the given confidence (not a two-sided interval).

Run from the project root:
    /work/venv/bin/python tests/reference/clopper_pearson.py

Writes tests/reference/out/clopper_pearson.json.
"""
import json
import os
import platform
import sys

import numpy as np
import scipy
from scipy.stats import beta, binom

OUT = os.path.join("tests", "reference", "out", "clopper_pearson.json")
NS = [1, 10, 30, 100, 360, 1000]
CONFIDENCES = [0.9, 0.95, 0.99]
FRACTIONS = [0.0, 0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.99, 1.0]


def ks_for(n):
    ks = {0, n, min(1, n), max(n - 1, 0)}
    ks.update(int(round(f * n)) for f in FRACTIONS)
    return sorted(k for k in ks if 0 <= k <= n)


def lower(k, n, conf):
    if k == 0:
        return 0.0
    return float(beta.ppf(1.0 - conf, k, n - k + 1))


def upper(k, n, conf):
    if k == n:
        return 1.0
    return float(beta.ppf(conf, k + 1, n - k))


def main():
    if not os.path.isdir(os.path.join("tests", "reference")):
        sys.exit("run from the project root")
    os.makedirs(os.path.dirname(OUT), exist_ok=True)

    entries = []
    for n in NS:
        for k in ks_for(n):
            for conf in CONFIDENCES:
                lo, up = lower(k, n, conf), upper(k, n, conf)
                alpha = 1.0 - conf
                # sanity: ordering and bracketing of the point estimate
                assert 0.0 <= lo <= k / n <= up <= 1.0, (n, k, conf, lo, up)
                # independent cross-check via the binomial tail definition:
                # lower solves P(X >= k | p=lower) = alpha
                # upper solves P(X <= k | p=upper) = alpha
                if k > 0:
                    assert abs(binom.sf(k - 1, n, lo) - alpha) < 1e-9, (n, k, conf)
                if k < n:
                    assert abs(binom.cdf(k, n, up) - alpha) < 1e-9, (n, k, conf)
                entries.append({"n": n, "k": k, "confidence": conf,
                                "lower": lo, "upper": up})

    # Known identities (closed forms, exact for Clopper-Pearson; derived from
    # the binomial tail: P(X >= n | p) = p^n and P(X <= 0 | p) = (1-p)^n).
    # The name "rule of three" for the approximation upper ~ 3/n at 95% with
    # k = 0 is recalled from memory (Hanley & Lippman-Hand, JAMA 1983).
    worked = []
    for n in [1, 10, 30, 100, 360, 1000]:
        for conf in CONFIDENCES:
            alpha = 1.0 - conf
            exact_lo = alpha ** (1.0 / n)        # k = n
            exact_up = 1.0 - alpha ** (1.0 / n)  # k = 0
            lo, up = lower(n, n, conf), upper(0, n, conf)
            assert abs(lo - exact_lo) < 1e-12 and abs(up - exact_up) < 1e-12
            worked.append({"n": n, "k": n, "confidence": conf, "bound": "lower",
                           "closed_form": "(1-confidence)^(1/n)", "value": exact_lo})
            worked.append({"n": n, "k": 0, "confidence": conf, "bound": "upper",
                           "closed_form": "1-(1-confidence)^(1/n)", "value": exact_up})
    # rule of three, n = 1000: exact upper 0.0029914..., approximation 3/n = 0.003
    r3 = 1.0 - 0.05 ** (1.0 / 1000)
    assert abs(r3 - 3.0 / 1000) < 1e-5

    doc = {
        "source": "scipy.stats.beta.ppf (one-sided Clopper-Pearson), cross-checked "
                  "against scipy.stats.binom tails",
        "versions": {"python": platform.python_version(),
                     "numpy": np.__version__, "scipy": scipy.__version__},
        "definition": {
            "alpha": "1 - confidence",
            "lower": "beta.ppf(alpha, k, n-k+1); 0 when k == 0",
            "upper": "beta.ppf(1-alpha, k+1, n-k); 1 when k == n",
            "sidedness": "each bound is one-sided at the stated confidence",
        },
        "entries": entries,
        "known_identities": {
            "note": "Exact closed forms for Clopper-Pearson at the extremes: with "
                    "k = n the one-sided lower bound is (1-confidence)^(1/n) "
                    "(e.g. 0.05^(1/n) at 95%); with k = 0 the one-sided upper bound "
                    "is 1-(1-confidence)^(1/n), which the 'rule of three' "
                    "approximates by 3/n at 95%. Identities derived from the "
                    "binomial tail; the rule-of-three name and its attribution "
                    "(Hanley & Lippman-Hand, JAMA 1983) are recalled from memory.",
            "rule_of_three_example": {"n": 1000, "k": 0, "confidence": 0.95,
                                      "upper_exact": r3, "upper_approx_3_over_n": 0.003},
            "values": worked,
        },
    }
    with open(OUT, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    print(f"wrote {OUT}: {len(entries)} grid entries, {len(worked)} identity values")


if __name__ == "__main__":
    main()
