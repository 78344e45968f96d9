#!/usr/bin/env python3
"""Convolutional fixtures on scikit-learn's digits (8x8 images, tests/data/digits_*.csv) and their
exact references.

Every convolution here is computed with scipy.signal.correlate (the outside reference for the
arithmetic of a convolution), never with ballast. The networks are "random-feature" CNNs: convolution
kernels drawn with He scaling (seeded), the dense head fitted by scikit-learn on the convolution
features (LogisticRegression for the small model, MLPClassifier for the benchmark model).

Outputs
  tests/data/digits_cnn.model.json          conv 3x3 x8 stride 2 pad 1, relu, flatten, dense 10
  tests/reference/out/milp_digits_cnn.json  for 30 test rows the model classifies correctly, the
                                            exact minimum margin per other class over the L-inf ball
                                            (eps below) clipped to [0, 1]: scipy.optimize.milp (HiGHS)
                                            on the big-M encoding of the same network written out as
                                            dense matrices (the encoding of milp_reference.py)
  --bench DIR: DIR/digits_cnn_wide.model.json (conv 3x3 x16 pad 1, relu, conv 3x3 x16 stride 2 pad 1,
               relu, flatten, dense 80, relu, dense 10; > 20,000 parameters) and
               DIR/digits_cnn_wide_dense.model.json, the same network written out as dense layers,
               plus DIR/digits_cnn_rows.csv (200 test rows).

Run from the project root: /work/venv/bin/python tests/reference/cnn_fixtures.py [--bench DIR]
"""
import argparse
import csv
import json
import os
import sys

import numpy as np
import scipy
import sklearn
from scipy.signal import correlate
from sklearn.linear_model import LogisticRegression
from sklearn.neural_network import MLPClassifier

sys.path.insert(0, os.path.dirname(__file__))
import milp_reference  # noqa: E402  (the big-M encoding and its checks)

EPS = 0.07
VERSIONS = {"numpy": np.__version__, "scipy": scipy.__version__, "scikit-learn": sklearn.__version__}


def load(path):
    with open(path) as f:
        rows = list(csv.reader(f))
    data = np.array([[float(v) for v in r] for r in rows[1:]])
    return data[:, 1:], data[:, 0].astype(int), rows[0]


def conv2d(x, kernel, bias, stride, pad):
    """x: C x H x W; kernel: O x C x kh x kw. ONNX Conv (group 1) via scipy.signal.correlate."""
    c, h, w = x.shape
    padded = np.zeros((c, h + 2 * pad, w + 2 * pad))
    padded[:, pad : pad + h, pad : pad + w] = x
    out = []
    for o in range(kernel.shape[0]):
        full = sum(correlate(padded[i], kernel[o, i], mode="valid") for i in range(c))
        out.append(full[::stride, ::stride] + bias[o])
    return np.array(out)


def dense_form(kernel, bias, shape, stride, pad):
    """The convolution as a dense matrix (columns: images of unit vectors, via the same correlate)."""
    n = int(np.prod(shape))
    zero = conv2d(np.zeros(shape), kernel, bias, stride, pad).ravel()
    columns = [conv2d(np.eye(n)[i].reshape(shape), kernel, bias, stride, pad).ravel() - zero for i in range(n)]
    return np.array(columns).T, zero


def he(rng, shape):
    fan_in = int(np.prod(shape[1:]))
    return rng.normal(0.0, np.sqrt(2.0 / fan_in), size=shape)


def conv_layer(kernel, bias, stride, pad):
    return {
        "kind": "conv",
        "kernel": kernel.tolist(),
        "bias": bias.tolist(),
        "stride": [stride, stride],
        "padding": [pad, pad, pad, pad],
    }


def dense_layer(w, b):
    return {"kind": "dense", "weights": np.asarray(w).tolist(), "bias": np.asarray(b).tolist()}


def model_json(name, layers, shape, provenance):
    return {
        "format": "ballast.model/1",
        "name": name,
        "input": {"dim": int(np.prod(shape)), "shape": list(shape), "lower": 0.0, "upper": 1.0},
        "layers": layers,
        "provenance": provenance,
    }


def write(path, value):
    with open(path, "w") as f:
        json.dump(value, f)
        f.write("\n")
    print("wrote", path)


