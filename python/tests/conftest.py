"""Shared fixtures: the repository root, the command-line binary, and small fitted scikit-learn models.

scikit-learn is the outside reference for the converters (its ``predict``, ``predict_proba`` and
``decision_function``); the command line (``target/release/ballast``) is the reference for the Python
entry points, which must give the same per-sample results and the same error messages.
"""

from __future__ import annotations

import os
import pathlib

import numpy as np
import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]


@pytest.fixture(scope="session")
def ballast_bin() -> pathlib.Path:
    """The release binary (CI builds it before the Python tests; BALLAST_BIN overrides the path)."""
    path = pathlib.Path(os.environ.get("BALLAST_BIN", ROOT / "target" / "release" / "ballast"))
    if not path.is_file():
        pytest.fail(f"{path}: no ballast binary; run `cargo build --release` first (or set BALLAST_BIN)")
    return path


@pytest.fixture(scope="session")
def digits_mlp():
    """An MLPClassifier (32 ReLU units) behind a MinMaxScaler on the first 1000 digits (scikit-learn's
    copy of the UCI handwritten digits); pixel values lie in [0, 16]."""
    from sklearn.datasets import load_digits
    from sklearn.neural_network import MLPClassifier
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import MinMaxScaler

    X, y = load_digits(return_X_y=True)
    pipe = make_pipeline(
        MinMaxScaler(),
        MLPClassifier(hidden_layer_sizes=(32,), max_iter=400, random_state=0),
    )
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pipe.fit(X[:1000], y[:1000])
    return pipe, X.astype(np.float64), y
