//! Convolutional ONNX import and export checked against two outside references: onnxruntime 1.32.0 and
//! the reference evaluator of the onnx 1.23.2 package (`onnx.reference.ReferenceEvaluator`, plain numpy
//! 2.4.6), both run by tests/reference/cnn_onnx_fixtures.py under Python 3.11.7 (versions recorded in
//! tests/reference/out/cnn_onnx_reference.json).
//!
//! The graphs are built with onnx.helper in the layout of a PyTorch `nn.Sequential` export (Conv +
//! BatchNormalization + Relu + MaxPool + Flatten + Gemm, plus AveragePool, the global pools, a constant
//! Reshape and an input normalisation), 1-D and 2-D, with pads, strides and dilations, in float32 and
//! float64. onnxruntime's CPU provider has no float64 Conv, so float64 graphs are checked against the
//! reference evaluator only; on every float32 graph the script requires the two references to agree
//! to 1e-5 before writing them. The exported files are written by `ballast export` and checked the same
//! way. The refused graphs all pass onnx.checker and run in onnxruntime.

use std::path::Path;
use std::process::Command;

use ballast::engine::Arithmetic;
use ballast::model::onnx::{export_model, import_model, load_onnx, ExportOptions, FloatPrecision};
use ballast::model::pool::PoolOp;
use ballast::model::{deployed, predicted_class, Layer, Model};
use serde_json::Value;

const REFERENCE: &str = "tests/reference/out/cnn_onnx_reference.json";

fn binary() -> &'static str {
    env!("CARGO_BIN_EXE_ballast")
}

fn reference() -> Value {
    let text = std::fs::read_to_string(REFERENCE).expect("reference outputs are committed");
    serde_json::from_str(&text).expect("valid JSON")
}

fn matrix(value: &Value) -> Vec<Vec<f64>> {
    value
        .as_array()
        .expect("rows")
        .iter()
        .map(|r| {
            r.as_array()
                .expect("row")
                .iter()
                .map(|v| v.as_f64().expect("number"))
                .collect()
        })
        .collect()
}

fn kinds(model: &Model) -> Vec<&'static str> {
    model
        .layers
        .iter()
        .map(|l| match l {
            Layer::Normalize { .. } => "normalize",
            Layer::Dense { .. } => "dense",
            Layer::Relu => "relu",
            Layer::Conv(_) => "conv",
            Layer::BatchNorm { .. } => "batchnorm",
            Layer::Pool(p) if p.op == PoolOp::Max => "maxpool",
            Layer::Pool(_) => "averagepool",
            Layer::Flatten => "flatten",
        })
        .collect()
}

/// Compares `ours` with a reference's rows within `tolerance` relative to `1 + |reference|` (float32
/// graphs: rounding in the last few places of logits up to about 60); returns the largest absolute
/// difference.
fn compare(what: &str, ours: &[Vec<f64>], theirs: &Value, tolerance: f64) -> f64 {
    let theirs = matrix(theirs);
    assert_eq!(ours.len(), theirs.len(), "{what}: rows");
    let mut largest: f64 = 0.0;
    for (i, (a, b)) in ours.iter().zip(&theirs).enumerate() {
        assert_eq!(a.len(), b.len(), "{what} row {i}: outputs");
        for (k, (x, y)) in a.iter().zip(b).enumerate() {
            assert!(
                (x - y).abs() <= tolerance * (1.0 + y.abs()),
                "{what} row {i} output {k}: ballast {x}, reference {y}"
            );
            largest = largest.max((x - y).abs());
        }
        // Same decision, unless the reference itself is within the tolerance of a tie.
        let mut sorted = b.clone();
        sorted.sort_by(|p, q| q.total_cmp(p));
        if sorted.len() < 2 || sorted[0] - sorted[1] > 2.0 * tolerance * (1.0 + sorted[0].abs()) {
            assert_eq!(predicted_class(a), predicted_class(b), "{what} row {i}");
        }
    }
    largest
}

fn logits(model: &Model, inputs: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let network = model.network();
    inputs
        .iter()
        .map(|x| network.forward(x).iter().copied().collect())
        .collect()
}

