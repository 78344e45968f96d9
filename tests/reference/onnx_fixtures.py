#!/usr/bin/env python3
"""ONNX fixtures for ballast's ONNX import and export, checked by onnxruntime.

Run from the project root (after `cargo build --release`; the script calls the
ballast binary for the export step):
    /work/venv/bin/python tests/reference/onnx_fixtures.py

Order of work:
  1. build ONNX files with skl2onnx and onnx.helper under tests/data/onnx/;
  2. run onnxruntime on them for fixed inputs (scores / probabilities and
     labels) and record the outputs;
  3. call `target/release/ballast export` on ballast JSON models to write
     tests/data/onnx/exported_*.onnx (float32 and --float64);
  4. run onnxruntime on those exported files and record the outputs.
Everything lands in tests/reference/out/onnx_reference.json (plus versions).

Sources of the models:
  - scikit-learn MLPClassifier on load_digits (same recipe as
    digits_fixtures.py: X/16, train_test_split(test_size=0.3, random_state=0,
    stratify=y), hidden (32,), random_state=0, max_iter=500), converted with
    skl2onnx (default options: ZipMap on the probability output);
  - scikit-learn Pipeline(StandardScaler, LogisticRegression) on
    load_breast_cancer (binary, string labels "malignant"/"benign"), skl2onnx
    with zipmap=False;
  - scikit-learn LogisticRegression on load_digits (10 classes), skl2onnx;
  - scikit-learn Pipeline(StandardScaler, MLPClassifier) on load_breast_cancer
    (binary: skl2onnx writes Sigmoid, 1 - p and a Concat), zipmap=False;
  - a hand-built graph (onnx.helper): Sub/Div normalisation, Gemm with
    transB=1 and alpha/beta, BatchNormalization (inference), Relu, MatMul+Add,
    Identity, Cast, Flatten, Reshape, a Constant node, final Softmax; float32
    and a float64 copy; initializers partly in raw_data, partly typed;
  - an unsupported graph: a Sigmoid hidden activation (refused convolution
    graphs are built by cnn_onnx_fixtures.py).
"""
import json
import os
import platform
import subprocess
import sys

import numpy as np
import onnx
import onnxruntime as ort
import skl2onnx
import sklearn
from onnx import TensorProto, helper, numpy_helper
from skl2onnx import to_onnx
from sklearn.datasets import load_breast_cancer, load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

DATA_DIR = os.path.join("tests", "data", "onnx")
OUT_FILE = os.path.join("tests", "reference", "out", "onnx_reference.json")
BALLAST = os.path.join("target", "release", "ballast")
N_ROWS = 40

VERSIONS = {
    "python": platform.python_version(),
    "numpy": np.__version__,
    "scikit-learn": sklearn.__version__,
    "onnx": onnx.__version__,
    "onnxruntime": ort.__version__,
    "skl2onnx": skl2onnx.__version__,
}


def floats(a):
    return [float(v) for v in np.asarray(a, dtype=np.float64).ravel()]


def rows(a):
    return [floats(r) for r in np.asarray(a)]


def run_ort(path, X):
    sess = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
    name = sess.get_inputs()[0].name
    outs = sess.run(None, {name: X})
    result = {}
    for meta, value in zip(sess.get_outputs(), outs):
        if isinstance(value, list):  # ZipMap: list of {label: prob}
            keys = sorted(value[0].keys())
            value = np.array([[d[k] for k in keys] for d in value])
        value = np.asarray(value)
        if value.dtype.kind in "fc":
            result[meta.name] = rows(value.reshape(len(X), -1))
        else:
            result[meta.name] = [v.item() if hasattr(v, "item") else v for v in value.ravel()]
    return result


def digits_split():
    d = load_digits()
    X = d.data.astype(np.float64) / 16.0
    return train_test_split(X, d.target, test_size=0.3, random_state=0, stratify=d.target)


