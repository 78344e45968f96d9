#!/usr/bin/env python3
"""Float32 ONNX models evaluated by onnxruntime at the points where a class is
most likely to change, for tests/fp32_ort.rs (the float32 claim: a certified
sample keeps its class when the model runs in float32).

Run from the project root (deterministic: fixed seed, one onnxruntime thread;
rerunning rewrites the same bytes with the pinned versions of
tests/reference/requirements.txt, about a minute):
    /work/venv/bin/python tests/reference/fp32_ort.py
With a built binary it can also run the whole check itself (it calls
`ballast certify --report` on every model and compares, printing a summary):
    /work/venv/bin/python tests/reference/fp32_ort.py --check target/release/ballast

Outputs (tests/reference/out/fp32_ort/):
    mNN.onnx         float32 ONNX graphs (opset 13) written with onnx.helper;
                     the input range, when the model has one, is in the
                     metadata keys ballast reads (docs/import.md)
    mNN.csv          the samples (header f0..f{n-1},label; label = the class
                     in exact arithmetic, which onnxruntime also gives at the
                     sample itself)
    manifest.json    per model its rows; per row the radii (eps) of its cases
                     and the points, each with onnxruntime's verdict

Models (numpy default_rng(SEED) draws every number, stored as float32):
  plain      ordinary ReLU MLPs (Gemm, or MatMul + Add), inputs in [0, 1]
  large      weights and inputs of large magnitude (logits 1e4..1e6), one
             without an input range
  small      inputs in [0, 1e-4] (eps down to 1e-9), and one whose hidden
             values are float32 subnormals (weights 1e-25, then 1e37)
  tie        output rows equal up to ~1e-6 relative: two classes within
             float32 rounding of each other over the whole box, logits ~1e3
  chain      affine steps that an importer may compose: Gemm with a bias of
             1e5 followed by Add(-1e5); MatMul followed by MatMul with
             cancelling entries; Gemm followed by BatchNormalization with a
             running mean of 1e4; Sub/Div input normalisation around 1e4 with
             std 1e-2; Mul/Add of 1e4 after a ReLU, cancelled by the next bias
  huge       weights ~1e36: the logits overflow float32 at some corners

Cases and points: per row a list of radii (L-inf eps), each tuned by
bisection so that the float64 margin at the gradient-sign corner equals a
target (relative to the largest logit at the sample: 1e-2, 1e-4, 1e-6, 1e-7,
3e-8, -1e-7): the small targets put the exact margin below float32's rounding
of the logits. For every case and every other class j the points are
  - the box corner chosen by the sign of the gradient of the margin
    z_label - z_j at the sample ("corner"), clipped to the input range;
  - its neighbours with one of the (up to) three coordinates of smallest
    |gradient| flipped to the other side ("neighbour");
  - the same corner with every coordinate rounded to the float32 value next
    to it on the inside of the ball ("corner32": onnxruntime rounds its input
    to float32, which may leave the ball; these points are exactly float32);
  - the best point of a float64 PGD on the margin (Madry et al., 2018; sign
    steps, step halved every 15 of 60 steps, starts at the sample and two
    random points) ("pgd") and the gradient-sign corner at that point
    ("pgd_corner").
Every point is a double inside the ball and the range, checked exactly with
fractions. onnxruntime evaluates every point in float32 in four ways: graph
optimisations enabled (the default) and disabled, each with all points of a
model in one batch and with each point alone; a point "keeps" the class when
the label's logit is strictly above every other logit in all four (a tie, an
infinity or a NaN does not keep it). Also recorded: onnxruntime's smallest
margin over the four and, for graphs without BatchNormalization (whose sqrt is
irrational), the exact margin (fractions).
"""
import argparse
import csv
import io
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
from fractions import Fraction

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

SEED = 17_2026
OUT_DIR = os.path.join("tests", "reference", "out", "fp32_ort")
TARGETS = [1e-2, 1e-4, 1e-6, 1e-7, 3e-8, -1e-7]
ROWS = 5
VERSIONS = {
    "python": platform.python_version(),
    "numpy": np.__version__,
    "onnx": onnx.__version__,
    "onnxruntime": ort.__version__,
}
F32 = np.float32


