#!/usr/bin/env python3
"""Floating-point stress cases with exact verdicts, for tests/fp_soundness.rs.

Generates about forty tiny ReLU classifiers with extreme scales (a `normalize`
layer with means up to 1e8 and stds down to 2^-20, weights of magnitude 1e-4
and 1e3, ReLU kinks and decision ties placed near the samples), samples, and a
radius per sample, then decides each case EXACTLY with Python's standard
`fractions` module. numpy is used only to draw the random numbers and for the
plain float64 forward pass that shows what a deployed model answers.

Run from the project root (deterministic: fixed seed, rerunning rewrites the
same bytes with the pinned versions of tests/reference/requirements.txt):
    /work/venv/bin/python tests/reference/fp_stress.py

Outputs (tests/reference/out/fp_stress/):
    mNN.model.json   ballast.model/1 files, every number a double written in
                     Python's shortest round-trip form (repr)
    mNN.csv          the samples of model NN (header f0..f{n-1},label)
    manifest.json    per model the exact parameters (float.hex, so a reader
                     needs no decimal parser), per case the verdict

The exact semantics, the minimisation method with its justification, and the
search for flipping doubles are described in fp_exact.py.

Case mix and margins
--------------------
Families: "fold" (means 1e6..1e8, stds 2^-20..1e-3: folding normalize into
the next dense layer multiplies terms of size mean/std ~ 1e14 and loses
~1e-2 absolutely), "mixed" (weights of magnitude 1e-4, 1 and 1e3 in one row),
"kink" (every first-layer kink through the model's anchor point), "l2-1d"
(one input, L-inf and L2); a third of the models have an input range that
clips the ball. Output biases put classes 0 and 1 within 1e-3..1e-1 of a tie
at each model's anchor (an exact tie would leave dead-unit plateaus whose
margin is a bias rounding residue) and a common offset of 1 keeps logits near
1; samples are drawn around the anchor (std/2 per feature), so kinks and ties
sit near them. A model whose eps search stalls on more than two samples (a
class that no radius changes) is drawn again. For each sample a target
margin tau = ±10^U(-6,-3) is drawn (signs alternate) and eps is the double
found by regula falsi on the exact minimum margin phi(eps) (continuous, non-
increasing) with |phi(eps) - tau| <= |tau|/4 where the search converges; the
recorded minimum is the exact one at the eps written.
"""
import csv
import io
import json
import math
import os
import platform
import sys
from fractions import Fraction

import numpy as np

from fp_exact import INNER_Q, BoxResult, ExactModel, exact_class, find_flip

SEED = 16_2026
OUT_DIR = os.path.join("tests", "reference", "out", "fp_stress")
VERSIONS = {"python": platform.python_version(), "numpy": np.__version__}


def f64_class(spec, x):
    """Plain float64 forward pass, layer by layer, normalize unfolded (the deployed answer)."""
    h = (np.asarray(x, dtype=np.float64) - np.asarray(spec["mean"])) / np.asarray(spec["std"])
    for li, (W, b) in enumerate(spec["dense"]):
        h = np.asarray(W, dtype=np.float64) @ h + np.asarray(b, dtype=np.float64)
        if li < len(spec["dense"]) - 1:
            h = np.maximum(h, 0.0)
    if h.shape[0] == 1:
        return int(h[0] > 0.0)
    return int(np.argmax(h))


# ---------------------------------------------------------------------------
# Generation
# ---------------------------------------------------------------------------


def dbl(v):
    return float(v)


def signed(rng, low, high):
    return float(rng.choice([-1.0, 1.0]) * rng.uniform(low, high))


