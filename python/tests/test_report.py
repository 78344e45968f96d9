"""The Report object: files written as `ballast certify --report/--sheet` writes them, the arrays
consistent with the summary, pandas when installed, and Ctrl-C (a real SIGINT to a child process)
raising KeyboardInterrupt with nothing written."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

import ballast


@pytest.fixture()
def report(digits_mlp):
    pipe, X, y = digits_mlp
    model = ballast.Model.from_sklearn(pipe)
    model.input_range = (0.0, 16.0)
    return ballast.certify(model, X[1000:1200], y[1000:1200], eps=0.5, floor=0.9)


def test_arrays_agree_with_the_summary(report):
    status = report.status
    assert len(status) == report.samples == 200
    for name in ("certified", "misclassified", "unresolved"):
        assert np.sum(status == name) == getattr(report, name)
    assert np.sum(status == "counterexample") == report.counterexample_count == len(report.counterexample_indices)
    assert np.array_equal(report.counterexample_indices, np.flatnonzero(status == "counterexample"))
    assert report.counterexamples.shape == (report.counterexample_count, 64)
    # Certified means a positive sound margin bound (docs/bounds.md).
    assert np.all(report.margin_lower[status == "certified"] > 0)
    assert report.certified_accuracy == pytest.approx(report.certified / report.samples)
    assert report.verdict in ("pass", "fail", "undecided")
    assert report.exit_code == {"pass": 0, "fail": 1, "undecided": 3}[report.verdict]


def test_counterexamples_change_the_answer_inside_the_ball(report, digits_mlp):
    pipe, X, y = digits_mlp
    rows = report.counterexample_indices
    assert len(rows) > 0
    points = report.counterexamples
    # Reference: scikit-learn's own predict on the counterexample points.
    assert np.all(pipe.predict(points) != y[1000:1200][rows])
    assert np.all(np.abs(points - X[1000:1200][rows]) <= 0.5 + 1e-12)
    assert np.all((points >= 0) & (points <= 16))


def test_files(tmp_path, report):
    report.to_json(tmp_path / "r.json")
    document = json.loads((tmp_path / "r.json").read_text())
    assert document["summary"]["verdict"] == report.verdict
    assert [s["status"] for s in document["samples"]] == list(report.status)
    assert document["counterexamples"] == "r.counterexamples.csv"
    csv_rows = (tmp_path / "r.counterexamples.csv").read_text().strip().splitlines()
    assert len(csv_rows) == 1 + report.counterexample_count
    md, html = report.sheet(tmp_path / "sheet")
    assert "certified" in open(md).read() and open(html).read().startswith("<!DOCTYPE html>")
    with pytest.raises(ballast.FileError):
        report.to_json(tmp_path / "no-such-folder" / "r.json")


def test_to_pandas(report):
    pd = pytest.importorskip("pandas")
    frame = report.to_pandas()
    assert isinstance(frame, pd.DataFrame)
    assert list(frame["status"]) == list(report.status)
    assert (frame["status"] == "certified").sum() == report.certified


SCRIPT = textwrap.dedent("""
    import json, sys
    import numpy as np
    import ballast
    rng = np.random.default_rng(0)
    layers = [{"kind": "dense", "weights": rng.normal(size=(32, 64)).tolist(), "bias": [0.0] * 32},
              {"kind": "relu"},
              {"kind": "dense", "weights": rng.normal(size=(10, 32)).tolist(), "bias": [0.0] * 10}]
    model = ballast.Model.from_json(json.dumps({"format": "ballast.model/1", "input": {"dim": 64, "lower": 0,
                                                "upper": 1}, "layers": layers}))
    X = rng.uniform(size=(200000, 64))
    y = model.predict(X)
    which = sys.argv[1]
    print("ready", flush=True)
    if which == "certify":
        report = ballast.certify(model, X, y, eps=0.01)
        report.to_json(sys.argv[2])
    else:
        ballast.retrain(model, X[:2000], y[:2000], eps=0.01, floor=0.99, epochs=100000, max_rounds=1)
    print("finished", flush=True)
""")



@pytest.mark.parametrize("which", ["certify", "retrain"])
def test_ctrl_c_raises_keyboard_interrupt_and_writes_nothing(tmp_path, which):
    out = tmp_path / "r.json"
    child = subprocess.Popen([sys.executable, "-c", SCRIPT, which, str(out)], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True)
    assert child.stdout.readline().strip() == "ready"
    time.sleep(2.0)  # inside the native call, which runs for much longer (seconds to minutes)
    child.send_signal(signal.SIGINT)
    stdout, stderr = child.communicate(timeout=120)
    # An uncaught KeyboardInterrupt ends Python by SIGINT itself (status -2 here) since Python 3.8.
    assert child.returncode in (1, -signal.SIGINT), stderr
    assert "KeyboardInterrupt" in stderr
    assert "finished" not in stdout
    assert "panicked" not in stderr
    assert not out.exists()


def test_long_runs_release_the_interpreter_lock():
    """With a switch interval of 100 s, a thread holding the interpreter lock keeps it until it
    blocks or ends. The main thread sleeps (releasing the lock) while a worker calls certify; when the
    main thread wakes up, the call must still be running — possible only if certify released the lock."""
    import json as json_module
    import threading

    rng = np.random.default_rng(0)
    layers = [{"kind": "dense", "weights": rng.normal(size=(32, 64)).tolist(), "bias": [0.0] * 32},
              {"kind": "relu"},
              {"kind": "dense", "weights": rng.normal(size=(10, 32)).tolist(), "bias": [0.0] * 10}]
    model = ballast.Model.from_json(json_module.dumps(
        {"format": "ballast.model/1", "input": {"dim": 64, "lower": 0, "upper": 1}, "layers": layers}))
    X = rng.uniform(size=(20000, 64))
    y = model.predict(X)
    finished = threading.Event()

    def work():
        ballast.certify(model, X, y, eps=0.01)
        finished.set()

    previous = sys.getswitchinterval()
    sys.setswitchinterval(100.0)
    try:
        worker = threading.Thread(target=work)
        worker.start()
        time.sleep(0.5)
        running_while_main_ran = not finished.is_set()
    finally:
        sys.setswitchinterval(previous)
        worker.join()
    assert running_while_main_ran
    assert finished.is_set()