def save(model, name):
    path = os.path.join(DATA_DIR, name)
    onnx.checker.check_model(model)
    with open(path, "wb") as f:
        f.write(model.SerializeToString())
    return path


def sklearn_fixtures(out):
    X_train, X_test, y_train, y_test = digits_split()
    X = X_test[:N_ROWS].astype(np.float32)

    mlp = MLPClassifier(hidden_layer_sizes=(32,), random_state=0, max_iter=500).fit(X_train, y_train)
    path = save(to_onnx(mlp, X_train[:1].astype(np.float32), target_opset=15), "sklearn_digits_mlp.onnx")
    out["sklearn_digits_mlp"] = {
        "file": path, "inputs": rows(X), "ort": run_ort(path, X),
        "sklearn_predicted": [int(v) for v in mlp.predict(X)],
        "source": "scikit-learn load_digits, MLPClassifier(hidden_layer_sizes=(32,), random_state=0, max_iter=500), skl2onnx default options",
    }

    lr = LogisticRegression(max_iter=2000).fit(X_train, y_train)
    path = save(to_onnx(lr, X_train[:1].astype(np.float32), target_opset=15, options={"zipmap": False}),
                "sklearn_digits_logreg.onnx")
    out["sklearn_digits_logreg"] = {
        "file": path, "inputs": rows(X), "ort": run_ort(path, X),
        "sklearn_predicted": [int(v) for v in lr.predict(X)],
        "source": "scikit-learn load_digits, LogisticRegression(max_iter=2000), skl2onnx zipmap=False",
    }

    bc = load_breast_cancer()
    names = np.array(bc.target_names)[bc.target]  # "malignant" / "benign"
    Xb_train, Xb_test, yb_train, yb_test = train_test_split(
        bc.data, names, test_size=0.3, random_state=0, stratify=names)
    pipe = make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000)).fit(Xb_train, yb_train)
    Xb = Xb_test[:N_ROWS].astype(np.float32)
    path = save(to_onnx(pipe, Xb_train[:1].astype(np.float32), target_opset=15, options={"zipmap": False}),
                "sklearn_breast_cancer_logreg.onnx")
    out["sklearn_breast_cancer_logreg"] = {
        "file": path, "inputs": rows(Xb), "ort": run_ort(path, Xb),
        "sklearn_predicted": [str(v) for v in pipe.predict(Xb)],
        "classes": [str(c) for c in pipe.classes_],
        "source": "scikit-learn load_breast_cancer, Pipeline(StandardScaler, LogisticRegression(max_iter=2000)), string labels, skl2onnx zipmap=False",
    }

    mlp2 = make_pipeline(StandardScaler(), MLPClassifier(hidden_layer_sizes=(8,), random_state=0, max_iter=1000))
    mlp2.fit(Xb_train, yb_train)
    path = save(to_onnx(mlp2, Xb_train[:1].astype(np.float32), target_opset=15, options={"zipmap": False}),
                "sklearn_breast_cancer_mlp.onnx")
    out["sklearn_breast_cancer_mlp"] = {
        "file": path, "inputs": rows(Xb), "ort": run_ort(path, Xb),
        "sklearn_predicted": [str(v) for v in mlp2.predict(Xb)],
        "classes": [str(c) for c in mlp2.classes_],
        "source": "scikit-learn load_breast_cancer, Pipeline(StandardScaler, MLPClassifier(hidden_layer_sizes=(8,), random_state=0, max_iter=1000)), binary (Sigmoid + Concat output), string labels, skl2onnx zipmap=False",
    }