// Sources: onnxruntime (float32 graphs) and the onnx reference evaluator (all graphs).
#[test]
fn pytorch_layout_cnn_graphs_match_onnxruntime_and_the_onnx_reference() {
    let reference = reference();
    let cases: [(&str, Vec<usize>, Vec<&str>); 3] = [
        (
            "cnn1d",
            vec![2, 24],
            vec![
                "conv",
                "batchnorm",
                "relu",
                "maxpool",
                "conv",
                "relu",
                "averagepool",
                "flatten",
                "dense",
            ],
        ),
        (
            "cnn2d",
            vec![2, 9, 8],
            vec![
                "normalize",
                "conv",
                "batchnorm",
                "relu",
                "maxpool",
                "conv",
                "relu",
                "averagepool",
                "maxpool",
                "flatten",
                "dense",
            ],
        ),
        (
            "cnn1d_global",
            vec![3, 10],
            vec!["conv", "relu", "averagepool", "flatten", "dense"],
        ),
    ];
    for (stem, shape, expected_kinds) in cases {
        for (suffix, arithmetic, tolerance) in [
            ("f32", Arithmetic::Float32, 1e-5),
            ("f64", Arithmetic::Float64, 1e-10),
        ] {
            let name = format!("{stem}_{suffix}");
            let f = &reference["fixtures"][&name];
            let file = f["file"].as_str().unwrap();
            let model = load_onnx(Path::new(file), u64::MAX, &Default::default())
                .unwrap_or_else(|e| panic!("{file}: {e}"));
            assert_eq!(kinds(&model), expected_kinds, "{name}");
            assert_eq!(model.input.shape.as_ref(), Some(&shape), "{name}");
            assert_eq!(model.input.dim, shape.iter().product::<usize>(), "{name}");
            assert_eq!(model.arithmetic, arithmetic, "{name}");
            let again = Model::from_json_str(&model.to_json_string()).expect("a valid layout");
            assert_eq!(
                again, model,
                "{name}: the JSON layout holds the imported model"
            );
            let inputs = matrix(&f["inputs"]);
            let ours = logits(&model, &inputs);
            let gap = compare(&name, &ours, &f["reference_evaluator"], tolerance);
            println!("{name}: largest |ballast - onnx reference evaluator| = {gap:e}");
            if arithmetic == Arithmetic::Float32 {
                let gap = compare(&name, &ours, &f["onnxruntime"], tolerance);
                println!("{name}: largest |ballast (f64) - onnxruntime| = {gap:e}");
                // The layers evaluated as written in float32, as a deployment computes them.
                let single: Vec<Vec<f64>> = inputs
                    .iter()
                    .map(|x| deployed::forward(&model, x))
                    .collect();
                let gap = compare(&name, &single, &f["onnxruntime"], tolerance);
                println!("{name}: largest |ballast (float32) - onnxruntime| = {gap:e}");
            } else {
                assert!(f["onnxruntime"].is_null(), "{name}");
            }
        }
    }
}

// Sources: onnxruntime (float32 exports) and the onnx reference evaluator (all exports) on the files
// `ballast export` wrote for two JSON CNNs whose numbers are all float32 values.
#[test]
fn exported_cnns_match_the_references_and_import_back_unchanged() {
    let reference = reference();
    for (name, precision, tolerance) in [
        ("exported_cnn1d_export", FloatPrecision::Float32, 1e-5),
        ("exported_cnn1d_export_f64", FloatPrecision::Float64, 1e-10),
        ("exported_cnn2d_export", FloatPrecision::Float32, 1e-5),
        ("exported_cnn2d_export_f64", FloatPrecision::Float64, 1e-10),
    ] {
        let f = &reference["fixtures"][name];
        let source = Model::load(Path::new(f["model"].as_str().unwrap())).unwrap();
        let bytes = export_model(&source, &ExportOptions { precision }).unwrap();
        let committed = std::fs::read(f["file"].as_str().unwrap()).unwrap();
        assert!(
            bytes == committed,
            "{name}: export output changed; rerun tests/reference/cnn_onnx_fixtures.py so the references check it"
        );
        let inputs = matrix(&f["inputs"]);
        let ours = logits(&source, &inputs);
        let gap = compare(name, &ours, &f["reference_evaluator"], tolerance);
        println!("{name}: largest |ballast - onnx reference evaluator| = {gap:e}");
        if precision == FloatPrecision::Float32 {
            let gap = compare(name, &ours, &f["onnxruntime"], tolerance);
            println!("{name}: largest |ballast - onnxruntime| = {gap:e}");
        }
        // import(export(m)) == m: every layer, the input (shape, names, range) and the classes.
        let back = import_model(&bytes, &Default::default()).unwrap();
        assert_eq!(back.layers, source.layers, "{name}");
        assert_eq!(back.input, source.input, "{name}");
        assert_eq!(back.classes, source.classes, "{name}");
        assert_eq!(back.name, source.name, "{name}");
        let arithmetic = match precision {
            FloatPrecision::Float32 => Arithmetic::Float32,
            FloatPrecision::Float64 => Arithmetic::Float64,
        };
        assert_eq!(back.arithmetic, arithmetic, "{name}");
    }
}