# ---------------------------------------------------------------------------
# Graphs: a list of steps, written to ONNX and evaluated in float64 / exactly
# ---------------------------------------------------------------------------
#   ("gemm", W out x in, b)   Gemm(x, W, b, transB=1)
#   ("matmul", M in x out)    MatMul(x, M)
#   ("add"|"sub"|"mul"|"div", v)
#   ("bn", scale, B, mean, var, epsilon)
#   ("relu",)


def f32(a):
    return np.asarray(a, dtype=F32)


def to_onnx(steps, dim, meta):
    nodes, inits = [], []
    cur = "x"
    for i, step in enumerate(steps):
        out = f"h{i}"
        kind = step[0]
        if kind == "gemm":
            inits += [numpy_helper.from_array(step[1], f"W{i}"), numpy_helper.from_array(step[2], f"b{i}")]
            nodes.append(helper.make_node("Gemm", [cur, f"W{i}", f"b{i}"], [out], transB=1, name=f"gemm{i}"))
        elif kind == "matmul":
            inits.append(numpy_helper.from_array(step[1], f"M{i}"))
            nodes.append(helper.make_node("MatMul", [cur, f"M{i}"], [out], name=f"matmul{i}"))
        elif kind in ("add", "sub", "mul", "div"):
            inits.append(numpy_helper.from_array(step[1], f"v{i}"))
            nodes.append(helper.make_node(kind.capitalize(), [cur, f"v{i}"], [out], name=f"{kind}{i}"))
        elif kind == "bn":
            _, scale, B, mean, var, epsilon = step
            names = [f"{n}{i}" for n in ("scale", "B", "mean", "var")]
            for n, v in zip(names, (scale, B, mean, var)):
                inits.append(numpy_helper.from_array(v, n))
            nodes.append(helper.make_node("BatchNormalization", [cur] + names, [out], epsilon=epsilon,
                                          name=f"bn{i}"))
        elif kind == "relu":
            nodes.append(helper.make_node("Relu", [cur], [out], name=f"relu{i}"))
        cur = out
    nodes.append(helper.make_node("Identity", [cur], ["logits"], name="out"))
    width = output_width(steps, dim)
    graph = helper.make_graph(
        nodes, "fp32_ort", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", dim])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["batch", width])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)],
                              producer_name="fp32_ort.py", ir_version=7)
    for k, v in meta.items():
        model.metadata_props.append(onnx.StringStringEntryProto(key=k, value=v))
    onnx.checker.check_model(model)
    return model.SerializeToString()


def output_width(steps, dim):
    width = dim
    for step in steps:
        if step[0] == "gemm":
            width = step[1].shape[0]
        elif step[0] == "matmul":
            width = step[1].shape[1]
    return width


def forward64(steps, x):
    """float64 forward pass of the graph (float32 parameters widened exactly); also the ReLU masks."""
    h, masks = np.asarray(x, dtype=np.float64), []
    for step in steps:
        kind = step[0]
        if kind == "gemm":
            h = step[1].astype(np.float64) @ h + step[2].astype(np.float64)
        elif kind == "matmul":
            h = h @ step[1].astype(np.float64)
        elif kind == "add":
            h = h + step[1].astype(np.float64)
        elif kind == "sub":
            h = h - step[1].astype(np.float64)
        elif kind == "mul":
            h = h * step[1].astype(np.float64)
        elif kind == "div":
            h = h / step[1].astype(np.float64)
        elif kind == "bn":
            scale, B, mean, var = (v.astype(np.float64) for v in step[1:5])
            h = (h - mean) / np.sqrt(var + np.float64(F32(step[5]))) * scale + B
        elif kind == "relu":
            masks.append(h > 0)
            h = np.maximum(h, 0.0)
    return h, masks


