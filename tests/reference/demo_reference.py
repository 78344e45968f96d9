"""Outside reference figures for the bundled pump-fleet demo data (demo-data/*.csv).

Reads the committed CSVs with Python's csv module and numpy (not with ballast), and writes
tests/reference/out/demo_reference.json with:
  - row counts and per-class counts of both files,
  - numpy column means and standard deviations (population, ddof=0) of the training features,
  - acceptance accuracy of scikit-learn LogisticRegression (multinomial softmax regression) and of
    MLPClassifier(hidden_layer_sizes=(32, 32)) trained on the standardised training set;
  - the same for the 64-bin spectra (demo-data/spectrum-*.csv) under "spectrum", with
    MLPClassifier(hidden_layer_sizes=(16,)) as the reference for the demo CNN (scikit-learn has no
    convolution).
The Rust tests (tests/demo.rs) compare ballast's parse of the files and its demo models against these.
Run from the project root:  /work/venv/bin/python tests/reference/demo_reference.py
"""
import csv
import json

import numpy as np
import sklearn
from sklearn.linear_model import LogisticRegression
from sklearn.neural_network import MLPClassifier
from sklearn.preprocessing import StandardScaler

CLASSES = ["normal", "misalignment", "bearing-wear", "cavitation"]


def load(path):
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    header = rows[0]
    labels = np.array([CLASSES.index(r[0]) for r in rows[1:]])
    features = np.array([[float(v) for v in r[1:]] for r in rows[1:]])
    return header, features, labels


header, x_train, y_train = load("demo-data/train.csv")
_, x_accept, y_accept = load("demo-data/acceptance.csv")
scaler = StandardScaler().fit(x_train)
linear = LogisticRegression(max_iter=5000).fit(scaler.transform(x_train), y_train)
mlp = MLPClassifier(hidden_layer_sizes=(32, 32), max_iter=2000, alpha=1e-2,
                    early_stopping=True, random_state=0).fit(scaler.transform(x_train), y_train)
out = {
    "source": "numpy + scikit-learn on demo-data/train.csv and demo-data/acceptance.csv",
    "versions": {"numpy": np.__version__, "scikit-learn": sklearn.__version__},
    "features": header[1:],
    "train_rows": int(len(y_train)),
    "acceptance_rows": int(len(y_accept)),
    "train_class_counts": [int((y_train == c).sum()) for c in range(len(CLASSES))],
    "acceptance_class_counts": [int((y_accept == c).sum()) for c in range(len(CLASSES))],
    "train_mean": x_train.mean(axis=0).tolist(),
    "train_std": x_train.std(axis=0).tolist(),
    "logistic_regression_acceptance_accuracy": float(linear.score(scaler.transform(x_accept), y_accept)),
    "mlp_32_32_acceptance_accuracy": float(mlp.score(scaler.transform(x_accept), y_accept)),
}
_, s_train, sy_train = load("demo-data/spectrum-train.csv")
_, s_accept, sy_accept = load("demo-data/spectrum-acceptance.csv")
s_scaler = StandardScaler().fit(s_train)
s_linear = LogisticRegression(max_iter=5000).fit(s_scaler.transform(s_train), sy_train)
s_mlp = MLPClassifier(hidden_layer_sizes=(16,), max_iter=2000, alpha=1e-2,
                      early_stopping=True, random_state=0).fit(s_scaler.transform(s_train), sy_train)
out["spectrum"] = {
    "train_rows": int(len(sy_train)),
    "acceptance_rows": int(len(sy_accept)),
    "bins": int(s_train.shape[1]),
    "acceptance_class_counts": [int((sy_accept == c).sum()) for c in range(len(CLASSES))],
    "train_mean": s_train.mean(axis=0).tolist(),
    "train_std": s_train.std(axis=0).tolist(),
    "logistic_regression_acceptance_accuracy":
        float(s_linear.score(s_scaler.transform(s_accept), sy_accept)),
    "mlp_16_acceptance_accuracy": float(s_mlp.score(s_scaler.transform(s_accept), sy_accept)),
}
with open("tests/reference/out/demo_reference.json", "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
print(json.dumps({k: v for k, v in out.items() if "accuracy" in k or "counts" in k}))
print(json.dumps({k: v for k, v in out["spectrum"].items() if "accuracy" in k}))
