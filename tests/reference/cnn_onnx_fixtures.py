#!/usr/bin/env python3
"""Convolutional ONNX fixtures for ballast's ONNX import and export.

Run from the project root (after `cargo build --release`; the script calls the
ballast binary for the export step):
    /work/venv/bin/python tests/reference/cnn_onnx_fixtures.py

Order of work:
  1. build CNN graphs with onnx.helper, laid out the way a PyTorch
     `nn.Sequential` export writes them (node names "/0/Conv", initializers
     "0.weight", "1.running_mean", a dynamic "batch_size" dimension, explicit
     dilations / group / kernel_shape / pads / strides, BatchNormalization with
     epsilon and momentum, Flatten(axis=1) or a constant Reshape, Gemm with
     transB=1). This layout is written from memory of torch.onnx.export output;
     PyTorch itself is not used. 1-D and 2-D, with pads (also asymmetric),
     strides and dilations, in float32 and float64;
  2. write two CNNs in ballast's JSON layout (seeded numpy, every number a
     float32 value so that a float32 export is exact) and call
     `target/release/ballast export` on them (float32 and --float64);
  3. build graphs ballast must refuse (group = 2, auto_pad SAME_UPPER, a
     LeakyRelu, ceil_mode = 1, count_include_pad = 1 with pads, a MaxPool
     Indices output, a 3-D Conv); each is checked by onnx.checker and run by
     onnxruntime, so they are valid graphs;
  4. evaluate every graph on fixed inputs with two references: onnxruntime
     (float32 graphs only: its CPU provider has no float64 kernel for Conv,
     AveragePool or the global pools, it reports NOT_IMPLEMENTED) and the
     onnx package's reference evaluator (onnx.reference.ReferenceEvaluator,
     plain numpy, float32 and float64; ballast's opset-13 exports are converted
     to opset 17 for it, see run_reference). On float32 graphs the two must agree
     to 1e-5; a float64 graph's float32 copy run by onnxruntime must agree with
     the reference evaluator's float64 result to 1e-4.
Everything lands in tests/reference/out/cnn_onnx_reference.json (plus versions).
"""
import json
import os
import platform
import subprocess
import sys

import numpy as np
import onnx
import onnx.reference
import onnx.version_converter
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

DATA_DIR = os.path.join("tests", "data", "onnx")
MODEL_DIR = os.path.join("tests", "data")
OUT_FILE = os.path.join("tests", "reference", "out", "cnn_onnx_reference.json")
BALLAST = os.path.join("target", "release", "ballast")
N_ROWS = 24
OPSET = 17

VERSIONS = {
    "python": platform.python_version(),
    "numpy": np.__version__,
    "onnx": onnx.__version__,
    "onnxruntime": ort.__version__,
}


def rows(a):
    return [[float(v) for v in r] for r in np.asarray(a, dtype=np.float64).reshape(len(a), -1)]


def run_ort(model_bytes, X):
    sess = ort.InferenceSession(model_bytes, providers=["CPUExecutionProvider"])
    return sess.run(None, {sess.get_inputs()[0].name: X})[0]


def run_reference(model, X):
    # The reference evaluator's BatchNormalization for opsets 9-13 falls back to batch statistics when
    # `momentum` takes its schema default, although a one-output node is the inference form; ballast
    # exports opset 13, so the evaluator gets a copy converted to opset 17 by onnx.version_converter
    # (the operators used here mean the same in both). onnxruntime runs the file itself.
    if max(o.version for o in model.opset_import if o.domain in ("", "ai.onnx")) < 15:
        model = onnx.version_converter.convert_version(model, OPSET)
    return onnx.reference.ReferenceEvaluator(model).run(None, {model.graph.input[0].name: X})[0]


def to_float32(model):
    """The same graph with float32 tensors (weights rounded to nearest)."""
    m = onnx.ModelProto()
    m.CopyFrom(model)
    for t in m.graph.initializer:
        if t.data_type == TensorProto.DOUBLE:
            t.CopyFrom(numpy_helper.from_array(numpy_helper.to_array(t).astype(np.float32), t.name))
    for v in list(m.graph.input) + list(m.graph.output):
        if v.type.tensor_type.elem_type == TensorProto.DOUBLE:
            v.type.tensor_type.elem_type = TensorProto.FLOAT
    return m