def margin_gradient64(steps, x, label, j):
    """Gradient of z_label - z_j at x (float64 backpropagation)."""
    _, masks = forward64(steps, x)
    width = output_width(steps, len(x))
    g = np.zeros(width)
    g[label], g[j] = 1.0, -1.0
    m = len(masks)
    for step in reversed(steps):
        kind = step[0]
        if kind == "gemm":
            g = step[1].astype(np.float64).T @ g
        elif kind == "matmul":
            g = step[1].astype(np.float64) @ g
        elif kind == "mul":
            g = g * step[1].astype(np.float64)
        elif kind == "div":
            g = g / step[1].astype(np.float64)
        elif kind == "bn":
            _, scale, _, _, var, epsilon = step
            g = g * scale.astype(np.float64) / np.sqrt(var.astype(np.float64) + np.float64(F32(epsilon)))
        elif kind == "relu":
            m -= 1
            g = g * masks[m]
    return g


def exact_logits(steps, x):
    """Logits in exact rational arithmetic (None for graphs with BatchNormalization)."""
    if any(s[0] == "bn" for s in steps):
        return None
    h = [Fraction(float(v)) for v in x]
    for step in steps:
        kind = step[0]
        if kind == "gemm":
            W, b = step[1], step[2]
            h = [sum((Fraction(float(W[r, c])) * h[c] for c in range(len(h))), Fraction(float(b[r])))
                 for r in range(W.shape[0])]
        elif kind == "matmul":
            M = step[1]
            h = [sum((h[r] * Fraction(float(M[r, c])) for r in range(len(h))), Fraction(0))
                 for c in range(M.shape[1])]
        elif kind in ("add", "sub", "mul", "div"):
            v = [Fraction(float(t)) for t in step[1]]
            op = {"add": lambda a, b: a + b, "sub": lambda a, b: a - b,
                  "mul": lambda a, b: a * b, "div": lambda a, b: a / b}[kind]
            h = [op(a, b) for a, b in zip(h, v)]
        elif kind == "relu":
            h = [max(a, Fraction(0)) for a in h]
    return h


def margin_of(logits, label):
    others = [v for k, v in enumerate(logits) if k != label]
    return logits[label] - max(others)


# ---------------------------------------------------------------------------
# The models
# ---------------------------------------------------------------------------


def normal(rng, *shape, scale=1.0):
    return f32(rng.standard_normal(shape) * scale)


def mlp(rng, sizes, weight_scale=1.0, bias_scale=0.1, matmul=False):
    steps = []
    for i in range(len(sizes) - 1):
        n, m = sizes[i], sizes[i + 1]
        W = normal(rng, m, n, scale=weight_scale / math.sqrt(n))
        b = normal(rng, m, scale=bias_scale)
        if matmul:
            steps += [("matmul", np.ascontiguousarray(W.T)), ("add", b)]
        else:
            steps.append(("gemm", W, b))
        if i < len(sizes) - 2:
            steps.append(("relu",))
    return steps


def tie_linear(rng, dim, scale):
    """Three classes; rows 0 and 1 differ by ~1e-6 relative, class 2 far below near the samples."""
    w0 = f32(rng.uniform(0.5, 1.0, dim) * scale * np.where(rng.random(dim) < 0.5, -1, 1))
    w1 = f32(w0.astype(np.float64) * (1 + rng.standard_normal(dim) * 1e-6))
    w2 = f32(rng.uniform(-1, 1, dim) * scale * 0.1)
    W = np.stack([w0, w1, w2])
    b = f32([0.0, 0.0, -scale * dim])
    return [("gemm", W, b)]


def tie_hidden(rng, dim, hidden, scale):
    """One hidden layer of large activations; output rows equal up to ~1e-6 relative."""
    W1 = normal(rng, hidden, dim, scale=1.0)
    b1 = f32(np.abs(rng.standard_normal(hidden)) * 4 + 4)  # mostly active near the samples
    r0 = normal(rng, hidden, scale=scale)
    r1 = f32(r0.astype(np.float64) * (1 + rng.standard_normal(hidden) * 1e-6))
    W2 = np.stack([r0, r1])
    return [("gemm", W1, b1), ("relu",), ("gemm", W2, f32([0.0, 0.0]))]


