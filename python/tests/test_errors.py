"""Bad input raises the documented exception with a clear one-line message: InputError (a ValueError)
for bad arrays, labels, settings and models, FileError (an OSError) for files; where the command line
has the same check, the message is the command line's with the keyword in place of the flag."""

from __future__ import annotations

import subprocess

import numpy as np
import pytest

import ballast


@pytest.fixture()
def model(digits_mlp):
    m = ballast.Model.from_sklearn(digits_mlp[0])
    m.input_range = (0.0, 16.0)
    return m


@pytest.fixture()
def rows(digits_mlp):
    _, X, y = digits_mlp
    return X[1000:1020].copy(), y[1000:1020].copy()


def test_exception_types():
    assert issubclass(ballast.InputError, ValueError)
    assert issubclass(ballast.FileError, OSError)


def one_line(error):
    text = str(error.value)
    assert "\n" not in text
    return text


def test_wrong_shapes(model, rows):
    X, y = rows
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X[0], y[:1], eps=0.1)
    assert one_line(e) == "X: expected a 2-D array (samples × features), got shape (64,)"
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X[:, :10], y, eps=0.1)
    assert one_line(e) == "X: 10 features per sample (shape (20, 10)), the model expects 64"
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X, y[:5], eps=0.1)
    assert one_line(e) == "y: 5 labels, expected one per sample (20)"
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X, y.reshape(4, 5), eps=0.1)
    assert "y: expected a 1-D array of labels" in one_line(e)
    with pytest.raises(ballast.InputError) as e:
        model.predict(np.zeros((3, 7)))
    assert one_line(e) == "X: 7 features per sample (shape (3, 7)), the model expects 64"


def test_not_finite_values(model, rows):
    X, y = rows
    X[3, 5] = np.nan
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X, y, eps=0.1)
    assert one_line(e) == "X[3, 5]: NaN is not a finite number"
    X[3, 5] = np.inf
    with pytest.raises(ValueError, match=r"X\[3, 5\]: inf is not a finite number"):
        ballast.attack(model, X, y, eps=0.1)


def test_values_outside_the_input_range(model, rows):
    X, y = rows
    X[2, 7] = 17.0
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X, y, eps=0.1)
    assert one_line(e).startswith("X[2, 7] (feature \"x7\"): 17 lies outside the model's input range [0, 16]")
    # The command line's policies: clip to the end, or leave the row out.
    clipped = ballast.certify(model, X, y, eps=0.1, out_of_range="clip")
    assert clipped.samples == 20
    skipped = ballast.certify(model, X, y, eps=0.1, out_of_range="skip")
    assert skipped.samples == 19


def test_labels_out_of_range(model, rows):
    X, y = rows
    y[4] = 10
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X, y, eps=0.1)
    assert one_line(e) == "y[4]: class index 10 is out of range, expected 0..9"
    y[4] = -1
    with pytest.raises(ballast.InputError, match=r"y\[4\]: class index -1 is out of range"):
        ballast.retrain(model, X, y, eps=0.1, floor=0.5)
    with pytest.raises(ballast.InputError, match=r"y\[0\]: \"cat\" is not one of the classes 0, 1"):
        ballast.certify(model, X[:2], np.array(["cat", "1"]), eps=0.1)
    with pytest.raises(ballast.InputError, match=r"y\[1\]: 2.5 is not a class index"):
        ballast.certify(model, X[:2], np.array([1.0, 2.5]), eps=0.1)


def test_unsupported_estimators():
    from sklearn.datasets import load_wine
    from sklearn.ensemble import RandomForestClassifier
    from sklearn.neural_network import MLPClassifier
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import MinMaxScaler, RobustScaler

    X, y = load_wine(return_X_y=True)
    forest = RandomForestClassifier(n_estimators=3, random_state=0).fit(X, y)
    with pytest.raises(ballast.InputError) as e:
        ballast.Model.from_sklearn(forest)
    assert one_line(e).startswith("RandomForestClassifier: not a supported estimator, expected MLPClassifier")
    tanh = MLPClassifier(hidden_layer_sizes=(4,), activation="tanh", max_iter=5)
    with pytest.raises(ballast.InputError, match="MLPClassifier: not fitted"):
        ballast.Model.from_sklearn(tanh)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tanh.fit(X, y)
    with pytest.raises(ballast.InputError, match=r"activation='tanh'.*only 'relu' or 'identity'"):
        ballast.Model.from_sklearn(tanh)
    robust = make_pipeline(RobustScaler(), MLPClassifier(hidden_layer_sizes=(4,), max_iter=5))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        robust.fit(X, y)
    with pytest.raises(ballast.InputError, match="RobustScaler: not a supported scaler"):
        ballast.Model.from_sklearn(robust)
    clipping = make_pipeline(MinMaxScaler(clip=True), MLPClassifier(hidden_layer_sizes=(4,), max_iter=5))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        clipping.fit(X, y)
    with pytest.raises(ballast.InputError, match=r"MinMaxScaler\(clip=True\)"):
        ballast.Model.from_sklearn(clipping)