def evaluate(model, X, what):
    """Reference outputs for model on X; cross-checks the two references."""
    model_bytes = model.SerializeToString()
    reference = run_reference(model, X)
    if X.dtype == np.float32:
        runtime = run_ort(model_bytes, X)
        gap = float(np.max(np.abs(runtime.astype(np.float64) - reference)))
        assert gap <= 1e-5, f"{what}: onnxruntime and the reference evaluator differ by {gap}"
        return {"onnxruntime": rows(runtime), "reference_evaluator": rows(reference)}
    single = run_ort(to_float32(model).SerializeToString(), X.astype(np.float32))
    gap = float(np.max(np.abs(single.astype(np.float64) - reference)))
    assert gap <= 1e-4, f"{what}: float32 copy differs from the float64 reference by {gap}"
    return {"onnxruntime": None, "reference_evaluator": rows(reference)}


class Builder:
    """Nodes and initializers named the way a PyTorch nn.Sequential export names them."""

    def __init__(self, rng, np_type):
        self.rng, self.np_type = rng, np_type
        self.dtype = TensorProto.FLOAT if np_type == np.float32 else TensorProto.DOUBLE
        self.nodes, self.inits, self.current = [], [], "input"

    def tensor(self, name, array):
        self.inits.append(numpy_helper.from_array(np.asarray(array, dtype=self.np_type), name))
        return name

    def node(self, op, index, inputs, **attributes):
        out = f"/{index}/{op}_output_0"
        self.nodes.append(helper.make_node(op, [self.current] + inputs, [out], name=f"/{index}/{op}", **attributes))
        self.current = out

    def conv(self, i, cin, cout, kernel, pads, strides, dilations):
        fan_in = cin * int(np.prod(kernel))
        w = self.tensor(f"{i}.weight", self.rng.normal(0, (2 / fan_in) ** 0.5, (cout, cin, *kernel)))
        b = self.tensor(f"{i}.bias", self.rng.normal(0, 0.2, cout))
        self.node("Conv", i, [w, b], dilations=dilations, group=1, kernel_shape=list(kernel), pads=pads, strides=strides)

    def batch_norm(self, i, c, **extra):
        names = [self.tensor(f"{i}.weight", self.rng.uniform(0.5, 1.5, c)),
                 self.tensor(f"{i}.bias", self.rng.normal(0, 0.2, c)),
                 self.tensor(f"{i}.running_mean", self.rng.normal(0, 0.3, c)),
                 self.tensor(f"{i}.running_var", self.rng.uniform(0.3, 1.5, c))]
        self.node("BatchNormalization", i, names, epsilon=1e-5, momentum=0.9, **extra)

    def gemm(self, i, d, k):
        w = self.tensor(f"{i}.weight", self.rng.normal(0, (2 / d) ** 0.5, (k, d)))
        b = self.tensor(f"{i}.bias", self.rng.normal(0, 0.1, k))
        self.node("Gemm", i, [w, b], alpha=1.0, beta=1.0, transB=1)

    def model(self, name, input_dims, classes):
        graph = helper.make_graph(
            self.nodes, "main_graph",
            [helper.make_tensor_value_info("input", self.dtype, ["batch_size", *input_dims])],
            [helper.make_tensor_value_info(self.current, self.dtype, ["batch_size", classes])], self.inits)
        m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="onnx.helper")
        m.ir_version = 8
        m.graph.name = name
        return m


def cnn1d(np_type):
    """[N, 2, 24] -> Conv(k5, dil 2, pads [3, 2]) -> BN -> Relu -> MaxPool(k3, s2, pads [1, 1])
    -> Conv(k3, s2) -> Relu -> AveragePool(k2, s1, pads [1, 0], count_include_pad 0) -> Flatten -> Gemm."""
    b = Builder(np.random.default_rng(31), np_type)
    b.conv(0, 2, 6, (5,), pads=[3, 2], strides=[1], dilations=[2])        # length 21
    b.batch_norm(1, 6)
    b.node("Relu", 2, [])
    b.node("MaxPool", 3, [], ceil_mode=0, dilations=[1], kernel_shape=[3], pads=[1, 1], strides=[2])  # 11
    b.conv(4, 6, 4, (3,), pads=[0, 0], strides=[2], dilations=[1])        # 5
    b.node("Relu", 5, [])
    b.node("AveragePool", 6, [], ceil_mode=0, count_include_pad=0, kernel_shape=[2], pads=[1, 0], strides=[1])  # 5
    b.node("Flatten", 7, [], axis=1)
    b.gemm(8, 20, 3)
    return b.model("cnn1d", [2, 24], 3), (2, 24)