def make_model(rng, family, hidden, outputs, n):
    """A spec: normalize, dense layers (as float lists), input range; biases set around an anchor."""
    if family == "fold":
        mean = [dbl(10 ** rng.uniform(6, 8)) for _ in range(n)]
        std = [dbl(2.0 ** -int(rng.integers(10, 21))) if rng.random() < 0.5 else dbl(10 ** rng.uniform(-6, -3)) for _ in range(n)]
        if rng.random() < 0.5:
            std[int(rng.integers(n))] = 2.0 ** -20
    elif family == "kink":
        mean = [dbl(10 ** rng.uniform(3, 6)) for _ in range(n)]
        std = [dbl(10 ** rng.uniform(-4, -1)) for _ in range(n)]
    else:
        mean = [dbl(10 ** rng.uniform(0, 3) * rng.choice([-1, 1])) for _ in range(n)]
        std = [dbl(10 ** rng.uniform(-2, 1)) for _ in range(n)]
    sizes = [n] + hidden + [outputs]

    def weight():
        if family == "mixed":
            return signed(rng, 1.0, 9.99) * 10.0 ** int(rng.choice([-4, 0, 3]))
        return signed(rng, 0.3, 1.5)

    Ws = [[[weight() for _ in range(sizes[li])] for _ in range(sizes[li + 1])] for li in range(len(sizes) - 1)]
    spec = {"mean": mean, "std": std, "dense": [], "lower": [None] * n, "upper": [None] * n}
    z0 = rng.normal(0.0, 1.0, n)
    anchor = [dbl(m + s * z) for m, s, z in zip(mean, std, z0)]
    h = [(Fraction(v) - Fraction(m)) / Fraction(s) for v, m, s in zip(anchor, mean, std)]
    kink_share = 1.0 if family == "kink" else 0.35
    # Points spread like the samples, to size the output layer (its scale is set by them, not the anchor).
    probes = [[(Fraction(dbl(m + s * (z + float(rng.normal(0.0, 0.5))))) - Fraction(m)) / Fraction(s)
               for m, s, z in zip(mean, std, z0)] for _ in range(8)]
    for li, W in enumerate(Ws):
        raw = [sum((Fraction(w) * v for w, v in zip(row, h)), Fraction(0)) for row in W]
        last = li == len(Ws) - 1
        if not last:
            scale = max(float(abs(r)) for r in raw) + 1e-300
            b = []
            for r in raw:
                if rng.random() < kink_share:
                    b.append(dbl(-r))  # kink through the anchor (to rounding)
                else:
                    b.append(dbl(-r + Fraction(rng.normal(0.0, 0.6) * scale)))
            pre = [r + Fraction(bb) for r, bb in zip(raw, b)]
            # Keep every unit alive somewhere near the anchor: a dead-everywhere unit tests nothing.
            for k, p in enumerate(pre):
                if p < 0 and rng.random() < 0.5:
                    b[k] = dbl(-raw[k] - p)
            spec["dense"].append((W, b))
            h = [max(r + Fraction(bb), Fraction(0)) for r, bb in zip(raw, b)]
            probes = [
                [max(sum((Fraction(w) * v for w, v in zip(row, p)), Fraction(0)) + Fraction(bb), Fraction(0)) for row, bb in zip(W, b)]
                for p in probes
            ]
        else:
            # Scale the output layer by a power of two so that logits vary by ~1 over the probes, then put a
            # tie at the anchor.
            spread = [abs(sum((Fraction(w) * (v - a) for w, v, a in zip(row, p, h)), Fraction(0))) for row in W for p in probes]
            size = float(max(spread))
            shift = 0 if size == 0 else -math.floor(math.log2(size))
            W = [[w * 2.0 ** shift for w in row] for row in W]
            raw = [r * Fraction(2) ** shift for r in raw]
            # Classes 0 and 1 nearly tie at the anchor: an exact tie would leave, where every unit of the
            # last hidden layer is off, a plateau whose margin is the biases' rounding residue (~1e-16).
            near_tie = float(rng.choice([-1.0, 1.0]) * 10 ** rng.uniform(-3, -1))
            if outputs == 1:
                b = [dbl(-raw[0] + Fraction(near_tie))]
            else:
                offsets = [0.0, near_tie] + [float(rng.normal(-0.3, 0.2)) for _ in range(outputs - 2)]
                b = [dbl(1 - r + Fraction(o)) for r, o in zip(raw, offsets)]
            spec["dense"].append((W, b))
    if rng.random() < 0.35:
        for i in range(n):
            spec["lower"][i] = dbl(Fraction(anchor[i]) - 3 * Fraction(std[i]))
            spec["upper"][i] = dbl(Fraction(anchor[i]) + Fraction(std[i]) * Fraction(0.7))
    return spec, anchor


def draw_sample(rng, model, spec, anchor):
    for _ in range(200):
        x = [dbl(Fraction(a) + Fraction(s) * Fraction(float(rng.normal(0.0, 0.5)))) for a, s in zip(anchor, spec["std"])]
        fx = [Fraction(v) for v in x]
        if any(
            (lo is not None and v < lo) or (hi is not None and v > hi)
            for v, lo, hi in zip(fx, model.lower, model.upper)
        ):
            continue
        logits = model.logits(fx)
        y = exact_class(logits)
        if sum(1 for v in logits if v == logits[y]) > 1:
            continue
        return x, y
    raise RuntimeError("no sample without a tie")


def phi_at(model, center, label, radius):
    return BoxResult(model, center, radius, label)