def small(x_train, y_train, x_test, y_test):
    rng = np.random.default_rng(18)
    kernel, bias = he(rng, (8, 1, 3, 3)), rng.normal(0.0, 0.05, 8)
    feats = lambda X: np.array([np.maximum(conv2d(x.reshape(1, 8, 8), kernel, bias, 2, 1), 0).ravel() for x in X])
    head = LogisticRegression(C=0.5, max_iter=3000).fit(feats(x_train), y_train)
    accuracy = head.score(feats(x_test), y_test)
    print(f"small CNN: test accuracy {accuracy:.3f}")
    layers = [conv_layer(kernel, bias, 2, 1), {"kind": "relu"}, {"kind": "flatten"}, dense_layer(head.coef_, head.intercept_)]
    provenance = {
        "made_by": "tests/reference/cnn_fixtures.py",
        "data": "scikit-learn load_digits (tests/data/digits_train.csv)",
        "note": "random He-scaled convolution (seed 18); head: LogisticRegression on the relu features",
        "test_accuracy": accuracy,
    }
    write("tests/data/digits_cnn.model.json", model_json("digits-cnn", layers, (1, 8, 8), provenance))
    # The same network written out as dense matrices, for the MILP.
    w1, b1 = dense_form(kernel, bias, (1, 8, 8), 2, 1)
    mlp = [(w1, b1), (head.coef_, head.intercept_)]
    # The dense form agrees with the convolution (a check of the reference itself).
    for x in x_test[:20]:
        direct = head.decision_function(feats([x]))[0]
        assert np.allclose(milp_reference.forward(mlp, x), direct, atol=1e-9)
    indices = milp_reference.pick_samples(mlp, x_test, y_test, 30)
    samples, seconds = milp_reference.solve_set(mlp, x_test, y_test, indices, EPS, with_lp=True)
    robust = sum(all(t["exact"] > 0 for t in s["targets"]) for s in samples)
    lp = sum(all(t["lp"] is not None and t["lp"] > 0 for t in s["targets"]) for s in samples)
    print(f"eps {EPS}: exact robust {robust}/30, LP relaxation proves {lp}, HiGHS {seconds:.1f} s")
    for s in samples:
        for t in s["targets"]:
            del t["seconds"]
    write(
        "tests/reference/out/milp_digits_cnn.json",
        {
            "source": "tests/reference/cnn_fixtures.py: big-M MILP (milp_reference.py encoding) solved by "
            "scipy.optimize.milp (HiGHS) on the CNN written out as dense matrices via scipy.signal.correlate",
            "model": "tests/data/digits_cnn.model.json",
            "data": "tests/data/digits_test.csv",
            "norm": "linf",
            "epsilon": EPS,
            "input_range": [0.0, 1.0],
            "robust": robust,
            "lp_proved": lp,
            "versions": VERSIONS,
            "samples": samples,
        },
    )


def wide(x_train, y_train, x_test, y_test, header, folder):
    rng = np.random.default_rng(1818)
    k1, b1 = he(rng, (16, 1, 3, 3)), rng.normal(0.0, 0.05, 16)
    k2, b2 = he(rng, (16, 16, 3, 3)), rng.normal(0.0, 0.05, 16)

    def feats(X):
        out = []
        for x in X:
            h = np.maximum(conv2d(x.reshape(1, 8, 8), k1, b1, 1, 1), 0)
            out.append(np.maximum(conv2d(h, k2, b2, 2, 1), 0).ravel())
        return np.array(out)

    head = MLPClassifier(hidden_layer_sizes=(80,), alpha=1e-3, max_iter=400, random_state=0).fit(feats(x_train), y_train)
    print(f"wide CNN: test accuracy {head.score(feats(x_test), y_test):.3f}")
    (w3, w4), (c3, c4) = head.coefs_, head.intercepts_
    layers = [
        conv_layer(k1, b1, 1, 1), {"kind": "relu"},
        conv_layer(k2, b2, 2, 1), {"kind": "relu"}, {"kind": "flatten"},
        dense_layer(w3.T, c3), {"kind": "relu"}, dense_layer(w4.T, c4),
    ]
    provenance = {"made_by": "tests/reference/cnn_fixtures.py --bench", "note": "random convolutions (seed 1818), MLPClassifier head"}
    os.makedirs(folder, exist_ok=True)
    cnn = model_json("digits-cnn-wide", layers, (1, 8, 8), provenance)
    write(os.path.join(folder, "digits_cnn_wide.model.json"), cnn)
    d1, e1 = dense_form(k1, b1, (1, 8, 8), 1, 1)
    d2, e2 = dense_form(k2, b2, (16, 8, 8), 2, 1)
    dense_layers = [dense_layer(d1, e1), {"kind": "relu"}, dense_layer(d2, e2), {"kind": "relu"}, dense_layer(w3.T, c3), {"kind": "relu"}, dense_layer(w4.T, c4)]
    flat = model_json("digits-cnn-wide-dense", dense_layers, (64,), provenance)
    del flat["input"]["shape"]
    write(os.path.join(folder, "digits_cnn_wide_dense.model.json"), flat)
    params = sum(np.size(l[k]) for l in layers if l["kind"] in ("conv", "dense") for k in ("kernel" if l["kind"] == "conv" else "weights", "bias"))
    print(f"wide CNN parameters: {params}")
    with open(os.path.join(folder, "digits_cnn_rows.csv"), "w", newline="") as f:
        out = csv.writer(f)
        out.writerow(header)
        for x, y in list(zip(x_test, y_test))[:200]:
            out.writerow([int(y)] + [repr(float(v)) for v in x])


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--bench", metavar="DIR")
    args = parser.parse_args()
    x_train, y_train, header = load("tests/data/digits_train.csv")
    x_test, y_test, _ = load("tests/data/digits_test.csv")
    if args.bench:
        wide(x_train, y_train, x_test, y_test, header, args.bench)
    else:
        small(x_train, y_train, x_test, y_test)


if __name__ == "__main__":
    main()
