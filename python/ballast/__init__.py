"""ballast for Python: certify small linear, ReLU and convolutional classifiers against a robustness
requirement, retrain them to it, and write the release sheet — on numpy arrays.

This is the ballast library itself (a compiled extension), not a wrapper around the command line: the
same checks, the same pipeline, the same report, the same one-line error messages (keyword names
where the command line names its flags). See docs/python.md.

Conventions: ``X`` is samples × features (float64, raw input units; a DataFrame's columns are
matched by name when the model names its inputs, as CSV columns are); ``y`` holds class indices
(integers) or class names (strings matching ``model.classes``). Sample indices in results are row
numbers of ``X``.

Errors: :class:`InputError` (a ``ValueError``) for bad input or settings, :class:`FileError` (an
``OSError``) when a file cannot be read or written. Ctrl-C stops a long run and raises
``KeyboardInterrupt``; nothing is returned or written half-way.
"""

from __future__ import annotations

import json
import os
from typing import Any, Iterable, Mapping, Sequence, Union

import numpy as np

from . import _native
from ._native import FileError, InputError

__all__ = [
    "Model",
    "Report",
    "RetrainResult",
    "InputError",
    "FileError",
    "certify",
    "attack",
    "retrain",
    "__version__",
]

__version__: str = _native.__version__

PathLike = Union[str, "os.PathLike[str]"]


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


class Report:
    """The ``ballast.report/1`` report of a certify run, with per-sample results as numpy arrays."""

    __slots__ = ("_native", "_summary")

    def __init__(self, native: "_native.Report"):
        self._native = native
        self._summary = json.loads(native.summary_json())

    @classmethod
    def load(cls, path: PathLike) -> "Report":
        """Reads a saved report."""
        return cls(_native.Report.load(os.fspath(path)))

    # Summary figures.
    @property
    def summary(self) -> dict:
        """The report's summary (the ``summary`` object of the JSON report)."""
        return dict(self._summary)

    @property
    def samples(self) -> int:
        """Number of samples."""
        return self._summary["samples"]

    @property
    def clean_accuracy(self) -> float:
        """Fraction classified correctly without perturbation."""
        return self._summary["clean_accuracy"]

    @property
    def certified_accuracy(self) -> float:
        """certified / samples: a lower bound on robust accuracy."""
        return self._summary["certified_accuracy"]

    @property
    def empirical_robust_accuracy(self) -> float:
        """1 − (misclassified + counterexample) / samples: an upper bound on robust accuracy."""
        return self._summary["empirical_robust_accuracy"]

    @property
    def certified_lower_bound(self) -> float | None:
        """The one-sided Clopper–Pearson lower bound (with a confidence level), else None."""
        return self._summary.get("certified_lower_bound")

    @property
    def certified(self) -> int:
        """Number of certified samples."""
        return self._summary["certified"]

    @property
    def counterexample_count(self) -> int:
        """Number of samples with a validated counterexample."""
        return self._summary["counterexample"]

    @property
    def misclassified(self) -> int:
        """Number of samples wrong without perturbation."""
        return self._summary["misclassified"]

    @property
    def unresolved(self) -> int:
        """Number of samples neither certified nor refuted."""
        return self._summary["unresolved"]

    @property
    def verdict(self) -> str:
        """``pass``, ``fail``, ``undecided``, or ``none`` (no floor given)."""
        return self._native.verdict

    @property
    def exit_code(self) -> int:
        """The command line's exit code for the verdict: 0 met (or no floor), 1 not met, 3 undecided."""
        return self._native.exit_code

    @property
    def complete(self) -> bool:
        """False when the run stopped before every sample was decided."""
        return self._native.complete

    # Per-sample arrays.
    @property
    def status(self) -> np.ndarray:
        """Per sample: ``certified``, ``counterexample``, ``misclassified`` or ``unresolved``."""
        return np.array(self._native.status, dtype=object)

    @property
    def stage(self) -> np.ndarray:
        """Per sample: the stage that decided it (clean, attack, interval, linear, optimised_linear,
        lp, search)."""
        return np.array(self._native.stage, dtype=object)

    @property
    def margin_lower(self) -> np.ndarray:
        """Per sample: a sound lower bound on the margin (NaN where none was computed)."""
        return self._native.margin_lower

    @property
    def radius(self) -> np.ndarray:
        """Per sample: the certified radius (NaN unless ``certify(..., radius=True)``)."""
        return self._native.radius

    @property
    def index(self) -> np.ndarray:
        """Per sample: its row in ``X``."""
        return self._native.index_label_predicted[0]

    @property
    def label(self) -> np.ndarray:
        """Per sample: its class index."""
        return self._native.index_label_predicted[1]

    @property
    def predicted(self) -> np.ndarray:
        """Per sample: the predicted class index without perturbation."""
        return self._native.index_label_predicted[2]

    @property
    def counterexamples(self) -> np.ndarray:
        """The validated counterexamples (n × features), in the order of ``counterexample_indices``."""
        return self._native.counterexample_arrays()[2]

    @property
    def counterexample_indices(self) -> np.ndarray:
        """The rows of ``X`` the counterexamples belong to."""
        return self._native.counterexample_arrays()[0]

    @property
    def counterexample_classes(self) -> np.ndarray:
        """The class each counterexample is moved into."""
        return self._native.counterexample_arrays()[1]

    def to_json(self, path: PathLike) -> None:
        """Writes the report and, when there are counterexamples, ``NAME.counterexamples.csv`` beside
        it, as ``ballast certify --report`` does."""
        self._native.to_json(os.fspath(path))

    def to_json_string(self) -> str:
        """The report as JSON text."""
        return self._native.to_json_string()

    def sheet(self, folder: PathLike) -> tuple[str, str]:
        """Writes the sheet (``sheet.md`` and a self-contained ``sheet.html``) into ``folder``."""
        md, html = self._native.sheet(os.fspath(folder))
        return os.fspath(md), os.fspath(html)

    def to_pandas(self) -> Any:
        """The per-sample results as a ``pandas.DataFrame`` (needs pandas)."""
        try:
            import pandas as pd
        except ImportError:
            raise ImportError("Report.to_pandas needs pandas: pip install pandas") from None
        return pd.DataFrame({
            "index": self.index,
            "label": self.label,
            "predicted": self.predicted,
            "status": self.status,
            "stage": self.stage,
            "margin_lower": self.margin_lower,
            "seconds": self._native.seconds,
        })

    def __repr__(self) -> str:
        return (f"Report(samples={self.samples}, certified_accuracy={self.certified_accuracy:.4f}, "
                f"empirical_robust_accuracy={self.empirical_robust_accuracy:.4f}, verdict={self.verdict!r})")


