"""Model.from_sklearn against scikit-learn itself (the outside reference): the converted model must
predict exactly what the fitted estimator predicts, and its logits must reproduce scikit-learn's
``decision_function`` / ``predict_proba``, on three open datasets shipped with scikit-learn (digits,
wine, breast cancer; iris for the quick checks), with StandardScaler and MinMaxScaler pipelines."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_digits, load_iris, load_wine
from sklearn.linear_model import LogisticRegression
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MinMaxScaler, StandardScaler

import ballast

DATASETS = {"digits": load_digits, "wine": load_wine, "breast_cancer": load_breast_cancer}
SCALERS = {"standard": StandardScaler, "minmax": MinMaxScaler}


def fitted(estimator, X, y):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence warnings of short fits
        return estimator.fit(X, y)


def softmax(z):
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)


def probabilities(model, X):
    """Class probabilities from the converted model's logits (one logit: the logistic function)."""
    z = model.logits(X)
    if z.shape[1] == 1:
        p = 1.0 / (1.0 + np.exp(-z[:, 0]))
        return np.column_stack([1.0 - p, p])
    return softmax(z)


@pytest.mark.parametrize("dataset", sorted(DATASETS))
@pytest.mark.parametrize("scaler", sorted(SCALERS))
@pytest.mark.parametrize("kind", ["mlp", "logistic"])
def test_predictions_equal_scikit_learn(dataset, scaler, kind):
    X, y = DATASETS[dataset](return_X_y=True)
    X_train, X_test, y_train = X[::2], X[1::2], y[::2]
    classifier = (
        MLPClassifier(hidden_layer_sizes=(24, 12), max_iter=300, random_state=1)
        if kind == "mlp"
        else LogisticRegression(max_iter=2000)
    )
    pipe = fitted(make_pipeline(SCALERS[scaler](), classifier), X_train, y_train)
    model = ballast.Model.from_sklearn(pipe)
    # Reference: scikit-learn's own predict on held-out rows; every prediction must agree.
    predicted = pipe.classes_[model.predict(X_test)]
    assert np.array_equal(predicted, pipe.predict(X_test))
    # Reference: scikit-learn's predict_proba (softmax / logistic of the same logits), to rounding.
    np.testing.assert_allclose(probabilities(model, X_test), pipe.predict_proba(X_test), rtol=1e-9, atol=1e-12)


def test_logistic_regression_alone_matches_decision_function():
    X, y = load_iris(return_X_y=True)
    clf = fitted(LogisticRegression(max_iter=1000), X, y)
    model = ballast.Model.from_sklearn(clf)
    # Reference: scikit-learn's decision_function is X @ coef_.T + intercept_, the logits.
    np.testing.assert_allclose(model.logits(X), clf.decision_function(X), rtol=1e-10, atol=1e-9)
    assert np.array_equal(model.predict(X), clf.predict(X))


def test_binary_models_have_one_logit_with_scikit_learns_sign_rule():
    X, y = load_breast_cancer(return_X_y=True)
    pipe = fitted(make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000)), X, y)
    model = ballast.Model.from_sklearn(pipe)
    z = model.logits(X)
    assert z.shape == (len(X), 1)
    # Reference: scikit-learn's binary decision_function (class 1 iff > 0).
    np.testing.assert_allclose(z[:, 0], pipe.decision_function(X), rtol=1e-10, atol=1e-9)
    assert np.array_equal(model.predict(X), pipe.predict(X))


@pytest.mark.parametrize("scaler", [StandardScaler(), StandardScaler(with_mean=False), StandardScaler(with_std=False),
                                    MinMaxScaler(), MinMaxScaler(feature_range=(-1, 3))])
def test_scaler_becomes_the_normalize_layer_scikit_learn_applies(scaler):
    """The normalize layer's (x − mean) / std must equal the scaler's transform: checked through a
    LogisticRegression whose weights are the identity map, so the logits are the scaled features."""
    X, y = load_wine(return_X_y=True)
    X = X[:, :3]
    fitted(scaler, X, y)
    identity = LogisticRegression()
    identity.classes_ = np.array([0, 1, 2])
    identity.coef_ = np.eye(3)
    identity.intercept_ = np.zeros(3)
    identity.n_features_in_ = 3
    from sklearn.pipeline import Pipeline

    pipe = Pipeline([("scale", scaler), ("identity", identity)])
    model = ballast.Model.from_sklearn(pipe)
    # Reference: scikit-learn's transform.
    np.testing.assert_allclose(model.logits(X), scaler.transform(X), rtol=1e-12, atol=1e-12)


