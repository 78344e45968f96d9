"""Model.load on ONNX files: predictions equal onnxruntime's labels recorded in
tests/reference/out/onnx_reference.json (produced by tests/reference/onnx_fixtures.py with the versions
recorded there) for scikit-learn models exported by skl2onnx."""

from __future__ import annotations

import json

import numpy as np
import pytest

import ballast
from conftest import ROOT

REFERENCE = json.loads((ROOT / "tests" / "reference" / "out" / "onnx_reference.json").read_text())["fixtures"]


@pytest.mark.parametrize("name", ["sklearn_digits_mlp", "sklearn_digits_logreg", "sklearn_breast_cancer_mlp",
                                  "sklearn_breast_cancer_logreg"])
def test_onnx_predictions_equal_onnxruntime(name):
    fixture = REFERENCE[name]
    model = ballast.Model.load(ROOT / fixture["file"])
    X = np.array(fixture["inputs"], dtype=np.float64)
    # Reference: onnxruntime's label output on the same inputs (class labels; indices into "classes").
    ort = fixture["ort"]
    labels = ort["output_label"] if "output_label" in ort else ort["label"]
    classes = fixture.get("classes")
    expected = [classes.index(c) for c in labels] if classes else labels
    assert np.array_equal(model.predict(X), expected)
    # An ONNX model is converted in memory, so reports record it by the digest of its layout.
    assert model.path is None


def test_refused_onnx_raises_input_error():
    with pytest.raises(ballast.InputError, match="refused_leaky_relu.onnx"):
        ballast.Model.load(ROOT / "tests" / "data" / "onnx" / "refused_leaky_relu.onnx")
