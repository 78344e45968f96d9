#!/usr/bin/env python3
"""Outside reference for the scikit-learn Pipeline recipe of docs/model-format.md.

Trains Pipeline(MinMaxScaler, MLPClassifier) on scikit-learn's bundled breast-cancer dataset (the UCI
Wisconsin diagnostic breast cancer data, 569 samples, 30 features), exports it with `export_pipeline`
copied verbatim from docs/model-format.md, and records the pipeline's predict_proba on the test rows.

Run from the project root:
    /work/venv/bin/python tests/reference/pipeline_fixture.py

Writes tests/reference/out/pipeline_minmax.json: the exported model, the raw test rows (clipped to the
training range, which the exported model declares as its input range), and predict_proba[:, 1].
Deterministic: fixed random_state everywhere.
"""
import json
import os
import platform
import re

import numpy as np
import sklearn
from sklearn.datasets import load_breast_cancer
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MinMaxScaler

DOC = os.path.join("docs", "model-format.md")
OUT = os.path.join("tests", "reference", "out", "pipeline_minmax.json")


def recipe_from_docs():
    """The export_pipeline function exactly as docs/model-format.md prints it."""
    text = open(DOC, encoding="utf-8").read()
    block = re.search(r"```python\n(import json\nfrom sklearn.preprocessing import MinMaxScaler.*?)```", text, re.S)
    namespace = {}
    exec(block.group(1), namespace)
    return namespace["export_pipeline"]


def main():
    export_pipeline = recipe_from_docs()
    data = load_breast_cancer()
    names = [n.replace(" ", "_") for n in data.feature_names]
    x_train, x_test, y_train, y_test = train_test_split(
        data.data, data.target, test_size=0.3, random_state=0, stratify=data.target)
    pipeline = make_pipeline(MinMaxScaler(), MLPClassifier(hidden_layer_sizes=(16,), random_state=0, max_iter=2000))
    pipeline.fit(x_train, y_train)
    path = OUT + ".model.tmp"
    export_pipeline(pipeline, path, names)
    model = json.load(open(path))
    os.remove(path)
    scaler = pipeline.named_steps["minmaxscaler"]
    rows = np.clip(x_test, scaler.data_min_, scaler.data_max_)
    outside = int(np.any((x_test < scaler.data_min_) | (x_test > scaler.data_max_), axis=1).sum())
    result = {
        "source": "scikit-learn load_breast_cancer, train_test_split(test_size=0.3, random_state=0, stratify=y), "
                  "make_pipeline(MinMaxScaler(), MLPClassifier(hidden_layer_sizes=(16,), random_state=0, max_iter=2000)), "
                  "exported by export_pipeline from docs/model-format.md; test rows clipped to the training range",
        "script": "tests/reference/pipeline_fixture.py",
        "versions": {"python": platform.python_version(), "numpy": np.__version__, "scikit-learn": sklearn.__version__},
        "test_rows_outside_training_range": outside,
        "model": model,
        "rows": rows.tolist(),
        "labels": y_test.tolist(),
        "probability_class_1": pipeline.predict_proba(rows)[:, 1].tolist(),
    }
    with open(OUT, "w") as f:
        json.dump(result, f)
    print(f"wrote {OUT}: {len(rows)} rows, {outside} outside the training range before clipping")


if __name__ == "__main__":
    main()