def chain_bias(rng, dim, hidden, classes):
    W1 = normal(rng, hidden, dim)
    b1 = f32(1e5 + rng.standard_normal(hidden))
    tail = mlp(rng, [hidden, classes])
    return [("gemm", W1, b1), ("add", f32(np.full(hidden, -1e5))), ("relu",)] + tail


def chain_matmul(rng, dim, hidden, classes):
    A = normal(rng, dim, hidden)
    big = f32(rng.uniform(1e3, 2e3, (hidden, hidden)) * np.where(rng.random((hidden, hidden)) < 0.5, -1, 1))
    # Pairs of rows nearly cancel: row 2k+1 = -row 2k + small, so A @ B has small entries.
    for k in range(0, hidden - 1, 2):
        big[k + 1] = f32(-big[k].astype(np.float64) + rng.standard_normal(hidden))
    A[:, 1::2] = A[:, 0::2][:, : A[:, 1::2].shape[1]]
    b = normal(rng, hidden)
    tail = mlp(rng, [hidden, classes], weight_scale=0.1)
    return [("matmul", A), ("matmul", big), ("add", b), ("relu",)] + tail


def chain_bn(rng, dim, hidden, classes):
    W1 = normal(rng, hidden, dim)
    b1 = f32(1e4 + rng.standard_normal(hidden))
    scale = f32(rng.uniform(0.5, 2.0, hidden))
    B = normal(rng, hidden, scale=0.5)
    mean = f32(1e4 + rng.standard_normal(hidden) * 0.5)
    var = f32(rng.uniform(0.5, 2.0, hidden))
    tail = mlp(rng, [hidden, classes])
    return [("gemm", W1, b1), ("bn", scale, B, mean, var, 1e-5), ("relu",)] + tail


def chain_normalize(rng, dim, classes, mean):
    body = mlp(rng, [dim, 8, classes])
    return [("sub", mean), ("div", f32(np.full(dim, 1e-2)))] + body


def chain_post(rng, dim, hidden, classes):
    W1 = normal(rng, hidden, dim)
    b1 = normal(rng, hidden, scale=0.5)
    s = f32(rng.uniform(0.5, 2.0, hidden))
    t = f32(np.full(hidden, 1e4))
    W2 = normal(rng, classes, hidden, scale=1 / math.sqrt(hidden))
    b2 = f32(-(W2.astype(np.float64) @ t.astype(np.float64)) + rng.standard_normal(classes) * 0.1)
    return [("gemm", W1, b1), ("relu",), ("mul", s), ("add", t), ("gemm", W2, b2)]


def subnormal(rng, dim, hidden, classes):
    W1 = f32(np.abs(rng.standard_normal((hidden, dim))) * 1e-25)
    b1 = f32(np.zeros(hidden))
    W2 = normal(rng, classes, hidden, scale=1e37)
    return [("gemm", W1, b1), ("relu",), ("gemm", W2, f32(np.zeros(classes)))]


def huge(rng, dim, hidden, classes):
    W1 = f32(np.abs(rng.standard_normal((hidden, dim))) * 1e37)
    W2 = f32(np.abs(rng.standard_normal((classes, hidden))) + 0.5)
    return [("gemm", W1, f32(np.zeros(hidden))), ("relu",), ("gemm", W2, f32(np.zeros(classes)))]


def balanced(steps, point):
    """The graph with its last bias moved so that every logit is (about) equal at `point`: both
    classes then occur near it."""
    z, _ = forward64(steps, point)
    kind, W, b = steps[-1]
    assert kind == "gemm"
    return steps[:-1] + [(kind, W, f32(b.astype(np.float64) - (z - z.mean())))]


