"""``ballast.Model``: a classifier ballast accepted, loaded, converted or built from layout text."""

from __future__ import annotations

import os
from typing import Any, Sequence, Union

import numpy as np

from . import _native
from ._native import InputError

PathLike = Union[str, "os.PathLike[str]"]
from ._arrays import _features

__all__ = ["Model"]


class Model:
    """A classifier ballast accepted: the ``ballast.model/1`` layout (dense, ReLU, normalize,
    convolution, pooling, batch norm layers), checked as the command line checks a model file."""

    __slots__ = ("_native",)

    def __init__(self, native: "_native.Model"):
        self._native = native

    @classmethod
    def load(cls, path: PathLike, *, allow_large: bool = False) -> "Model":
        """Reads a model file: the JSON layout, or ONNX when the name ends in ``.onnx``."""
        return cls(_native.Model.load(os.fspath(path), allow_large))

    @classmethod
    def from_json(cls, text: str) -> "Model":
        """Parses a model from JSON text in the ``ballast.model/1`` layout."""
        return cls(_native.Model.from_json(text))

    @classmethod
    def from_sklearn(cls, estimator: Any, *, name: str | None = None, feature_names: Sequence[str] | None = None,
                     input_range: Any = None) -> "Model":
        """Converts a fitted ``MLPClassifier`` (ReLU), ``LogisticRegression``, or a ``Pipeline`` of a
        ``StandardScaler``/``MinMaxScaler`` and one of those. The scaler becomes a ``normalize`` layer.
        Class names are ``str(c)`` of ``estimator.classes_``; ``predict`` returns indices into them.
        Feature names (which tolerance and requirement files refer to): ``feature_names``, else the
        estimator's ``feature_names_in_`` (fitted on a DataFrame), else ``x0``, ``x1``, …"""
        from ._sklearn import layout_from_sklearn

        model = cls.from_json(layout_from_sklearn(estimator, name, feature_names))
        if input_range is not None:
            model.input_range = input_range
        return model

    @classmethod
    def from_torch(cls, module: Any, input_shape: Sequence[int], *, name: str | None = None,
                   feature_names: Sequence[str] | None = None, input_range: Any = None) -> "Model":
        """Converts a ``torch.nn.Sequential`` of ``Linear``, ``ReLU``, ``Flatten`` (first), ``Identity``
        and ``Dropout`` layers, reading the weights directly; ``input_shape`` is one sample's shape."""
        from ._torch import layout_from_torch

        model = cls.from_json(layout_from_torch(module, input_shape, name, feature_names))
        if input_range is not None:
            model.input_range = input_range
        return model

    def save(self, path: PathLike) -> None:
        """Writes the model in the JSON layout (atomically)."""
        self._native.save(os.fspath(path))

    def to_json(self) -> str:
        """The model in the JSON layout."""
        return self._native.to_json()

    def predict(self, X: Any) -> np.ndarray:
        """The predicted class index of every row of ``X`` (the largest logit; with one output, class 1
        iff the logit is > 0)."""
        return self._native.predict(_features(X, model=self))

    def logits(self, X: Any) -> np.ndarray:
        """The output of the network for every row of ``X`` (samples × outputs)."""
        return self._native.logits(_features(X, model=self))

    @property
    def input_range(self) -> tuple[np.ndarray, np.ndarray]:
        """(lower, upper), one value per feature (±inf where unbounded). Perturbed inputs are always
        clipped to it. Set it with a pair: numbers (the same for every feature) or per-feature arrays;
        ``None`` for no bound on that side."""
        lower, upper = self._native.input_range
        return np.array(lower), np.array(upper)

    @input_range.setter
    def input_range(self, value: Any) -> None:
        try:
            lower, upper = value
        except (TypeError, ValueError):
            raise InputError("input_range: expected a pair (lower, upper)") from None
        dim = self.input_dim

        def side(v: Any, infinite: float, which: str) -> list[float]:
            if v is None:
                return [infinite] * dim
            a = np.asarray(v, dtype=np.float64)
            if a.ndim == 0:
                return [float(a)] * dim
            if a.ndim != 1:
                raise InputError(f"input_range: {which} has shape {a.shape}, expected a number or {dim} values")
            return [float(x) for x in a]

        self._native = self._native.with_input_range(
            side(lower, -np.inf, "lower"), side(upper, np.inf, "upper")
        )

    @property
    def input_dim(self) -> int:
        """Number of input features."""
        return self._native.input_dim

    @property
    def classes(self) -> list[str]:
        """Class names (the indices as text when the model names none)."""
        return self._native.classes

    @property
    def feature_names(self) -> list[str]:
        """Feature names (``x0``, ``x1``, … when the model names none)."""
        return self._native.feature_names

    @property
    def name(self) -> str | None:
        """The model's name, if any."""
        return self._native.name

    @property
    def parameter_count(self) -> int:
        """Weights and biases in all dense and convolution layers."""
        return self._native.parameter_count

    @property
    def path(self) -> str | None:
        """The file the model was read from (None when built in memory or changed since)."""
        p = self._native.path
        return None if p is None else os.fspath(p)

    def __repr__(self) -> str:
        return (f"Model(name={self.name!r}, inputs={self.input_dim}, classes={len(self.classes)}, "
                f"parameters={self.parameter_count})")