def test_constant_feature_under_minmax_scaler():
    """A feature constant in the training data has scale_ = 1 in scikit-learn, so std = 1 > 0 and the
    model still loads; predictions still match."""
    X, y = load_breast_cancer(return_X_y=True)
    X = X.copy()
    X[:, 0] = 5.0
    pipe = fitted(make_pipeline(MinMaxScaler(), LogisticRegression(max_iter=2000)), X, y)
    model = ballast.Model.from_sklearn(pipe)
    assert np.array_equal(model.predict(X), pipe.predict(X))


def test_converted_model_round_trips_through_a_file(tmp_path, digits_mlp):
    pipe, X, _ = digits_mlp
    model = ballast.Model.from_sklearn(pipe, name="digits-mlp")
    model.input_range = (0.0, 16.0)
    path = tmp_path / "m.json"
    model.save(path)
    loaded = ballast.Model.load(path)
    assert loaded.name == "digits-mlp"
    assert loaded.path == str(path)
    assert np.array_equal(loaded.predict(X), model.predict(X))
    lower, upper = loaded.input_range
    assert np.all(lower == 0.0) and np.all(upper == 16.0)


def test_class_names_come_from_classes_():
    X, y = load_iris(return_X_y=True)
    names = np.array(["setosa", "versicolor", "virginica"])[y]
    clf = fitted(LogisticRegression(max_iter=1000), X, names)
    model = ballast.Model.from_sklearn(clf)
    assert model.classes == list(clf.classes_)
    # Labels given by name are mapped to indices (certify accepts names as the CSV reader does).
    report = ballast.certify(model, X[:10], names[:10], eps=0.0)
    assert np.array_equal(report.label, [list(clf.classes_).index(n) for n in names[:10]])


def test_feature_names_from_a_dataframe_or_given():
    pd = pytest.importorskip("pandas")
    X, y = load_iris(return_X_y=True, as_frame=False)
    names = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
    clf = fitted(LogisticRegression(max_iter=1000), pd.DataFrame(X, columns=names), y)
    assert ballast.Model.from_sklearn(clf).feature_names == names
    plain = fitted(LogisticRegression(max_iter=1000), X, y)
    assert ballast.Model.from_sklearn(plain).feature_names == ["x0", "x1", "x2", "x3"]
    named = ballast.Model.from_sklearn(plain, feature_names=names)
    # Tolerances keyed by name reach the right features: a zero budget on all but the last.
    by_name = ballast.certify(named, X, y, eps=0.3, tolerances={"sepal_length": 0, "sepal_width": 0,
                                                                "petal_length": 0, "petal_width": 1})
    by_order = ballast.certify(named, X, y, eps=0.3, tolerances=[0, 0, 0, 1])
    assert list(by_name.status) == list(by_order.status)
    with pytest.raises(ballast.InputError, match="^feature_names: 3 names, expected 4"):
        ballast.Model.from_sklearn(plain, feature_names=names[:3])


def test_dataframe_columns_are_matched_by_name():
    pd = pytest.importorskip("pandas")
    X, y = load_iris(return_X_y=True)
    names = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
    frame = pd.DataFrame(X, columns=names)
    clf = fitted(LogisticRegression(max_iter=1000), frame, y)
    model = ballast.Model.from_sklearn(clf)
    shuffled = frame[names[::-1]]
    # Reference: scikit-learn's predict on the DataFrame in its fitted column order.
    assert np.array_equal(model.predict(shuffled), clf.predict(frame))
    with pytest.raises(ballast.InputError, match='^X: missing feature column "petal_width"$'):
        model.predict(frame[names[:3]])
    with pytest.raises(ballast.InputError, match='^X: column "colour" is not an input of the model$'):
        model.predict(frame.assign(colour=1.0))