def model_specs(rng):
    """(family, steps, dim, lower, upper); lower/upper None = no input range."""
    one = lambda d: (np.zeros(d), np.ones(d))  # noqa: E731
    specs = []
    specs.append(("plain", mlp(rng, [4, 8, 8, 3]), 4, *one(4)))
    specs.append(("plain", mlp(rng, [16, 16, 16, 4], matmul=True), 16, *one(16)))
    specs.append(("plain", balanced(mlp(rng, [6, 12, 2], weight_scale=3.0), np.full(6, 0.5)), 6, *one(6)))
    specs.append(("large", mlp(rng, [6, 10, 3], weight_scale=30.0, bias_scale=100.0), 6,
                  np.zeros(6), np.full(6, 1000.0)))
    specs.append(("large", mlp(rng, [3, 6, 6, 2], weight_scale=1e3, bias_scale=1e3), 3, None, None))
    specs.append(("small", mlp(rng, [4, 8, 3], weight_scale=1e4), 4, np.zeros(4), np.full(4, 1e-4)))
    specs.append(("small", balanced(subnormal(rng, 3, 8, 2), np.full(3, 5.5e-15)), 3, np.full(3, 1e-15),
                  np.full(3, 1e-14)))
    specs.append(("tie", tie_linear(rng, 5, 100.0), 5, np.zeros(5), np.full(5, 10.0)))
    specs.append(("tie", tie_linear(rng, 12, 1000.0), 12, np.zeros(12), np.ones(12)))
    specs.append(("tie", balanced(tie_hidden(rng, 4, 6, 100.0), np.full(4, 0.5)), 4, *one(4)))
    specs.append(("chain", balanced(chain_bias(rng, 4, 6, 3), np.full(4, 0.5)), 4, *one(4)))
    specs.append(("chain", balanced(chain_matmul(rng, 4, 6, 3), np.full(4, 0.5)), 4, *one(4)))
    specs.append(("chain", chain_bn(rng, 4, 6, 3), 4, *one(4)))
    mean = f32(1e4 + rng.uniform(-1, 1, 3))
    specs.append(("chain", chain_normalize(rng, 3, 3, mean), 3,
                  mean.astype(np.float64) - 0.05, mean.astype(np.float64) + 0.05))
    specs.append(("chain", chain_post(rng, 4, 6, 3), 4, *one(4)))
    specs.append(("huge", balanced(huge(rng, 3, 4, 2), np.full(3, 5.0)), 3, np.zeros(3), np.full(3, 10.0)))
    return specs


# ---------------------------------------------------------------------------
# Points in the ball, exactly
# ---------------------------------------------------------------------------


def inside(x, c, eps, lower, upper):
    """|x_i - c_i| <= eps and lower_i <= x_i <= upper_i, in exact arithmetic."""
    e = Fraction(eps)
    for i, (xi, ci) in enumerate(zip(x, c)):
        if abs(Fraction(float(xi)) - Fraction(float(ci))) > e:
            return False
        if lower is not None and not (lower[i] <= xi <= upper[i]):
            return False
    return True


def snap_inside(x, c, eps, lower, upper):
    """x clipped to the ball and the range; a coordinate that rounding left outside the ball moves
    toward the centre one double at a time until it is inside."""
    x = [min(max(float(v), ci - eps), ci + eps) for v, ci in zip(x, c)]
    for i in range(len(x)):
        if lower is not None:
            x[i] = min(max(x[i], float(lower[i])), float(upper[i]))
        while abs(Fraction(x[i]) - Fraction(float(c[i]))) > Fraction(eps):
            x[i] = float(np.nextafter(x[i], c[i]))
    return x


def corner(c, eps, g, lower, upper, flip=()):
    """The corner that lowers the margin to first order: c - eps * sign(g) (sign 0 -> +)."""
    s = np.where(g > 0, -1.0, 1.0)
    for i in flip:
        s[i] = -s[i]
    return snap_inside(np.asarray(c) + s * eps, c, eps, lower, upper)


def inward32(x, c, eps, lower, upper):
    """Each coordinate as the nearest float32 on the centre's side that stays in the ball and range
    (None when there is none)."""
    out = []
    for i, v in enumerate(x):
        w = F32(v)
        for _ in range(4):
            if inside([float(w)], [c[i]], eps, None if lower is None else [lower[i]],
                      None if upper is None else [upper[i]]):
                break
            w = np.nextafter(w, F32(c[i]))
        else:
            return None
        out.append(float(w))
    return out if inside(out, c, eps, lower, upper) else None