def cnn2d(np_type):
    """[N, 2, 9, 8] -> Sub/Div per channel -> Conv(3x3, pads [1, 0, 0, 1], strides [2, 1], dil [1, 2])
    -> BN(training_mode 0) -> Relu -> MaxPool(2x2, s [1, 2], pads [1, 1, 0, 0]) -> Conv(1x1) -> Relu
    -> AveragePool(2x1, s [2, 1], count_include_pad 1, no pads) -> GlobalMaxPool
    -> Reshape(Constant [-1, 4]) -> Gemm."""
    b = Builder(np.random.default_rng(32), np_type)
    mean = b.tensor("mean", np.array([0.4, 0.6]).reshape(1, 2, 1, 1))
    std = b.tensor("std", np.array([0.25, 0.3]).reshape(1, 2, 1, 1))
    b.node("Sub", "normalize", [mean])
    b.node("Div", "normalize", [std])
    b.conv(0, 2, 5, (3, 3), pads=[1, 0, 0, 1], strides=[2, 1], dilations=[1, 2])   # [5, 4, 5]
    b.batch_norm(1, 5, training_mode=0)
    b.node("Relu", 2, [])
    b.node("MaxPool", 3, [], ceil_mode=0, kernel_shape=[2, 2], pads=[1, 1, 0, 0], strides=[1, 2])  # [5, 4, 3]
    b.conv(4, 5, 4, (1, 1), pads=[0, 0, 0, 0], strides=[1, 1], dilations=[1, 1])
    b.node("Relu", 5, [])
    b.node("AveragePool", 6, [], ceil_mode=0, count_include_pad=1, kernel_shape=[2, 1], pads=[0, 0, 0, 0],
           strides=[2, 1])  # [4, 2, 3]
    b.node("GlobalMaxPool", 7, [])  # [4, 1, 1]
    shape = numpy_helper.from_array(np.array([-1, 4], dtype=np.int64), "/8/Constant_output_0")
    b.nodes.append(helper.make_node("Constant", [], ["/8/Constant_output_0"], name="/8/Constant", value=shape))
    b.node("Reshape", 8, ["/8/Constant_output_0"])
    b.gemm(9, 4, 3)
    return b.model("cnn2d", [2, 9, 8], 3), (2, 9, 8)


def cnn1d_global(np_type):
    """[N, 3, 10] -> Conv(k3, pads [1, 1]) -> Relu -> GlobalAveragePool -> Flatten -> Gemm.
    (A 1-D GlobalMaxPool is left out: onnx 1.23.2's reference evaluator reduces the channel axis
    too on [N, C, L] inputs, so it cannot serve as the reference there.)"""
    b = Builder(np.random.default_rng(33), np_type)
    b.conv(0, 3, 4, (3,), pads=[1, 1], strides=[1], dilations=[1])
    b.node("Relu", 1, [])
    b.node("GlobalAveragePool", 2, [])
    b.node("Flatten", 3, [], axis=1)
    b.gemm(4, 4, 2)
    return b.model("cnn1d_global", [3, 10], 2), (3, 10)