def hand_graph(dtype):
    """x[N,2,3] -> Flatten -> Sub/Div -> Gemm(transB=1, alpha, beta) -> BatchNorm -> Relu
    -> Identity -> MatMul + Add -> Cast -> Relu -> Reshape[-1,4] -> Gemm -> logits -> Softmax -> probs."""
    rng = np.random.default_rng(7)
    np_t = np.float32 if dtype == TensorProto.FLOAT else np.float64
    d_in, h1, h2, k = 6, 5, 4, 3

    def init(name, array, raw):
        array = np.asarray(array, dtype=np_t)
        if raw:
            return numpy_helper.from_array(array, name)  # raw_data
        return helper.make_tensor(name, dtype, array.shape, array.ravel().tolist())  # typed field

    inits = [
        init("mean", rng.normal(0.5, 0.2, d_in), True),
        init("std", rng.uniform(0.5, 2.0, d_in), False),
        init("w1t", rng.normal(0, 0.7, (h1, d_in)), True),  # transB=1: [out, in]
        init("b1", rng.normal(0, 0.3, h1), False),
        init("bn_scale", rng.uniform(0.5, 1.5, h1), True),
        init("bn_bias", rng.normal(0, 0.2, h1), False),
        init("bn_mean", rng.normal(0, 0.3, h1), True),
        init("bn_var", rng.uniform(0.2, 1.0, h1), False),
        init("w2", rng.normal(0, 0.7, (h1, h2)), False),  # MatMul: [in, out]
        init("w3t", rng.normal(0, 0.7, (k, h2)), True),
        init("b3", rng.normal(0, 0.3, k), True),
        numpy_helper.from_array(np.array([-1, h2], dtype=np.int64), "shape"),
    ]
    b2 = helper.make_tensor("b2v", dtype, [h2], rng.normal(0, 0.3, h2).tolist())
    nodes = [
        helper.make_node("Flatten", ["x"], ["flat"], name="flatten", axis=1),
        helper.make_node("Sub", ["flat", "mean"], ["centred"], name="centre"),
        helper.make_node("Div", ["centred", "std"], ["scaled"], name="scale"),
        helper.make_node("Gemm", ["scaled", "w1t", "b1"], ["g1"], name="dense1", transB=1, alpha=0.8, beta=1.5),
        helper.make_node("BatchNormalization", ["g1", "bn_scale", "bn_bias", "bn_mean", "bn_var"], ["bn"],
                         name="batchnorm", epsilon=1e-3),
        helper.make_node("Relu", ["bn"], ["r1"], name="relu1"),
        helper.make_node("Identity", ["r1"], ["r1i"], name="identity"),
        helper.make_node("Constant", [], ["b2"], name="bias2", value=b2),
        helper.make_node("MatMul", ["r1i", "w2"], ["m2"], name="dense2_matmul"),
        helper.make_node("Add", ["m2", "b2"], ["a2"], name="dense2_add"),
        helper.make_node("Cast", ["a2"], ["a2c"], name="cast", to=dtype),
        helper.make_node("Relu", ["a2c"], ["r2"], name="relu2"),
        helper.make_node("Reshape", ["r2", "shape"], ["r2f"], name="reshape"),
        helper.make_node("Gemm", ["r2f", "w3t", "b3"], ["logits"], name="dense3", transB=1),
        helper.make_node("Softmax", ["logits"], ["probs"], name="softmax", axis=-1),
    ]
    graph = helper.make_graph(
        nodes, "hand_mlp",
        [helper.make_tensor_value_info("x", dtype, ["N", 2, 3])],
        [helper.make_tensor_value_info("logits", dtype, ["N", k]),
         helper.make_tensor_value_info("probs", dtype, ["N", k])],
        inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 15)], producer_name="onnx.helper")
    model.ir_version = 8
    X = rng.uniform(-1.0, 2.0, (N_ROWS, 2, 3)).astype(np_t)
    return model, X


def unsupported():
    rng = np.random.default_rng(3)
    w1 = numpy_helper.from_array(rng.normal(0, 1, (4, 3)).astype(np.float32), "w1")
    w2 = numpy_helper.from_array(rng.normal(0, 1, (3, 2)).astype(np.float32), "w2")
    nodes = [helper.make_node("MatMul", ["x", "w1"], ["h"], name="dense1"),
             helper.make_node("Sigmoid", ["h"], ["s"], name="hidden_sigmoid"),
             helper.make_node("MatMul", ["s", "w2"], ["y"], name="dense2")]
    inputs = [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])]
    graph = helper.make_graph(nodes, "unsupported_sigmoid", inputs,
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 2])], [w1, w2])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 15)], producer_name="onnx.helper")
    model.ir_version = 8
    return model