class RetrainResult:
    """What :func:`retrain` measured: the verdict, the rounds, the multiplier history and the certify
    report of the returned model on the acceptance data."""

    __slots__ = ("_native", "_epochs", "_rounds")

    def __init__(self, native: "_native.RetrainResult"):
        self._native = native
        self._epochs = json.loads(native.epochs_json())
        self._rounds = json.loads(native.rounds_json())

    @property
    def verdict(self) -> str:
        """``met`` (the floor was proven on the acceptance data) or ``not_met``."""
        return self._native.verdict

    @property
    def exit_code(self) -> int:
        """The command line's exit code: 0 met, 1 not met."""
        return self._native.exit_code

    @property
    def rounds(self) -> list[dict]:
        """One record per train-then-certify round."""
        return [dict(r) for r in self._rounds]

    @property
    def report(self) -> Report:
        """The certify report of the returned model on the acceptance data."""
        return Report(self._native.report)

    def _column(self, key: str) -> np.ndarray:
        return np.array([np.nan if e.get(key) is None else e[key] for e in self._epochs], dtype=np.float64)

    @property
    def epochs(self) -> np.ndarray:
        """The epoch numbers (1-based, counted across rounds)."""
        return np.array([e["epoch"] for e in self._epochs], dtype=np.int64)

    @property
    def multipliers(self) -> np.ndarray:
        """The multipliers at the end of every epoch (epochs × constraints: one, or one per class)."""
        rows = [e["multipliers"] for e in self._epochs]
        width = max((len(r) for r in rows), default=0)
        out = np.full((len(rows), width), np.nan)
        for i, r in enumerate(rows):
            out[i, : len(r)] = [np.nan if v is None else v for v in r]
        return out

    @property
    def clean_loss(self) -> np.ndarray:
        """Mean clean cross-entropy per epoch."""
        return self._column("clean_loss")

    @property
    def robust_loss(self) -> np.ndarray:
        """Mean robust loss per epoch."""
        return self._column("robust_loss")

    @property
    def robust_error(self) -> np.ndarray:
        """Robust error rate on the training batches per epoch (the constraint's measure)."""
        return self._column("robust_error")

    @property
    def epsilon_scale(self) -> np.ndarray:
        """Fraction of the budget in use at the end of every epoch (the ramp)."""
        return self._column("epsilon_scale")

    @property
    def validation_certified_accuracy(self) -> np.ndarray:
        """Certified accuracy on the validation data per epoch (sound linear bounds)."""
        return self._column("validation_certified_accuracy")

    @property
    def validation_clean_accuracy(self) -> np.ndarray:
        """Clean accuracy on the validation data per epoch."""
        return self._column("validation_clean_accuracy")

    def __repr__(self) -> str:
        r = self.report
        return (f"RetrainResult(verdict={self.verdict!r}, rounds={len(self._rounds)}, "
                f"epochs={len(self._epochs)}, certified_accuracy={r.certified_accuracy:.4f})")


