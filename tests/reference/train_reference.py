#!/usr/bin/env python3
"""Outside reference for the trainer's loss and gradients: scikit-learn's own
MLPClassifier loss and backpropagated gradients on the committed digits
fixture model (tests/data/digits_mlp.model.json, 64-32-10) for the first 64
rows of tests/data/digits_train.csv.

Run from the project root:
    /work/venv/bin/python tests/reference/train_reference.py

Writes tests/reference/out/train_gradients.json with
  - loss: mean softmax cross-entropy, from the public sklearn.metrics.log_loss
    on MLPClassifier.predict_proba;
  - coef_grads / intercept_grads: from MLPClassifier._backprop with alpha = 0
    (a private scikit-learn method, pinned by requirements.txt); its loss is
    asserted equal to the public log_loss value.
Gradients are stored per dense layer as rows = output units (the ballast
layout, i.e. scikit-learn's coef_grads[i].T).
"""
import json
import os

import numpy as np
import sklearn
from sklearn.metrics import log_loss
from sklearn.neural_network import MLPClassifier

ROWS = 64
OUT = os.path.join("tests", "reference", "out", "train_gradients.json")


def main():
    with open(os.path.join("tests", "data", "digits_mlp.model.json")) as f:
        model = json.load(f)
    dense = [l for l in model["layers"] if l["kind"] == "dense"]
    data = np.loadtxt(os.path.join("tests", "data", "digits_train.csv"), delimiter=",", skiprows=1)
    y_all = data[:, 0].astype(int)
    x_all = data[:, 1:]
    # A fitted classifier of the right shape (a short fit), then the fixture's weights put in place.
    clf = MLPClassifier(hidden_layer_sizes=(32,), random_state=0, max_iter=1, alpha=0.0)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        clf.fit(x_all, y_all)
    clf.coefs_ = [np.array(l["weights"], dtype=float).T.copy() for l in dense]
    clf.intercepts_ = [np.array(l["bias"], dtype=float).copy() for l in dense]
    x = x_all[:ROWS]
    y = y_all[:ROWS]
    proba = clf.predict_proba(x)
    public_loss = log_loss(y, proba, labels=list(range(10)))
    y_bin = clf._label_binarizer.transform(y)
    layer_units = [x.shape[1]] + [c.shape[1] for c in clf.coefs_]
    activations = [x] + [np.empty((ROWS, n)) for n in layer_units[1:]]
    deltas = [np.empty_like(a) for a in activations[1:]]
    coef_grads = [np.empty_like(c) for c in clf.coefs_]
    intercept_grads = [np.empty_like(b) for b in clf.intercepts_]
    loss, coef_grads, intercept_grads = clf._backprop(
        x, y_bin, None, activations, deltas, coef_grads, intercept_grads
    )
    assert abs(loss - public_loss) < 1e-10, (loss, public_loss)
    out = {
        "source": "scikit-learn MLPClassifier._backprop (alpha=0) and sklearn.metrics.log_loss on "
        "tests/data/digits_mlp.model.json, first %d rows of tests/data/digits_train.csv" % ROWS,
        "versions": {"numpy": np.__version__, "scikit-learn": sklearn.__version__},
        "rows": ROWS,
        "loss": float(public_loss),
        "weight_gradients": [g.T.tolist() for g in coef_grads],
        "bias_gradients": [g.tolist() for g in intercept_grads],
    }
    with open(OUT, "w") as f:
        json.dump(out, f)
        f.write("\n")
    print("wrote", OUT, "loss", public_loss)


if __name__ == "__main__":
    main()
