#!/usr/bin/env python3
"""Outside-reference fixtures built from scikit-learn's bundled `load_digits`
dataset (the UCI optical-recognition-of-handwritten-digits test set, 8x8
images, 1797 samples, shipped inside the scikit-learn package).

Run from the project root:
    /work/venv/bin/python tests/reference/digits_fixtures.py

Writes:
    tests/data/digits_mlp.model.json        ballast.model/1, 64-32-10 ReLU MLP
    tests/data/digits_mlp_deep.model.json   ballast.model/1, 64-64-32-10 ReLU MLP
    tests/data/digits_train.csv             label,px0..px63 (features in [0,1])
    tests/data/digits_test.csv              label,px0..px63 (features in [0,1])
    tests/reference/out/digits_forward.json per-sample reference logits and
                                            scikit-learn predictions

Everything is deterministic: fixed random_state everywhere.
"""
import csv
import json
import os
import platform
import sys

import numpy as np
import scipy
import sklearn
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier

SCRIPT = "tests/reference/digits_fixtures.py"
SOURCE = (
    "scikit-learn load_digits (bundled copy of the UCI optical recognition of "
    "handwritten digits dataset), X scaled by 1/16 to [0,1], "
    "train_test_split(test_size=0.3, random_state=0, stratify=y)"
)
DATA_DIR = os.path.join("tests", "data")
OUT_DIR = os.path.join("tests", "reference", "out")

VERSIONS = {
    "python": platform.python_version(),
    "numpy": np.__version__,
    "scipy": scipy.__version__,
    "scikit-learn": sklearn.__version__,
}

MODELS = [
    # (file stem, ballast model name, hidden_layer_sizes)
    ("digits_mlp", "digits-mlp", (32,)),
    ("digits_mlp_deep", "digits-mlp-deep", (64, 32)),
]

N_FEATURES = 64
FEATURE_NAMES = [f"px{i}" for i in range(N_FEATURES)]


def load_split():
    digits = load_digits()
    X = digits.data.astype(np.float64) / 16.0
    y = digits.target.astype(np.int64)
    assert X.shape[1] == N_FEATURES
    assert X.min() >= 0.0 and X.max() <= 1.0
    return train_test_split(X, y, test_size=0.3, random_state=0, stratify=y)


def train(hidden, X_train, y_train):
    clf = MLPClassifier(hidden_layer_sizes=hidden, random_state=0, max_iter=500)
    clf.fit(X_train, y_train)
    # The export assumes ReLU hidden layers and a softmax output whose
    # pre-activation (the last dense layer) are the logits.
    assert clf.activation == "relu", clf.activation
    assert clf.out_activation_ == "softmax", clf.out_activation_
    assert list(clf.classes_) == list(range(10)), clf.classes_
    return clf


def numpy_logits(clf, X):
    """Forward pass from coefs_/intercepts_: ReLU hidden layers, identity last."""
    h = X
    n = len(clf.coefs_)
    for i, (W, b) in enumerate(zip(clf.coefs_, clf.intercepts_)):
        h = h @ W + b
        if i < n - 1:
            h = np.maximum(h, 0.0)
    return h


def to_floats(a):
    return [float(v) for v in np.asarray(a).ravel()]


def export_model(clf, name, hidden):
    layers = []
    n = len(clf.coefs_)
    for i, (W, b) in enumerate(zip(clf.coefs_, clf.intercepts_)):
        # ballast stores one weight row per OUTPUT unit: sklearn's coefs_[i].T
        WT = np.asarray(W).T
        layers.append({
            "kind": "dense",
            "weights": [to_floats(row) for row in WT],
            "bias": to_floats(b),
        })
        if i < n - 1:
            layers.append({"kind": "relu"})
    return {
        "format": "ballast.model/1",
        "name": name,
        "input": {"dim": N_FEATURES, "names": FEATURE_NAMES, "lower": 0.0, "upper": 1.0},
        "classes": [str(c) for c in clf.classes_],
        "layers": layers,
        "provenance": {
            "trained_by": "scikit-learn MLPClassifier",
            "script": SCRIPT,
            "versions": VERSIONS,
            "dataset": SOURCE,
            "recipe": {
                "hidden_layer_sizes": list(hidden),
                "activation": "relu",
                "out_activation": "softmax (exported last dense layer = logits, pre-softmax)",
                "random_state": 0,
                "max_iter": 500,
                "n_iter": int(clf.n_iter_),
            },
        },
    }


def write_csv(path, X, y):
    with open(path, "w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["label"] + FEATURE_NAMES)
        for label, row in zip(y, X):
            # repr() of a Python float round-trips exactly
            w.writerow([int(label)] + [repr(float(v)) for v in row])


def main():
    if not os.path.isdir(DATA_DIR) or not os.path.isdir(os.path.join("tests", "reference")):
        sys.exit("run from the project root")
    os.makedirs(OUT_DIR, exist_ok=True)

    X_train, X_test, y_train, y_test = load_split()
    write_csv(os.path.join(DATA_DIR, "digits_train.csv"), X_train, y_train)
    write_csv(os.path.join(DATA_DIR, "digits_test.csv"), X_test, y_test)

    forward = {
        "source": SOURCE,
        "versions": VERSIONS,
        "test_csv": "tests/data/digits_test.csv",
        "n_test": int(len(y_test)),
        "labels": [int(v) for v in y_test],
        "models": {},
    }
    for stem, name, hidden in MODELS:
        clf = train(hidden, X_train, y_train)
        model = export_model(clf, name, hidden)
        with open(os.path.join(DATA_DIR, f"{stem}.model.json"), "w") as f:
            json.dump(model, f)
            f.write("\n")

        logits = numpy_logits(clf, X_test)
        pred = clf.predict_proba(X_test).argmax(1)
        np_pred = logits.argmax(1)
        assert np.array_equal(np_pred, pred), f"{stem}: numpy argmax != sklearn"
        assert np.array_equal(clf.classes_[pred], clf.predict(X_test))
        acc = float(clf.score(X_test, y_test))
        assert abs(acc - float((pred == y_test).mean())) < 1e-12
        train_acc = float(clf.score(X_train, y_train))
        forward["models"][stem] = {
            "name": name,
            "model_file": f"tests/data/{stem}.model.json",
            "hidden_layer_sizes": list(hidden),
            "n_iter": int(clf.n_iter_),
            "test_accuracy": acc,
            "train_accuracy": train_acc,
            "predicted": [int(v) for v in pred],
            "logits": [to_floats(r) for r in logits],
        }
        print(f"{stem}: hidden={hidden} n_iter={clf.n_iter_} "
              f"train_acc={train_acc:.4f} test_acc={acc:.4f}")

    with open(os.path.join(OUT_DIR, "digits_forward.json"), "w") as f:
        json.dump(forward, f)
        f.write("\n")


if __name__ == "__main__":
    main()