// Source: the onnxruntime logits of the float32 export of tests/data/cnn1d_export.model.json.
#[test]
fn commands_take_an_exported_cnn_and_give_it_back() {
    let reference = reference();
    let f = &reference["fixtures"]["exported_cnn1d_export"];
    let dir = tempfile::tempdir().unwrap();
    let onnx = dir.path().join("cnn.onnx");
    let run = |args: &[&str]| {
        let out = Command::new(binary()).args(args).output().unwrap();
        (
            out.status.code(),
            String::from_utf8_lossy(&out.stdout).into_owned(),
            String::from_utf8_lossy(&out.stderr).into_owned(),
        )
    };
    let onnx_path = onnx.to_str().unwrap();
    let (code, _, stderr) = run(&[
        "export",
        "--model",
        "tests/data/cnn1d_export.model.json",
        "--onnx",
        onnx_path,
    ]);
    assert_eq!(code, Some(0), "{stderr}");
    let back_path = dir.path().join("back.json");
    let (code, _, stderr) = run(&[
        "import",
        "--onnx",
        onnx_path,
        "--out",
        back_path.to_str().unwrap(),
    ]);
    assert_eq!(code, Some(0), "{stderr}");
    let source = Model::load(Path::new("tests/data/cnn1d_export.model.json")).unwrap();
    let back = Model::load(&back_path).unwrap();
    assert_eq!(back.layers, source.layers);
    assert_eq!(back.input, source.input);

    // A labelled CSV of the reference inputs, labelled with onnxruntime's decisions.
    let names = source.input.names.clone().unwrap();
    let mut csv = format!("{},label\n", names.join(","));
    for (x, z) in matrix(&f["inputs"]).iter().zip(matrix(&f["onnxruntime"])) {
        let row: Vec<String> = x.iter().map(|v| v.to_string()).collect();
        csv.push_str(&format!(
            "{},{}\n",
            row.join(","),
            source.class_name(predicted_class(&z))
        ));
    }
    let data = dir.path().join("rows.csv");
    std::fs::write(&data, csv).unwrap();
    let data_path = data.to_str().unwrap();
    let (code, stdout, stderr) = run(&["evaluate", "--model", onnx_path, "--data", data_path]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(stdout.contains("clean accuracy: 1.0000"), "{stdout}");
    let (code, _, stderr) = run(&[
        "certify", "--model", onnx_path, "--data", data_path, "--eps", "0.001", "--budget", "0",
    ]);
    assert_eq!(code, Some(0), "certify on the ONNX CNN: {stderr}");
}

// The refused graphs are valid (onnx.checker passes, onnxruntime runs them: shapes recorded).
#[test]
fn refused_cnn_graphs_exit_2_with_one_line_naming_the_node() {
    let reference = reference();
    let dir = tempfile::tempdir().unwrap();
    for (stem, node, op, reason) in [
        ("refused_conv_group", "/0/Conv", "Conv", "group = 2"),
        (
            "refused_conv_same_upper",
            "/0/Conv",
            "Conv",
            "auto_pad SAME_UPPER is not supported",
        ),
        (
            "refused_leaky_relu",
            "/1/LeakyRelu",
            "LeakyRelu",
            "not supported on the score path",
        ),
        (
            "refused_maxpool_ceil_mode",
            "/0/MaxPool",
            "MaxPool",
            "ceil_mode = 1",
        ),
        (
            "refused_averagepool_count_include_pad",
            "/0/AveragePool",
            "AveragePool",
            "count_include_pad = 1 with padding",
        ),
        (
            "refused_maxpool_indices",
            "/0/MaxPool",
            "MaxPool",
            "Indices output",
        ),
        (
            "refused_conv3d",
            "/0/Conv",
            "Conv",
            "expected [batch, channels, length]",
        ),
    ] {
        let f = &reference["refused"][stem];
        assert_eq!(
            f["onnxruntime_output_shape"],
            serde_json::json!([2, 2]),
            "{stem}"
        );
        let file = f["file"].as_str().unwrap();
        let out = dir.path().join(format!("{stem}.json"));
        for args in [
            vec!["import", "--onnx", file, "--out", out.to_str().unwrap()],
            vec!["inspect", file],
        ] {
            let run = Command::new(binary()).args(&args).output().unwrap();
            let stderr = String::from_utf8_lossy(&run.stderr);
            assert_eq!(run.status.code(), Some(2), "{stem} {}: {stderr}", args[0]);
            let lines: Vec<&str> = stderr.trim_end().lines().collect();
            assert_eq!(lines.len(), 1, "{stem}: one line, got {stderr}");
            let expected = format!("error: {file}: node '{node}' ({op}): ");
            assert!(lines[0].starts_with(&expected), "{stem}: {stderr}");
            assert!(
                lines[0].contains(reason),
                "{stem}: expected '{reason}' in {stderr}"
            );
        }
        assert!(!out.exists(), "{stem}: nothing written on error");
    }
}