def tune_eps(model, center, label, tau, start):
    """A double eps with phi(eps) close to tau (regula falsi, Illinois), or the last tried."""

    def f(eps):
        r = phi_at(model, center, label, Fraction(eps))
        return r, r.phi - tau

    a = 0.0
    r0, fa = f(a)
    if fa <= 0:
        return 0.0, r0
    b = start
    rb, fb = f(b)
    for _ in range(30):
        if fb < 0:
            break
        a, fa = b, fb
        b *= 2.0
        rb, fb = f(b)
    if fb >= 0:
        return b, rb
    side_kept = 0
    best = (b, rb, fb)
    for _ in range(80):
        fa_f, fb_f = float(fa), float(fb)
        c = b - fb_f * (b - a) / (fb_f - fa_f)
        if not (min(a, b) < c < max(a, b)) or not math.isfinite(c):
            c = a + (b - a) / 2
        if c in (a, b):
            break
        rc, fc = f(c)
        if abs(fc) < abs(best[2]):
            best = (c, rc, fc)
        if abs(fc) <= abs(tau) / 4:
            return c, rc
        if fc < 0:
            b, fb = c, fc
            if side_kept == -1:
                fa = fa / 2
            side_kept = -1
        else:
            a, fa = c, fc
            if side_kept == 1:
                fb = fb / 2
            side_kept = 1
    return best[0], best[1]


def case_record(model, spec, center, label, eps, norm, result, exact_region, tau):
    c = [Fraction(v) for v in center]
    verdict = result.verdict()
    rec = {
        "norm": norm,
        "eps": repr(eps),
        "eps_hex": eps.hex(),
        "label": label,
        "verdict": verdict,
        "exact_region": exact_region,
        "min_margin": float(result.phi),
        "min_margin_sign": (result.phi > 0) - (result.phi < 0),
        "target_margin": float(tau),
        "center_f64_class": f64_class(spec, center),
    }
    flip = None
    if verdict == "not_robust":
        flip = find_flip(model, c, Fraction(eps), norm, label, result.scored)
    if flip is None:
        rec["flip_double"] = None
    else:
        margin, x, cls = flip
        rec["flip_double"] = {
            "point": [repr(v) for v in x],
            "point_hex": [v.hex() for v in x],
            "exact_class": cls,
            "exact_margin": float(margin),
            "f64_class": f64_class(spec, x),
        }
    return rec


def hexs(values):
    return [None if v is None else float(v).hex() for v in values]


def write_model(path, spec, name, family):
    n = len(spec["mean"])
    layers = [{"kind": "normalize", "mean": spec["mean"], "std": spec["std"]}]
    for li, (W, b) in enumerate(spec["dense"]):
        if li > 0:
            layers.append({"kind": "relu"})
        layers.append({"kind": "dense", "weights": W, "bias": b})
    outputs = len(spec["dense"][-1][1])
    model = {
        "format": "ballast.model/1",
        "name": name,
        "input": {"dim": n, "names": [f"f{i}" for i in range(n)]},
        "classes": [f"c{j}" for j in range(max(2, outputs))],
        "layers": layers,
        "provenance": {"made_by": "tests/reference/fp_stress.py", "family": family},
    }
    if any(v is not None for v in spec["lower"]):
        model["input"]["lower"] = spec["lower"]
        model["input"]["upper"] = spec["upper"]
    # json.dumps writes floats with repr: the shortest string that reads back to the same double.
    with open(path, "w") as f:
        f.write(json.dumps(model, separators=(",", ":")) + "\n")


def write_csv(path, rows, n):
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([f"f{i}" for i in range(n)] + ["label"])
    for x, y in rows:
        w.writerow([repr(v) for v in x] + [y])
    with open(path, "w") as f:
        f.write(buf.getvalue())


PLAN = (
    # family, count, hidden layer choices, inputs, samples per model
    [("fold", [[int(h)] for h in (2, 3, 4, 5, 6, 3, 4, 6, 2, 5)], 10)]
    + [("fold", [[3, 2], [2, 3], [4, 3], [3, 4]], 10)]
    + [("mixed", [[int(h)] for h in (2, 3, 4, 5, 6, 4, 3, 5)], 10)]
    + [("mixed", [[3, 2], [2, 4], [4, 2], [3, 3]], 10)]
    + [("kink", [[int(h)] for h in (2, 3, 4, 5, 6)], 10)]
    + [("kink", [[2, 2], [3, 2], [2, 3], [4, 2], [3, 3]], 10)]
    + [("l2-1d", [[2], [3], [4], [2, 2]], 6)]
)


