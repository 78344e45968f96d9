"""Readers shared by the benchmark references: a ballast.model/1 file as a
list of dense layers (normalize folded in, ReLU between consecutive dense
layers), and a labelled CSV matched to the model's input names.

Follows docs/model-format.md and docs/data-format.md; only what the
references need (dense / relu / normalize layers, integer or class-name labels).
"""
import csv
import json

import numpy as np


def load_model(path):
    """Returns (layers, lower, upper, json): layers = [(W out x in, b)], ReLU between them."""
    with open(path) as f:
        model = json.load(f)
    dim = model["input"]["dim"]
    lower = np.broadcast_to(np.asarray(model["input"].get("lower", -np.inf), float), (dim,)).copy()
    upper = np.broadcast_to(np.asarray(model["input"].get("upper", np.inf), float), (dim,)).copy()
    layers, pending = [], None  # pending: an affine map not yet followed by a ReLU
    for layer in model["layers"]:
        kind = layer["kind"]
        if kind == "dense":
            w, b = np.asarray(layer["weights"], float), np.asarray(layer["bias"], float)
        elif kind == "normalize":
            std, mean = np.asarray(layer["std"], float), np.asarray(layer["mean"], float)
            w, b = np.diag(1.0 / std), -mean / std
        elif kind == "relu":
            layers.append(pending)
            pending = None
            continue
        else:
            raise ValueError(f"{path}: layer kind {kind} not supported here")
        pending = (w, b) if pending is None else (w @ pending[0], w @ pending[1] + b)
    layers.append(pending)
    if len(layers[-1][1]) < 2:
        raise ValueError(f"{path}: the references expect at least two logits")
    return layers, lower, upper, model


def load_data(path, model):
    """Features (n, dim) in the model's input order and integer labels (n,)."""
    with open(path) as f:
        rows = list(csv.reader(f))
    header, rows = rows[0], rows[1:]
    names = model["input"].get("names")
    label_at = header.index("label")
    if names:
        order = [header.index(n) for n in names]
    else:
        order = [i for i in range(len(header)) if i != label_at]
    classes = model.get("classes") or []
    x = np.array([[float(r[i]) for i in order] for r in rows])
    y = np.array([classes.index(r[label_at]) if r[label_at] in classes else int(r[label_at]) for r in rows])
    return x, y


def forward(layers, x):
    """Logits for rows x (n, dim): ReLU between the dense layers."""
    h = x
    for k, (w, b) in enumerate(layers):
        h = h @ w.T + b
        if k < len(layers) - 1:
            h = np.maximum(h, 0.0)
    return h
