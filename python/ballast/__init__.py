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

import os
from typing import Any, Mapping, Union

import numpy as np

from . import _native
from ._arrays import _class_list, _features, _labels
from ._model import Model
from ._native import FileError, InputError
from ._report import Report, RetrainResult

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