def refused():
    """Valid graphs ballast must refuse: (file stem, model, input shape). Each ends in Flatten + Gemm."""

    def conv_group(b):
        w = b.tensor("0.weight", b.rng.normal(0, 1, (4, 1, 3)))
        b.node("Conv", 0, [w], dilations=[1], group=2, kernel_shape=[3], pads=[1, 1], strides=[1])

    def same_upper(b):
        w = b.tensor("0.weight", b.rng.normal(0, 1, (3, 2, 3)))
        b.node("Conv", 0, [w], auto_pad="SAME_UPPER", kernel_shape=[3], strides=[2])

    def leaky(b):
        b.conv(0, 2, 3, (3,), pads=[1, 1], strides=[1], dilations=[1])
        b.node("LeakyRelu", 1, [], alpha=0.01)

    def ceil_mode(b):
        b.node("MaxPool", 0, [], ceil_mode=1, kernel_shape=[3], strides=[2])

    def count_include_pad(b):
        b.node("AveragePool", 0, [], count_include_pad=1, kernel_shape=[3], pads=[1, 1], strides=[1])

    def indices(b):
        b.nodes.append(helper.make_node("MaxPool", ["input"], ["/0/MaxPool_output_0", "indices"], name="/0/MaxPool",
                                        kernel_shape=[2], strides=[2]))
        b.current = "/0/MaxPool_output_0"

    def conv3d(b):
        b.conv(0, 1, 2, (2, 2, 2), pads=[0] * 6, strides=[1, 1, 1], dilations=[1, 1, 1])

    specs = [
        ("refused_conv_group", conv_group, [2, 8]),
        ("refused_conv_same_upper", same_upper, [2, 8]),
        ("refused_leaky_relu", leaky, [2, 8]),
        ("refused_maxpool_ceil_mode", ceil_mode, [2, 8]),
        ("refused_averagepool_count_include_pad", count_include_pad, [2, 8]),
        ("refused_maxpool_indices", indices, [2, 8]),
        ("refused_conv3d", conv3d, [1, 3, 3, 3]),
    ]
    out = []
    for k, (stem, make, input_dims) in enumerate(specs):
        b = Builder(np.random.default_rng(40 + k), np.float32)
        make(b)
        b.node("Flatten", 8, [], axis=1)
        probe = b.model(stem, input_dims, None).SerializeToString()
        width = run_ort(probe, np.zeros((1, *input_dims), np.float32)).shape[1]
        b.gemm(9, width, 2)
        out.append((stem, b.model(stem, input_dims, 2), input_dims))
    return out


def f32(a):
    """Values that are float32 numbers (as doubles), so a float32 export changes nothing."""
    return np.asarray(a, dtype=np.float32).astype(np.float64)


def nested(a):
    return f32(a).tolist()


def json_cnns():
    """Two CNNs in ballast's JSON layout (docs/model-format.md), for the export checks."""
    rng = np.random.default_rng(34)

    def conv(cin, cout, kernel, **geometry):
        fan_in = cin * int(np.prod(kernel))
        return {"kind": "conv", "kernel": nested(rng.normal(0, (2 / fan_in) ** 0.5, (cout, cin, *kernel))),
                "bias": nested(rng.normal(0, 0.2, cout)), **geometry}

    def batchnorm(c):
        return {"kind": "batchnorm", "scale": nested(rng.uniform(0.5, 1.5, c)),
                "shift": nested(rng.normal(0, 0.2, c)), "mean": nested(rng.normal(0, 0.3, c)),
                "variance": nested(rng.uniform(0.3, 1.5, c)), "epsilon": float(np.float32(1e-3))}

    def dense(d, k):
        return {"kind": "dense", "weights": nested(rng.normal(0, (2 / d) ** 0.5, (k, d))),
                "bias": nested(rng.normal(0, 0.1, k))}

    one = {
        "format": "ballast.model/1", "name": "cnn1d-export",
        "input": {"dim": 32, "shape": [2, 16], "names": [f"ch{c}_bin{i}" for c in range(2) for i in range(16)],
                  "lower": 0.0, "upper": 4.0},
        "classes": ["normal", "misalignment", "bearing-wear"],
        "layers": [
            {"kind": "normalize", "mean": nested(rng.uniform(0.5, 1.5, 32)), "std": nested(rng.uniform(0.5, 2.0, 32))},
            conv(2, 4, (3,), stride=[1], padding=[2, 2], dilation=[2]),             # length 16
            batchnorm(4),
            {"kind": "relu"},
            {"kind": "maxpool", "kernel": [2], "stride": [2], "padding": [1, 0]},  # 8
            conv(4, 3, (3,), stride=[2], padding=[0, 1], dilation=[1]),            # 4
            {"kind": "relu"},
            {"kind": "averagepool", "kernel": [3], "stride": [1], "padding": [1, 1]},  # 4
            {"kind": "flatten"},
            dense(12, 8),
            {"kind": "relu"},
            dense(8, 3),
        ],
    }
    two = {
        "format": "ballast.model/1", "name": "cnn2d-export",
        "input": {"dim": 42, "shape": [1, 7, 6], "lower": -1.0, "upper": 1.0},
        "layers": [
            conv(1, 3, (3, 3), stride=[1, 2], padding=[1, 1, 1, 1], dilation=[2, 1]),  # [3, 5, 3]
            batchnorm(3),
            {"kind": "relu"},
            {"kind": "maxpool", "kernel": [2, 2], "stride": [2, 1], "padding": [0, 1, 1, 0]},  # [3, 3, 3]
            conv(3, 2, (1, 1), stride=[1, 1], padding=[0, 0, 0, 0], dilation=[1, 1]),
            {"kind": "relu"},
            {"kind": "averagepool", "kernel": [2, 2], "stride": [1, 1], "padding": [1, 0, 0, 1]},  # [2, 3, 3]
            {"kind": "flatten"},
            dense(18, 2),
        ],
    }
    return [("cnn1d_export", one), ("cnn2d_export", two)]