def build_cases(rng, check_rng, family, hidden, name, index, per_model):
    """One model with its samples and cases, or None when its eps search stalls on a plateau."""
    n = 1 if family == "l2-1d" else int(rng.choice([2, 3]))
    outputs = int(rng.choice([1, 2, 2, 3, 3]))
    spec, anchor = make_model(rng, family if family != "l2-1d" else "fold", hidden, outputs, n)
    model = ExactModel(spec)
    rows, cases, missed = [], [], 0
    for s in range(per_model):
        center, label = draw_sample(rng, model, spec, anchor)
        rows.append((center, label))
        c = [Fraction(v) for v in center]
        tau = Fraction((1 if s % 2 == 0 else -1) * 10 ** rng.uniform(-6, -3))
        margin0 = phi_at(model, c, label, Fraction(0)).phi
        if tau >= margin0:
            tau = margin0 / 2
        start = 0.01 * min(spec["std"])
        eps, result = tune_eps(model, c, label, tau, start)
        if abs(result.phi - tau) > abs(tau) / 4:
            missed += 1
            if missed > 2:
                return None
        result.spot_check(model, check_rng)
        for norm in ["linf", "l2"] if n == 1 else ["linf"]:
            rec = case_record(model, spec, center, label, eps, norm, result, True, tau)
            rec.update({"model": name, "row": s})
            cases.append(rec)
        # L2 on 2-3 inputs: every third model, two samples, sandwiched between an inner and an outer box.
        if n > 1 and index % 3 == 0 and s < 2:
            q = INNER_Q[n]
            if tau < 0:
                eps_in, _ = tune_eps(model, c, label, tau, start)
                eps2 = dbl(Fraction(eps_in) / q)
            else:
                eps2, _ = tune_eps(model, c, label, tau, start)
            inner = phi_at(model, c, label, Fraction(eps2) * q)
            outer = phi_at(model, c, label, Fraction(eps2))
            inner.spot_check(model, check_rng)
            outer.spot_check(model, check_rng)
            if inner.verdict() == "not_robust":
                result2, verdict = inner, "not_robust"
            elif outer.verdict() == "robust":
                result2, verdict = outer, "robust"
            else:
                result2, verdict = outer, "undetermined"
            rec = case_record(model, spec, center, label, eps2, "l2", result2, False, tau)
            rec["verdict"] = verdict
            rec["min_margin_bounds"] = [float(outer.phi), float(inner.phi)]
            rec.update({"model": name, "row": s})
            cases.append(rec)
    entry = {
        "id": name,
        "family": family,
        "hidden": hidden,
        "outputs": outputs,
        "model": f"{name}.model.json",
        "data": f"{name}.csv",
        "exact": {
            "mean": hexs(spec["mean"]),
            "std": hexs(spec["std"]),
            "dense": [{"weights": [hexs(r) for r in W], "bias": hexs(b)} for W, b in spec["dense"]],
            "lower": hexs(spec["lower"]),
            "upper": hexs(spec["upper"]),
            "samples": [hexs(x) for x, _ in rows],
        },
    }
    return spec, rows, entry, cases


def main():
    os.makedirs(OUT_DIR, exist_ok=True)
    rng = np.random.default_rng(SEED)
    check_rng = np.random.default_rng(SEED + 1)  # the self-check's points; generation does not depend on it
    models, cases = [], []
    index = 0
    for family, shapes, per_model in PLAN:
        for hidden in shapes:
            name = f"m{index:02d}"
            for attempt in range(20):
                built = build_cases(rng, check_rng, family, hidden, name, index, per_model)
                if built is not None:
                    break
                print(f"{name}: eps search stalled, model drawn again", file=sys.stderr)
            else:
                raise RuntimeError(f"{name}: no usable model in 20 draws")
            spec, rows, entry, model_cases = built
            write_model(os.path.join(OUT_DIR, f"{name}.model.json"), spec, name, family)
            write_csv(os.path.join(OUT_DIR, f"{name}.csv"), rows, len(spec["mean"]))
            models.append(entry)
            cases += model_cases
            print(f"{name} ({family}, hidden {hidden}): {len(model_cases)} cases", file=sys.stderr)
            index += 1
    manifest = {
        "format": "ballast.fp-stress/1",
        "source": "tests/reference/fp_stress.py: exact verdicts in Python fractions (rational arithmetic)",
        "seed": SEED,
        "versions": VERSIONS,
        "models": models,
        "cases": cases,
    }
    with open(os.path.join(OUT_DIR, "manifest.json"), "w") as f:
        f.write(json.dumps(manifest, indent=1) + "\n")
    summary = {}
    for c in cases:
        key = (c["norm"], c["verdict"], c["flip_double"] is not None)
        summary[key] = summary.get(key, 0) + 1
    for k in sorted(summary):
        print("norm %s, %s, flipping double found: %s: %d" % (k + (summary[k],)), file=sys.stderr)


if __name__ == "__main__":
    main()
