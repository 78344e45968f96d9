"""Arrays and labels from the caller's values: float64 samples × features (a DataFrame's columns matched
by name when the model names its inputs), class indices from integers or class names."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from ._native import InputError

if TYPE_CHECKING:
    from ._model import Model


def _features(X: Any, name: str = "X", model: "Model | None" = None) -> np.ndarray:
    if model is not None and hasattr(X, "columns") and model._native.names_inputs:
        # A DataFrame for a model that names its inputs: columns matched by name, as the CSV reader does.
        columns = [str(c) for c in X.columns]
        names = model.feature_names
        for n in names:
            if n not in columns:
                raise InputError(f"{name}: missing feature column \"{n}\"")
        for c in columns:
            if c not in names:
                raise InputError(f"{name}: column \"{c}\" is not an input of the model")
        X = X[names]
    try:
        array = np.asarray(X, dtype=np.float64)
    except (TypeError, ValueError) as e:
        raise InputError(f"{name}: not an array of numbers ({e})") from None
    if array.ndim != 2:
        raise InputError(
            f"{name}: expected a 2-D array (samples × features), got shape {array.shape}"
        )
    return np.ascontiguousarray(array)


def _labels(model: "Model", y: Any, name: str = "y") -> np.ndarray:
    array = np.asarray(y)
    if array.ndim != 1:
        raise InputError(f"{name}: expected a 1-D array of labels, got shape {array.shape}")
    if array.dtype.kind in "iub":
        return array.astype(np.int64)
    if array.dtype.kind == "f":
        if not np.all(np.isfinite(array)):
            i = int(np.flatnonzero(~np.isfinite(array))[0])
            raise InputError(f"{name}[{i}]: {array[i]} is not a class index")
        if not np.all(array == np.round(array)):
            i = int(np.flatnonzero(array != np.round(array))[0])
            raise InputError(f"{name}[{i}]: {array[i]} is not a class index (a whole number)")
        return array.astype(np.int64)
    classes = model.classes
    index = {c: i for i, c in enumerate(classes)}
    out = np.empty(len(array), dtype=np.int64)
    for i, label in enumerate(array):
        text = str(label)
        if text not in index:
            raise InputError(
                f"{name}[{i}]: \"{text}\" is not one of the classes {', '.join(classes)}"
            )
        out[i] = index[text]
    return out


def _class_list(value: Any) -> list[str] | None:
    if value is None:
        return None
    if isinstance(value, (str, int, np.integer)):
        value = str(value).split(",")
    return [str(v).strip() for v in value if str(v).strip()]