def pgd(steps, c, eps, label, j, lower, upper, rng):
    """float64 PGD on z_label - z_j: sign steps, step eps/4 halved every 15 steps, 60 steps, three
    starts; returns the point of lowest float64 margin."""
    best, best_m = None, math.inf
    starts = [np.asarray(c, dtype=np.float64)] + [np.asarray(c) + rng.uniform(-eps, eps, len(c))
                                                   for _ in range(2)]
    for x in starts:
        x = np.asarray(snap_inside(x, c, eps, lower, upper))
        step = eps / 4
        for t in range(60):
            z, _ = forward64(steps, x)
            m = z[label] - z[j]
            if m < best_m:
                best, best_m = x.copy(), m
            g = margin_gradient64(steps, x, label, j)
            x = np.asarray(snap_inside(x - step * np.sign(g), c, eps, lower, upper))
            if t % 15 == 14:
                step /= 2
        z, _ = forward64(steps, x)
        if z[label] - z[j] < best_m:
            best, best_m = x.copy(), z[label] - z[j]
    return [float(v) for v in best]


def worst_corner_margin(steps, c, eps, label, classes, lower, upper):
    out = math.inf
    for j in range(classes):
        if j == label:
            continue
        g = margin_gradient64(steps, c, label, j)
        z, _ = forward64(steps, corner(c, eps, g, lower, upper))
        out = min(out, margin_of(list(z), label))
    return out


def span_of(c, lower, upper):
    """The largest radius worth trying: the widest range, or 10 max(1, |c|) without a range."""
    if lower is None:
        return 10.0 * max(1.0, float(np.max(np.abs(c))))
    return float(np.max(np.asarray(upper) - np.asarray(lower)))


def tune_eps(steps, c, label, classes, lower, upper, target):
    """A radius where the float64 margin at the gradient-sign corners is about `target` (bisection on
    eps; None when no radius reaches it)."""
    f = lambda e: worst_corner_margin(steps, c, e, label, classes, lower, upper)  # noqa: E731
    if f(0.0) <= target:
        return None
    span = span_of(c, lower, upper)
    lo, hi = 0.0, span * 1e-9
    while f(hi) > target:
        lo, hi = hi, hi * 2
        if hi > span * 2:
            return None
    for _ in range(200):
        mid = (lo + hi) / 2
        if mid in (lo, hi):
            break
        if f(mid) > target:
            lo = mid
        else:
            hi = mid
    return float(hi)


# ---------------------------------------------------------------------------
# onnxruntime
# ---------------------------------------------------------------------------

MODES = [("optimised", ort.GraphOptimizationLevel.ORT_ENABLE_ALL),
         ("unoptimised", ort.GraphOptimizationLevel.ORT_DISABLE_ALL)]


def sessions(model_bytes):
    out = []
    for name, level in MODES:
        opts = ort.SessionOptions()
        opts.graph_optimization_level = level
        opts.intra_op_num_threads = 1
        opts.inter_op_num_threads = 1
        out.append((name, ort.InferenceSession(model_bytes, opts, providers=["CPUExecutionProvider"])))
    return out


def ort_logits(sess_list, points):
    """Per evaluation way, float32 logits of every point: [(way, array n x classes)]."""
    X = np.asarray(points, dtype=np.float64).astype(F32)
    out = []
    for name, sess in sess_list:
        out.append((f"{name}/batch", sess.run(None, {"x": X})[0]))
        out.append((f"{name}/single", np.concatenate([sess.run(None, {"x": X[i:i + 1]})[0]
                                                       for i in range(len(X))])))
    return out


def keeps(logits, label):
    z = np.asarray(logits, dtype=np.float64)
    if not np.all(np.isfinite(z)):
        return False
    return bool(all(z[label] > z[k] for k in range(len(z)) if k != label))