def binary_linear_classifier(post_transform):
    """ai.onnx.ml LinearClassifier with ONE coefficient row and two integer labels (binary convention)."""
    rng = np.random.default_rng(11)
    d = 4
    node = helper.make_node(
        "LinearClassifier", ["x"], ["label", "scores"], name="binary_linear", domain="ai.onnx.ml",
        coefficients=rng.normal(0, 1, d).tolist(), intercepts=[0.1], classlabels_ints=[3, 7],
        post_transform=post_transform)
    graph = helper.make_graph(
        [node], f"binary_linear_{post_transform.lower()}",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", d])],
        [helper.make_tensor_value_info("label", TensorProto.INT64, ["N"]),
         helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", None])], [])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 15), helper.make_opsetid("ai.onnx.ml", 1)],
                              producer_name="onnx.helper")
    model.ir_version = 8
    X = rng.normal(0, 1.5, (N_ROWS, d)).astype(np.float32)
    return model, X


def exported_fixtures(out):
    if not os.path.exists(BALLAST):
        sys.exit(f"{BALLAST} missing: run `cargo build --release` first")
    jobs = [
        ("exported_digits_mlp.onnx", "tests/data/digits_mlp.model.json", []),
        ("exported_digits_mlp_deep_f64.onnx", "tests/data/digits_mlp_deep.model.json", ["--float64"]),
    ]
    _, X_test, _, _ = digits_split()
    for name, model, flags in jobs:
        path = os.path.join(DATA_DIR, name)
        subprocess.run([BALLAST, "export", "--model", model, "--onnx", path] + flags, check=True)
        onnx.checker.check_model(onnx.load(path))
        dtype = np.float64 if flags else np.float32
        X = X_test[:N_ROWS].astype(dtype)
        out[name.removesuffix(".onnx")] = {
            "file": path, "model": model, "flags": flags, "inputs": rows(X), "ort": run_ort(path, X),
            "source": f"ballast export of {model}, run by onnxruntime",
        }


def main():
    if not os.path.isdir(os.path.join("tests", "reference")):
        sys.exit("run from the project root")
    os.makedirs(DATA_DIR, exist_ok=True)
    out = {"versions": VERSIONS, "script": "tests/reference/onnx_fixtures.py", "fixtures": {}}
    fx = out["fixtures"]
    sklearn_fixtures(fx)
    for dtype, stem in [(TensorProto.FLOAT, "hand_mlp_f32"), (TensorProto.DOUBLE, "hand_mlp_f64")]:
        model, X = hand_graph(dtype)
        path = save(model, f"{stem}.onnx")
        fx[stem] = {"file": path, "inputs": rows(X.reshape(len(X), -1)), "ort": run_ort(path, X),
                    "source": "hand-built with onnx.helper (seeded numpy), run by onnxruntime"}
    for post in ["NONE", "LOGISTIC"]:
        model, X = binary_linear_classifier(post)
        stem = f"binary_linear_{post.lower()}"
        path = save(model, f"{stem}.onnx")
        fx[stem] = {"file": path, "inputs": rows(X), "ort": run_ort(path, X),
                    "source": f"hand-built ai.onnx.ml LinearClassifier, one coefficient row, post_transform {post}, run by onnxruntime"}
    save(unsupported(), "unsupported_sigmoid.onnx")
    exported_fixtures(fx)
    with open(OUT_FILE, "w") as f:
        json.dump(out, f)
        f.write("\n")
    for k, v in fx.items():
        print(k, {n: (len(o), len(o[0]) if isinstance(o[0], list) else 1) for n, o in v["ort"].items()})


if __name__ == "__main__":
    main()