def _requirement(model: Model, *, eps: Any, norm: str | None, tolerances: Any, floor: float | None,
                 forbid_into: Any, forbid_from: Any, confidence: float | None,
                 min_clean_accuracy: float | None, requirement: PathLike | None,
                 one_epsilon: bool) -> "_native.Requirement":
    epsilons = None
    if eps is not None:
        values = np.atleast_1d(np.asarray(eps, dtype=np.float64))
        if values.ndim != 1:
            raise InputError(f"eps: shape {values.shape}, expected a number or a list of numbers")
        epsilons = [float(v) for v in values]
    tolerance_file = None
    tolerance_values = None
    if tolerances is not None:
        if isinstance(tolerances, (str, os.PathLike)):
            tolerance_file = os.fspath(tolerances)
        elif isinstance(tolerances, Mapping):
            tolerance_values = [(str(k), float(v)) for k, v in tolerances.items()]
        else:
            values = np.asarray(tolerances, dtype=np.float64)
            if values.ndim != 1 or len(values) != model.input_dim:
                raise InputError(
                    f"tolerances: shape {values.shape}, expected {model.input_dim} values (one per feature), "
                    "a mapping of feature names to values, or a tolerance file"
                )
            tolerance_values = list(zip(model.feature_names, (float(v) for v in values)))
    return _native.Requirement(
        model._native, eps=epsilons, tolerances_file=tolerance_file, tolerances=tolerance_values,
        norm=norm, floor=floor, confidence=confidence, min_clean_accuracy=min_clean_accuracy,
        forbid_into=_class_list(forbid_into), forbid_from=_class_list(forbid_from),
        requirement=None if requirement is None else os.fspath(requirement), one_epsilon=one_epsilon,
    )


def _model(model: Any) -> Model:
    if not isinstance(model, Model):
        raise InputError(f"model: a {type(model).__name__}, expected ballast.Model (see Model.load, Model.from_sklearn)")
    return model


def certify(model: Model, X: Any, y: Any, *, eps: Any = None, norm: str | None = None,
            tolerances: Any = None, floor: float | None = None, budget: float = 0.0,
            forbid_into: Any = None, forbid_from: Any = None, confidence: float | None = None,
            min_clean_accuracy: float | None = None, requirement: PathLike | None = None,
            seed: int = 0, radius: bool = False, attack: bool = True,
            out_of_range: str = "error") -> Report:
    """Decides every sample — certified, counterexample, misclassified or unresolved — and the
    requirement's verdict, as ``ballast certify`` does.

    ``eps``: the budget in raw input units (a number; a list is a sweep), or the scale of
    ``tolerances`` (per-feature radii: an array, a mapping feature → radius, or a tolerance file).
    ``norm``: ``linf`` (the default) or ``l2``. ``floor``: required robust fraction. ``budget``: seconds of branch and
    bound per sample (0 = bounds only). ``forbid_into``/``forbid_from``: only changes into (from) these
    classes count. ``confidence``: judge the floor by the Clopper–Pearson lower bound at this level.
    ``requirement``: a requirement file whose values the keywords override. ``out_of_range``:
    ``error``, ``clip`` or ``skip`` for rows outside the model's input range.
    """
    model = _model(model)
    req = _requirement(model, eps=eps, norm=norm, tolerances=tolerances, floor=floor,
                       forbid_into=forbid_into, forbid_from=forbid_from, confidence=confidence,
                       min_clean_accuracy=min_clean_accuracy, requirement=requirement, one_epsilon=False)
    X = _features(X, model=model)
    y = _labels(model, y)
    return Report(_native.certify(model._native, X, y, req, budget=float(budget), seed=int(seed),
                                  radius=bool(radius), attack=bool(attack), out_of_range=out_of_range))