def cli_error(binary, args):
    done = subprocess.run([str(binary), *map(str, args)], capture_output=True, text=True, timeout=120)
    assert done.returncode == 2, done.stderr
    line = done.stderr.strip()
    assert line.startswith("error: ")
    return line[len("error: "):]


@pytest.mark.parametrize("python_kwargs, flags, flag, keyword", [
    (dict(eps=0.1, floor=1.5), ["--eps", "0.1", "--floor", "1.5"], "--floor", "floor"),
    (dict(eps=0.1, norm="l3"), ["--eps", "0.1", "--norm", "l3"], "--norm", "norm"),
    (dict(eps=-0.1), ["--eps=-0.1"], "--eps", "eps"),
    (dict(eps=0.1, forbid_into="cat"), ["--eps", "0.1", "--forbid-into", "cat"], "--forbid-into", "forbid_into"),
    (dict(eps=0.1, floor=0.5, confidence=1.0), ["--eps", "0.1", "--floor", "0.5", "--confidence", "1"],
     "--confidence", "confidence"),
])
def test_setting_messages_equal_the_command_line(tmp_path, ballast_bin, model, rows, python_kwargs, flags, flag,
                                                 keyword):
    X, y = rows
    path = tmp_path / "m.json"
    model.save(path)
    data = tmp_path / "d.csv"
    np.savetxt(data, np.column_stack([X, y]), delimiter=",", comments="", fmt="%.17g",
               header=",".join([f"x{k}" for k in range(64)] + ["label"]))
    expected = cli_error(ballast_bin, ["certify", "--model", path, "--data", data, *flags])
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X, y, **python_kwargs)
    assert one_line(e) == expected.replace(flag, keyword)


def test_file_errors_equal_the_command_line(tmp_path, ballast_bin):
    missing = tmp_path / "missing.json"
    with pytest.raises(ballast.FileError) as e:
        ballast.Model.load(missing)
    assert isinstance(e.value, OSError)
    bad = tmp_path / "bad.json"
    bad.write_text('{"format": "ballast.model/1", "input": {"dim": 2}, "layers": [{"kind": "dense", '
                   '"weights": [[1, 2], [3]], "bias": [0, 0]}]}')
    with pytest.raises(ballast.InputError) as e:
        ballast.Model.load(bad)
    expected = cli_error(ballast_bin, ["inspect", "--model", bad])
    assert one_line(e) == expected


def test_unknown_retrain_setting(model, rows):
    X, y = rows
    with pytest.raises(ballast.InputError, match="^epoch: not a retrain setting"):
        ballast.retrain(model, X, y, eps=0.1, floor=0.5, epoch=3)
    with pytest.raises(ballast.InputError, match=r"^learning_rate: -1 is not allowed, expected a number > 0$"):
        ballast.retrain(model, X, y, eps=0.1, floor=0.5, learning_rate=-1.0)
    with pytest.raises(ballast.InputError, match="^floor: retraining needs a floor"):
        ballast.retrain(model, X, y, eps=0.1)


def test_requirement_file_values_apply_unless_a_keyword_overrides_them(tmp_path, model, rows):
    X, y = rows
    path = tmp_path / "rule.toml"
    path.write_text('norm = "l2"\nepsilon = 1.5\nfloor = 0.5\n')
    from_file = ballast.certify(model, X, y, requirement=path)
    assert from_file.to_json_string().count('"norm": "l2"') >= 1
    explicit = ballast.certify(model, X, y, eps=1.5, norm="l2", floor=0.5)
    assert list(from_file.status) == list(explicit.status)
    overridden = ballast.certify(model, X, y, requirement=path, floor=0.95)
    assert overridden.to_json_string().count('"floor": 0.95') >= 1


def test_a_requirement_list_is_refused_with_a_pointer_to_the_command_line(model, rows, tmp_path):
    X, y = rows
    path = tmp_path / "list.toml"
    path.write_text("[[requirements]]\nepsilon = 0.1\nfloor = 0.5\n\n[[requirements]]\nepsilon = 0.2\nfloor = 0.3\n")
    with pytest.raises(ballast.InputError) as e:
        ballast.certify(model, X, y, requirement=str(path))
    assert "not supported from Python yet" in one_line(e)