def inputs(rng, shape, np_type, low=-1.0, high=2.0):
    return rng.uniform(low, high, (N_ROWS, *shape)).astype(np_type)


def main():
    if not os.path.isdir(os.path.join("tests", "reference")):
        sys.exit("run from the project root")
    if not os.path.exists(BALLAST):
        sys.exit(f"{BALLAST} missing: run `cargo build --release` first")
    os.makedirs(DATA_DIR, exist_ok=True)
    out = {"versions": VERSIONS, "script": "tests/reference/cnn_onnx_fixtures.py", "fixtures": {}, "refused": {}}
    rng = np.random.default_rng(35)
    for make in [cnn1d, cnn2d, cnn1d_global]:
        for np_type, suffix in [(np.float32, "f32"), (np.float64, "f64")]:
            model, shape = make(np_type)
            stem = f"{model.graph.name}_{suffix}"
            path = os.path.join(DATA_DIR, f"{stem}.onnx")
            onnx.checker.check_model(model, full_check=True)
            onnx.save(model, path)
            X = inputs(rng, shape, np_type)
            out["fixtures"][stem] = {
                "file": path, "inputs": rows(X), **evaluate(model, X, stem),
                "source": "onnx.helper graph in the PyTorch nn.Sequential export layout (seeded numpy weights)"}
    for stem, model in json_cnns():
        model_path = os.path.join(MODEL_DIR, f"{stem}.model.json")
        with open(model_path, "w") as f:
            json.dump(model, f, indent=1)
            f.write("\n")
        shape = model["input"]["shape"]
        low, high = model["input"]["lower"], model["input"]["upper"]
        for flags, np_type, suffix in [([], np.float32, ""), (["--float64"], np.float64, "_f64")]:
            path = os.path.join(DATA_DIR, f"exported_{stem}{suffix}.onnx")
            subprocess.run([BALLAST, "export", "--model", model_path, "--onnx", path] + flags, check=True)
            exported = onnx.load(path)
            onnx.checker.check_model(exported, full_check=True)
            X = inputs(rng, shape, np_type, low, high)
            out["fixtures"][f"exported_{stem}{suffix}"] = {
                "file": path, "model": model_path, "flags": flags, "inputs": rows(X),
                **evaluate(exported, X, path), "source": f"ballast export of {model_path}"}
    for stem, model, shape in refused():
        path = os.path.join(DATA_DIR, f"{stem}.onnx")
        onnx.checker.check_model(model, full_check=True)
        onnx.save(model, path)
        X = inputs(rng, shape, np.float32)[:2]
        out["refused"][stem] = {"file": path, "onnxruntime_output_shape": list(run_ort(model.SerializeToString(), X).shape)}
    with open(OUT_FILE, "w") as f:
        json.dump(out, f)
        f.write("\n")
    for k, v in out["fixtures"].items():
        print(k, "onnxruntime" if v["onnxruntime"] else "reference only", len(v["inputs"]), "rows")
    for k, v in out["refused"].items():
        print(k, "runs in onnxruntime:", v["onnxruntime_output_shape"])


if __name__ == "__main__":
    main()
