"""ballast.certify from Python against `ballast certify` on the command line: the same model and rows,
written to files, must give identical per-sample statuses, stages and margins, the same summary and
the same exit code. Both call one library; this checks the Python side feeds it the same model, data,
requirement and settings."""

from __future__ import annotations

import json
import subprocess

import numpy as np
import pytest

import ballast


def write_csv(path, X, y):
    header = ",".join([f"x{k}" for k in range(X.shape[1])] + ["label"])
    rows = np.column_stack([X, y])
    # %.17g: every double reads back bit for bit (common practice).
    np.savetxt(path, rows, delimiter=",", header=header, comments="", fmt=["%.17g"] * X.shape[1] + ["%d"])


def run_cli(binary, args):
    done = subprocess.run([str(binary), *map(str, args)], capture_output=True, text=True, timeout=600)
    return done.returncode, done.stdout, done.stderr


CASES = {
    "linf-floor": dict(python=dict(eps=0.5, floor=0.9), cli=["--eps", "0.5", "--floor", "0.9"]),
    "l2-forbid": dict(python=dict(eps=1.5, norm="l2", forbid_into="0,6"),
                      cli=["--eps", "1.5", "--norm", "l2", "--forbid-into", "0,6"]),
    "tolerances-confidence": dict(
        python=dict(eps=0.25, tolerances=np.linspace(0.5, 2.0, 64), floor=0.8, confidence=0.9),
        cli=["--eps", "0.25", "--tolerances", "{tolerances}", "--floor", "0.8", "--confidence", "0.9"]),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_statuses_equal_the_command_line(tmp_path, ballast_bin, digits_mlp, case):
    pipe, X, y = digits_mlp
    model = ballast.Model.from_sklearn(pipe, name="digits")
    model.input_range = (0.0, 16.0)
    X_test, y_test = X[1000:1250], y[1000:1250]
    model_path, data_path, report_path = tmp_path / "m.json", tmp_path / "d.csv", tmp_path / "r.json"
    model.save(model_path)
    write_csv(data_path, X_test, y_test)
    spec = CASES[case]
    tolerances = tmp_path / "tol.json"
    if "tolerances" in spec["python"]:
        tolerances.write_text(json.dumps({f"x{k}": float(v) for k, v in enumerate(spec["python"]["tolerances"])}))
    cli_args = [a.format(tolerances=tolerances) for a in spec["cli"]]

    code, _, stderr = run_cli(
        ballast_bin, ["certify", "--model", model_path, "--data", data_path, "--report", report_path, *cli_args])
    assert code in (0, 1, 3), stderr
    cli = json.loads(report_path.read_text())

    report = ballast.certify(model, X_test, y_test, **spec["python"])

    statuses = [s["status"] for s in cli["samples"]]
    assert list(report.status) == statuses
    assert list(report.stage) == [s["stage"] for s in cli["samples"]]
    cli_margins = np.array([np.nan if s["margin_lower"] is None else s["margin_lower"] for s in cli["samples"]])
    np.testing.assert_array_equal(report.margin_lower, cli_margins)
    for key in ("samples", "certified", "counterexample", "misclassified", "unresolved", "verdict"):
        assert report.summary[key] == cli["summary"][key], key
    assert report.exit_code == code
    # The counterexamples are the command line's, point for point.
    cli_points = [s["counterexample"]["features"] for s in cli["samples"] if s.get("counterexample")]
    np.testing.assert_array_equal(report.counterexamples, np.array(cli_points).reshape(-1, X.shape[1]))
    # Both runs certified something and left something uncertified, so the comparison has teeth.
    assert 0 < statuses.count("certified") < len(statuses)


def test_loaded_model_file_is_recorded_with_its_digest(tmp_path, digits_mlp):
    import hashlib

    pipe, X, y = digits_mlp
    path = tmp_path / "m.json"
    ballast.Model.from_sklearn(pipe).save(path)
    report = ballast.certify(ballast.Model.load(path), X[1000:1010], y[1000:1010], eps=0.1)
    saved = tmp_path / "r.json"
    report.to_json(saved)
    document = json.loads(saved.read_text())
    assert document["format"] == "ballast.report/1"
    assert document["model"]["path"] == str(path)
    assert document["model"]["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    again = ballast.Report.load(saved)
    assert list(again.status) == list(report.status)


def test_attack_finds_what_the_command_line_finds(tmp_path, ballast_bin, digits_mlp):
    """Each sample's attack depends only on the seed and its row, so the Python call (in chunks) and
    `ballast attack` must find counterexamples on the same rows, at the same points."""
    pipe, X, y = digits_mlp
    model = ballast.Model.from_sklearn(pipe)
    model.input_range = (0.0, 16.0)
    X_test, y_test = X[1000:1300], y[1000:1300]
    model_path, data_path, out = tmp_path / "m.json", tmp_path / "d.csv", tmp_path / "ce.csv"
    model.save(model_path)
    write_csv(data_path, X_test, y_test)
    code, _, stderr = run_cli(ballast_bin, ["attack", "--model", model_path, "--data", data_path, "--eps", "0.5",
                                            "--steps", "50", "--restarts", "2", "--seed", "7", "--out", out])
    assert code == 0, stderr
    cli = np.loadtxt(out, delimiter=",", skiprows=1, ndmin=2)
    indices, points = ballast.attack(model, X_test, y_test, eps=0.5, steps=50, restarts=2, seed=7)
    assert len(indices) > 0
    assert np.array_equal(indices, cli[:, 0].astype(int))
    np.testing.assert_array_equal(points, cli[:, 4:])
    # Reference: scikit-learn's predict on the points — every one changes the answer.
    assert np.all(pipe.predict(points) != y_test[indices])