def attack(model: Model, X: Any, y: Any, *, eps: Any = None, norm: str | None = None, tolerances: Any = None,
           forbid_into: Any = None, forbid_from: Any = None, steps: int = 100, restarts: int = 5,
           seed: int = 0, precision: str = "single", out_of_range: str = "error",
           requirement: PathLike | None = None) -> tuple[np.ndarray, np.ndarray]:
    """PGD (FGSM first) on every correctly classified row, as ``ballast attack`` does. Returns
    ``(indices, points)``: the rows of ``X`` where a counterexample was found and the counterexamples
    (n × features), each confirmed by a forward pass and inside ball ∩ input range. Finding none proves
    nothing; use :func:`certify` for proofs."""
    model = _model(model)
    req = _requirement(model, eps=eps, norm=norm, tolerances=tolerances, floor=None,
                       forbid_into=forbid_into, forbid_from=forbid_from, confidence=None,
                       min_clean_accuracy=None, requirement=requirement, one_epsilon=True)
    X = _features(X, model=model)
    y = _labels(model, y)
    if steps < 1:
        raise InputError(f"steps: {steps} is not allowed, expected at least 1 step")
    if restarts < 0:
        raise InputError(f"restarts: {restarts} is not allowed, expected a whole number ≥ 0")
    indices, _, points = _native.attack(model._native, X, y, req, steps=int(steps), restarts=int(restarts),
                                        seed=int(seed), precision=precision, out_of_range=out_of_range)
    return indices, points


_RETRAIN_DEFAULTS: dict = {
    "epochs": 30, "round_epochs": None, "max_rounds": 3, "ramp_epochs": None, "learning_rate": 0.002,
    "final_rate": 1.0, "batch_size": 64, "seed": 0, "loss": "certified", "constraint": "error",
    "level": None, "slack": 0.02, "slack_step": 0.03, "penalty": None, "per_class": False,
    "dual_step": 0.05, "keep": "best-feasible", "checks_per_epoch": 4, "near_miss": 0.0,
    "near_miss_tries": 3, "average_tail": 0.0, "hidden": None, "acceptance_size": None,
    "pass_probability": None,
}


def retrain(model: Model, X: Any, y: Any, *, eps: Any = None, floor: float | None = None,
            X_val: Any = None, y_val: Any = None, X_acceptance: Any = None, y_acceptance: Any = None,
            norm: str | None = None, tolerances: Any = None, forbid_into: Any = None, forbid_from: Any = None,
            confidence: float | None = None, requirement: PathLike | None = None,
            out_of_range: str = "error", **settings: Any) -> tuple[Model, RetrainResult]:
    """Constrained (primal-dual) retraining toward the certified floor, as ``ballast retrain`` does;
    returns the retrained model (its provenance holds the retraining record) and the result.

    Without ``X_val``/``y_val``, 20 % of the training rows are held out for validation; without
    ``X_acceptance``/``y_acceptance`` the validation data is the acceptance data of the certify check
    after each round. ``settings`` are the command line's training flags with ``_`` for ``-`` and the
    same defaults: epochs=30, round_epochs, max_rounds=3, ramp_epochs, learning_rate=0.002,
    final_rate=1.0, batch_size=64, seed=0, loss="certified" ("interval", "adversarial"),
    constraint="error" ("loss" with level), slack=0.02, slack_step=0.03, penalty, per_class=False,
    dual_step=0.05, keep="best-feasible" ("earliest-feasible", "last"), checks_per_epoch=4,
    near_miss=0.0, near_miss_tries=3, average_tail=0.0, hidden (layer sizes: train from scratch),
    acceptance_size, pass_probability (with confidence).
    """
    model = _model(model)
    unknown = sorted(set(settings) - set(_RETRAIN_DEFAULTS))
    if unknown:
        raise InputError(f"{unknown[0]}: not a retrain setting (settings: {', '.join(_RETRAIN_DEFAULTS)})")
    merged = dict(_RETRAIN_DEFAULTS)
    merged.update(settings)
    if merged["hidden"] is not None:
        merged["hidden"] = [int(h) for h in merged["hidden"]]
    req = _requirement(model, eps=eps, norm=norm, tolerances=tolerances, floor=floor,
                       forbid_into=forbid_into, forbid_from=forbid_from, confidence=confidence,
                       min_clean_accuracy=None, requirement=requirement, one_epsilon=True)

    def pair(Xp: Any, yp: Any, xname: str, yname: str) -> tuple | None:
        if Xp is None and yp is None:
            return None
        if Xp is None or yp is None:
            raise InputError(f"{xname} and {yname}: give both or neither")
        return _features(Xp, xname, model), _labels(model, yp, yname)

    validation = pair(X_val, y_val, "X_val", "y_val")
    acceptance = pair(X_acceptance, y_acceptance, "X_acceptance", "y_acceptance")
    native_model, native_result = _native.retrain(
        model._native, _features(X, model=model), _labels(model, y), req, merged,
        validation=validation, acceptance=acceptance, out_of_range=out_of_range)
    return Model(native_model), RetrainResult(native_result)