def ort_margin(logits, label):
    z = np.asarray(logits, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        m = z[label] - max(z[k] for k in range(len(z)) if k != label)
    return float(m) if np.isfinite(m) else None


# ---------------------------------------------------------------------------
# Generation
# ---------------------------------------------------------------------------


def centre_sample(rng, steps, dim, lower, upper, sess_list, classes, family):
    """A sample whose exact class and onnxruntime's class agree with a clear margin."""
    for _ in range(1000):
        if lower is None:
            c = rng.uniform(-100, 100, dim)
        elif family == "tie":
            c = lower + (upper - lower) * rng.uniform(0.3, 0.7, dim)
        else:
            c = lower + (upper - lower) * rng.uniform(0.1, 0.9, dim)
        c = [float(v) for v in c]
        z, _ = forward64(steps, c)
        if not np.all(np.isfinite(z)):
            continue
        label = int(np.argmax(z))
        if margin_of(list(z), label) <= 0:
            continue
        ex = exact_logits(steps, c)
        if ex is not None and max(range(classes), key=lambda k: ex[k]) != label:
            continue
        if worst_corner_margin(steps, c, span_of(c, lower, upper), label, classes, lower, upper) >= 0:
            continue  # no radius changes the class to first order: no case to make
        if all(keeps(lg[0], label) for _, lg in ort_logits(sess_list, [c])):
            return c, label
    raise RuntimeError("no usable sample")


def row_points(steps, c, label, classes, eps_list, lower, upper, rng):
    """(kind, case index, point) for every case of one row."""
    out = [("centre", None, list(c))]
    for k, eps in enumerate(eps_list):
        for j in range(classes):
            if j == label:
                continue
            g = margin_gradient64(steps, c, label, j)
            x = corner(c, eps, g, lower, upper)
            out.append(("corner", k, x))
            for i in np.argsort(np.abs(g), kind="stable")[:min(3, len(c))]:
                out.append(("neighbour", k, corner(c, eps, g, lower, upper, flip=(int(i),))))
            x32 = inward32(x, c, eps, lower, upper)
            if x32 is not None:
                out.append(("corner32", k, x32))
            p = pgd(steps, c, eps, label, j, lower, upper, rng)
            out.append(("pgd", k, p))
            out.append(("pgd_corner", k, corner(c, eps, margin_gradient64(steps, p, label, j), lower,
                                                upper)))
    seen, unique = set(), []
    for kind, k, x in out:
        key = tuple(x)
        if key not in seen:
            seen.add(key)
            unique.append((kind, k, x))
    return unique


def build():
    rng = np.random.default_rng(SEED)
    os.makedirs(OUT_DIR, exist_ok=True)
    manifest = {"versions": VERSIONS, "seed": SEED, "targets": TARGETS,
                "evaluations": [f"{m}/{w}" for m, _ in MODES for w in ("batch", "single")],
                "models": []}
    for index, (family, steps, dim, lower, upper) in enumerate(model_specs(rng)):
        mid = f"m{index:02d}"
        meta = {}
        if lower is not None:
            meta = {"ballast.input.lower": json.dumps([float(v) for v in lower]),
                    "ballast.input.upper": json.dumps([float(v) for v in upper])}
        data = to_onnx(steps, dim, meta)
        with open(os.path.join(OUT_DIR, f"{mid}.onnx"), "wb") as f:
            f.write(data)
        classes = output_width(steps, dim)
        sess_list = sessions(data)
        rows = []
        for r in range(ROWS):
            c, label = centre_sample(rng, steps, dim, lower, upper, sess_list, classes, family)
            z0, _ = forward64(steps, c)
            scale = float(np.max(np.abs(z0)))
            eps_list, targets = [], []
            for t in TARGETS:
                e = tune_eps(steps, c, label, classes, lower, upper, t * scale)
                if e is not None and e > 0 and e not in eps_list:
                    eps_list.append(e)
                    targets.append(t)
            points = row_points(steps, c, label, classes, eps_list, lower, upper, rng)
            for _, k, x in points:
                assert inside(x, c, 0.0 if k is None else eps_list[k], lower, upper), (mid, r, x)
            evaluations = ort_logits(sess_list, [x for _, _, x in points])
            records = []
            for p, (kind, k, x) in enumerate(points):
                per_way = [lg[p] for _, lg in evaluations]
                margins = [ort_margin(z, label) for z in per_way]
                ex = exact_logits(steps, x)
                records.append({
                    "kind": kind,
                    "case": k,
                    "x": x,
                    "ort_kept": all(keeps(z, label) for z in per_way),
                    "ort_margin": None if None in margins else min(margins),
                    "exact_margin": None if ex is None else float(margin_of(ex, label)),
                })
            rows.append({"row": r, "label": label, "centre": c, "logit_scale": scale,
                         "cases": [{"eps": repr(e), "target": t} for e, t in zip(eps_list, targets)],
                         "points": records})
        with open(os.path.join(OUT_DIR, f"{mid}.csv"), "w", newline="") as f:
            w = csv.writer(f, lineterminator="\n")
            w.writerow([f"f{i}" for i in range(dim)] + ["label"])
            for row in rows:
                w.writerow([repr(v) for v in row["centre"]] + [row["label"]])
        manifest["models"].append({
            "id": mid, "family": family, "onnx": f"{mid}.onnx", "data": f"{mid}.csv", "dim": dim,
            "classes": classes, "steps": [s[0] for s in steps],
            "range": None if lower is None else [[float(v) for v in lower], [float(v) for v in upper]],
            "rows": rows})
        flips = sum(not p["ort_kept"] for row in rows for p in row["points"])
        print(f"{mid} {family}: {sum(len(r['cases']) for r in rows)} cases, "
              f"{sum(len(r['points']) for r in rows)} points, {flips} change class in float32",
              file=sys.stderr)
    with open(os.path.join(OUT_DIR, "manifest.json"), "w") as f:
        # Compact, one point per line (the points are most of the file).
        f.write(json.dumps(manifest, separators=(",", ":")).replace('{"kind":', '\n{"kind":') + "\n")
    return manifest


# ---------------------------------------------------------------------------
# The check (the same as tests/fp32_ort.rs, for a quick look with a built binary)
# ---------------------------------------------------------------------------


def check(manifest, binary):
    false_certificates, certified, per_model = [], 0, {}
    with tempfile.TemporaryDirectory() as tmp:
        for m in manifest["models"]:
            eps = sorted({float(c["eps"]) for r in m["rows"] for c in r["cases"]})
            report = os.path.join(tmp, f"{m['id']}.json")
            subprocess.run([binary, "certify", "--model", os.path.join(OUT_DIR, m["onnx"]), "--data",
                            os.path.join(OUT_DIR, m["data"]), "--eps", ",".join(repr(e) for e in eps),
                            "--report", report], check=True, capture_output=True)
            samples = json.load(open(report))["samples"]
            for row, sample in zip(m["rows"], samples):
                assert sample["index"] == row["row"]
                sweep = sample.get("sweep") or [{"epsilon": eps[0], "status": sample["status"]}]
                for outcome in sweep:
                    if outcome["status"] != "certified":
                        continue
                    certified += 1
                    per_model[m["id"]] = per_model.get(m["id"], 0) + 1
                    e = Fraction(outcome["epsilon"])
                    for p in row["points"]:
                        d = max(abs(Fraction(a) - Fraction(b)) for a, b in zip(p["x"], row["centre"]))
                        if d <= e and not p["ort_kept"]:
                            false_certificates.append((m["id"], row["row"], outcome["epsilon"], p))
    radii = len({(f[0], f[1], f[2]) for f in false_certificates})
    print(f"certified (row, eps) pairs: {certified} {per_model}; false certificates: {radii} radii "
          f"({len(false_certificates)} points)")
    by_model = {}
    for f in {(f[0], f[1], f[2]) for f in false_certificates}:
        by_model[f[0]] = by_model.get(f[0], 0) + 1
    print("radii by model:", dict(sorted(by_model.items())))
    for f in false_certificates[:20]:
        print("  ", f[0], "row", f[1], "eps", f[2], f[3]["kind"], "ort margin", f[3]["ort_margin"],
              "exact", f[3]["exact_margin"])
    return not false_certificates


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--check", metavar="BALLAST", help="also run this ballast binary and compare")
    args = parser.parse_args()
    manifest = build()
    if args.check and not check(manifest, args.check):
        sys.exit(1)


if __name__ == "__main__":
    main()
