"""ballast.retrain from Python against `ballast retrain` on the command line, on the breast-cancer data
(scikit-learn's copy of the UCI Wisconsin diagnostic set): the same model, rows, requirement, settings
and seed must give the same weights, and the returned result must agree with a certify run of the
command line on the returned model."""

from __future__ import annotations

import json
import subprocess
import warnings

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MinMaxScaler

import ballast

FLOOR = 0.9


@pytest.fixture(scope="module")
def case():
    X, y = load_breast_cancer(return_X_y=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pipe = make_pipeline(MinMaxScaler(), MLPClassifier(hidden_layer_sizes=(16,), max_iter=200, random_state=0))
        pipe.fit(X[::2], y[::2])
    model = ballast.Model.from_sklearn(pipe, name="cancer")
    lower, upper = X.min(axis=0), X.max(axis=0)
    model.input_range = (lower, upper)
    tolerances = 0.04 * (upper - lower)
    return model, X, y, tolerances


def write_csv(path, X, y):
    header = ",".join([f"x{k}" for k in range(X.shape[1])] + ["label"])
    np.savetxt(path, np.column_stack([X, y]), delimiter=",", header=header, comments="",
               fmt=["%.17g"] * X.shape[1] + ["%d"])


def test_retrain_reaches_the_floor_and_matches_the_command_line(tmp_path, ballast_bin, case):
    model, X, y, tolerances = case
    X_train, y_train, X_acc, y_acc = X[::2], y[::2], X[1::2], y[1::2]
    before = ballast.certify(model, X_acc, y_acc, eps=1.0, tolerances=tolerances, floor=FLOOR)
    assert before.verdict == "fail"  # so retraining has something to do

    settings = dict(epochs=12, max_rounds=2, seed=4)
    retrained, result = ballast.retrain(model, X_train, y_train, eps=1.0, tolerances=tolerances, floor=FLOOR,
                                        X_acceptance=X_acc, y_acceptance=y_acc, **settings)
    report = result.report
    assert result.verdict == ("met" if report.certified_accuracy >= FLOOR else "not_met")
    # The multiplier history: one constraint, one row per epoch, never negative, raised while the
    # constraint was violated (the floor failed at the start).
    assert result.multipliers.shape == (len(result.epochs), 1)
    assert np.all(result.multipliers >= 0) and result.multipliers.max() > 0
    assert len(result.clean_loss) == len(result.epochs) == result.rounds[-1]["epochs"]

    # The command line on the same files, settings and seed.
    files = {name: tmp_path / name for name in ("m.json", "train.csv", "acc.csv", "tol.json", "cli.json", "py.json")}
    model.save(files["m.json"])
    write_csv(files["train.csv"], X_train, y_train)
    write_csv(files["acc.csv"], X_acc, y_acc)
    files["tol.json"].write_text(json.dumps({f"x{k}": float(v) for k, v in enumerate(tolerances)}))
    done = subprocess.run(
        [str(ballast_bin), "retrain", "--model", files["m.json"], "--train", files["train.csv"],
         "--acceptance", files["acc.csv"], "--eps", "1", "--tolerances", files["tol.json"], "--floor", str(FLOOR),
         "--epochs", "12", "--max-rounds", "2", "--seed", "4", "--out", files["cli.json"]],
        capture_output=True, text=True, timeout=600)
    assert done.returncode == result.exit_code, done.stderr
    cli_layers = json.loads(files["cli.json"].read_text())["layers"]
    assert json.loads(retrained.to_json())["layers"] == cli_layers

    # The result's report is what `ballast certify` says about the returned model.
    retrained.save(files["py.json"])
    report_path = tmp_path / "r.json"
    subprocess.run([str(ballast_bin), "certify", "--model", files["py.json"], "--data", files["acc.csv"],
                    "--tolerances", files["tol.json"], "--eps", "1", "--floor", str(FLOOR), "--report", report_path],
                   capture_output=True, text=True, timeout=600)
    cli_report = json.loads(report_path.read_text())
    assert list(report.status) == [s["status"] for s in cli_report["samples"]]
    # The returned model carries its retraining record, as the command line's does.
    provenance = json.loads(retrained.to_json())["provenance"]["retrain"]
    assert provenance["lineage"]["parent_sha256"] == provenance["parent_sha256"]
    # One layout for both: every key the command line's record has (one library function builds both).
    cli_provenance = json.loads(files["cli.json"].read_text())["provenance"]["retrain"]
    assert sorted(provenance) == sorted(cli_provenance)
    assert sorted(provenance["final"]) == sorted(cli_provenance["final"])
    assert provenance["final"]["on_unseen_data"] == cli_provenance["final"]["on_unseen_data"]
    assert provenance["prices"] == cli_provenance["prices"]
    # A separate acceptance set gave the verdict: no caution, as the command line printed none.
    assert result.cautions == []
    assert "caution:" not in done.stderr


def test_a_verdict_on_steering_data_carries_the_command_lines_caution(tmp_path, ballast_bin, case):
    # Without an acceptance set the verdict is on the validation rows that also steered the rounds:
    # Python returns the caution the command line prints for the same run.
    model, X, y, tolerances = case
    _, result = ballast.retrain(model, X[::2], y[::2], eps=1.0, tolerances=tolerances, floor=FLOOR,
                                epochs=2, max_rounds=1, seed=4)
    assert len(result.cautions) == 1 and "optimistic" in result.cautions[0]
    model.save(tmp_path / "m.json")
    write_csv(tmp_path / "train.csv", X[::2], y[::2])
    (tmp_path / "tol.json").write_text(json.dumps({f"x{k}": float(v) for k, v in enumerate(tolerances)}))
    done = subprocess.run(
        [str(ballast_bin), "retrain", "--model", tmp_path / "m.json", "--train", tmp_path / "train.csv",
         "--eps", "1", "--tolerances", tmp_path / "tol.json", "--floor", str(FLOOR), "--epochs", "2",
         "--max-rounds", "1", "--seed", "4", "--out", tmp_path / "cli.json"],
        capture_output=True, text=True, timeout=600)
    assert done.returncode in (0, 1), done.stderr
    assert f"caution: {result.cautions[0]}" in done.stderr


def test_validation_arrays_must_come_in_pairs(case):
    model, X, y, tolerances = case
    with pytest.raises(ballast.InputError, match="^X_val and y_val: give both or neither$"):
        ballast.retrain(model, X, y, eps=1.0, tolerances=tolerances, floor=FLOOR, X_val=X)
