"""Fitted scikit-learn estimators as ballast models (the ``ballast.model/1`` layout, built in memory).

Supported: ``MLPClassifier`` with ReLU (or identity) hidden activations, ``LogisticRegression``, and a
``Pipeline`` of one ``StandardScaler`` or ``MinMaxScaler`` followed by one of those. The weights are read
from the fitted attributes (``coefs_``/``intercepts_``, ``coef_``/``intercept_``; scikit-learn stores them
input × output, the layout wants one row per output unit, so they are transposed).

The scaler becomes a ``normalize`` layer, which computes (x − mean) / std:

* ``StandardScaler``: mean = ``mean_`` (0 when ``with_mean=False``, although scikit-learn still
  computes ``mean_`` then), std = ``scale_`` (1 when ``with_std=False``). scikit-learn computes (x − mean_) / scale_, the same map.
* ``MinMaxScaler``: scikit-learn computes x · ``scale_`` + ``min_``. Written as (x − mean) / std this is
  std = 1 / ``scale_`` and mean = −``min_`` / ``scale_``, because (x − (−min_/scale_)) · scale_ =
  x · scale_ + min_. A feature that was constant in the training data has ``scale_`` = 1 (scikit-learn's
  rule), so std = 1 is always > 0. ``clip=True`` is refused: clipping is not a normalize layer.

Binary ``LogisticRegression`` and binary ``MLPClassifier`` have one output: class 1 iff the logit is
> 0, which is the layout's rule for one output. Multi-class ``LogisticRegression`` must be multinomial
(softmax): a one-vs-rest model predicts by the largest of its logits too, so it is accepted as well.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from . import _native

__all__ = ["layout_from_sklearn"]


def _unsupported(message: str) -> _native.InputError:
    return _native.InputError(message)


def _kind(estimator: Any) -> str:
    return type(estimator).__name__


def _check_fitted(estimator: Any, attribute: str) -> None:
    if not hasattr(estimator, attribute):
        raise _unsupported(
            f"{_kind(estimator)}: not fitted (no {attribute}); call fit() before converting"
        )


def _dense(weights: np.ndarray, bias: np.ndarray) -> dict:
    w = np.asarray(weights, dtype=np.float64)
    b = np.asarray(bias, dtype=np.float64).reshape(-1)
    # scikit-learn: input × output; layout: one row per output unit.
    return {"kind": "dense", "weights": w.T.tolist(), "bias": b.tolist()}


def _scaler_layer(scaler: Any, dim: int) -> dict:
    kind = _kind(scaler)
    if kind == "StandardScaler":
        _check_fitted(scaler, "n_features_in_")
        # mean_ is computed even with with_mean=False; only the flags say what transform applies.
        mean = scaler.mean_ if scaler.with_mean else np.zeros(dim)
        std = scaler.scale_ if scaler.with_std else np.ones(dim)
        return {
            "kind": "normalize",
            "mean": np.asarray(mean, dtype=np.float64).tolist(),
            "std": np.asarray(std, dtype=np.float64).tolist(),
        }
    if kind == "MinMaxScaler":
        _check_fitted(scaler, "scale_")
        if getattr(scaler, "clip", False):
            raise _unsupported(
                "MinMaxScaler(clip=True): clipping is not a normalize layer; fit it with clip=False"
            )
        scale = np.asarray(scaler.scale_, dtype=np.float64)
        minimum = np.asarray(scaler.min_, dtype=np.float64)
        return {"kind": "normalize", "mean": (-minimum / scale).tolist(), "std": (1.0 / scale).tolist()}
    raise _unsupported(
        f"{kind}: not a supported scaler, expected StandardScaler or MinMaxScaler before the classifier"
    )


def _classifier_layers(estimator: Any) -> tuple[list[dict], int, list]:
    kind = _kind(estimator)
    if kind == "MLPClassifier":
        _check_fitted(estimator, "coefs_")
        activation = estimator.activation
        if activation not in ("relu", "identity"):
            raise _unsupported(
                f"MLPClassifier(activation={activation!r}): only 'relu' or 'identity' hidden layers are supported"
            )
        layers: list[dict] = []
        last = len(estimator.coefs_) - 1
        for i, (w, b) in enumerate(zip(estimator.coefs_, estimator.intercepts_)):
            layers.append(_dense(w, b))
            if i < last and activation == "relu":
                layers.append({"kind": "relu"})
        return layers, int(estimator.coefs_[0].shape[0]), list(estimator.classes_)
    if kind == "LogisticRegression":
        _check_fitted(estimator, "coef_")
        coef = np.asarray(estimator.coef_, dtype=np.float64)
        return [_dense(coef.T, estimator.intercept_)], int(coef.shape[1]), list(estimator.classes_)
    raise _unsupported(
        f"{kind}: not a supported estimator, expected MLPClassifier, LogisticRegression, or a Pipeline "
        "of StandardScaler/MinMaxScaler and one of those"
    )


def layout_from_sklearn(estimator: Any, name: str | None = None, feature_names: Any = None) -> str:
    """The ``ballast.model/1`` JSON text of a fitted estimator or pipeline (see the module docstring).
    Feature names: ``feature_names``, else ``feature_names_in_`` (set when fitted on a DataFrame)."""
    steps = [estimator]
    if _kind(estimator) == "Pipeline":
        steps = [step for _, step in estimator.steps if step is not None and step != "passthrough"]
        if len(steps) not in (1, 2):
            raise _unsupported(
                f"Pipeline with {len(steps)} steps: expected a scaler (StandardScaler or MinMaxScaler) "
                "and a classifier, or a classifier alone"
            )
    classifier = steps[-1]
    layers, dim, classes = _classifier_layers(classifier)
    if len(steps) == 2:
        layers.insert(0, _scaler_layer(steps[0], dim))
    labels = [str(c) for c in classes]
    layout: dict = {"format": "ballast.model/1"}
    if name is not None:
        layout["name"] = name
    layout["input"] = {"dim": dim}
    names = feature_names if feature_names is not None else getattr(estimator, "feature_names_in_", None)
    if names is not None:
        if len(names) != dim:
            raise _unsupported(f"feature_names: {len(names)} names, expected {dim} (one per input)")
        layout["input"]["names"] = [str(n) for n in names]
    layout["classes"] = labels
    layout["layers"] = layers
    layout["provenance"] = {
        "converted_from": f"scikit-learn {type(estimator).__module__}.{_kind(estimator)}",
        "class_labels": [c.item() if hasattr(c, "item") else c for c in classes],
    }
    return json.dumps(layout)
