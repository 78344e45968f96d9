//! ONNX import and export checked against onnxruntime.
//!
//! The fixtures under tests/data/onnx/ and the reference outputs in
//! tests/reference/out/onnx_reference.json come from tests/reference/onnx_fixtures.py: scikit-learn
//! models converted by skl2onnx, graphs hand-built with onnx.helper, and files written by
//! `ballast export`, all run by onnxruntime (versions recorded in the JSON). Every check compares
//! ballast's own forward pass of the imported model with onnxruntime's outputs on the same inputs.

use std::path::Path;
use std::process::Command;

use ballast::model::onnx::{
    export_model, import_model, load_onnx, ExportOptions, FloatPrecision, ImportOptions, OnnxError,
};
use ballast::model::{predicted_class, Layer, Model};
use serde_json::Value;

const REFERENCE: &str = "tests/reference/out/onnx_reference.json";
const TOLERANCE: f64 = 1e-5;

fn binary() -> &'static str {
    env!("CARGO_BIN_EXE_ballast")
}

fn reference() -> Value {
    let text = std::fs::read_to_string(REFERENCE).expect("reference outputs are committed");
    serde_json::from_str(&text).expect("valid JSON")
}

fn fixture(name: &str) -> Value {
    reference()["fixtures"][name].clone()
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

fn import(file: &str, options: &ImportOptions) -> Model {
    load_onnx(Path::new(file), u64::MAX, options).unwrap_or_else(|e| panic!("{file}: {e}"))
}

fn softmax(z: &[f64]) -> Vec<f64> {
    let m = z.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let e: Vec<f64> = z.iter().map(|v| (v - m).exp()).collect();
    let s: f64 = e.iter().sum();
    e.iter().map(|v| v / s).collect()
}

fn sigmoid(z: f64) -> f64 {
    1.0 / (1.0 + (-z).exp())
}

fn assert_close(what: &str, ours: &[f64], theirs: &[f64], tolerance: f64) {
    assert_eq!(ours.len(), theirs.len(), "{what}: length");
    for (k, (a, b)) in ours.iter().zip(theirs).enumerate() {
        assert!(
            (a - b).abs() <= tolerance,
            "{what}[{k}]: ballast {a}, onnxruntime {b}"
        );
        LARGEST.with(|l| l.set(l.get().max((a - b).abs())));
    }
}

thread_local! {
    static LARGEST: std::cell::Cell<f64> = const { std::cell::Cell::new(0.0) };
}

/// Prints and resets the largest difference `assert_close` saw on this thread (visible with
/// `--nocapture`; docs/benchmarks/onnx.md quotes these numbers).
fn report_largest(what: &str) {
    let largest = LARGEST.with(|l| l.replace(0.0));
    println!("{what}: largest |ballast - onnxruntime| = {largest:e}");
}

/// Logits of the imported model for each reference input.
fn logits(model: &Model, inputs: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let network = model.network();
    inputs
        .iter()
        .map(|x| network.forward(x).iter().copied().collect())
        .collect()
}

/// The class ballast predicts, by name.
fn predicted_name(model: &Model, x: &[f64]) -> String {
    let z = model.classifier().forward(x);
    model.class_name(predicted_class(z.as_slice()))
}

fn label_text(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        other => other.to_string(),
    }
}

// Source: scikit-learn MLPClassifier on load_digits, converted by skl2onnx (ZipMap on the
// probabilities), run by onnxruntime.
#[test]
fn sklearn_mlp_matches_onnxruntime_probabilities_and_labels() {
    let f = fixture("sklearn_digits_mlp");
    let model = import(f["file"].as_str().unwrap(), &ImportOptions::default());
    let expected: Vec<String> = (0..10).map(|c| c.to_string()).collect();
    assert_eq!(
        model.classes.as_ref(),
        Some(&expected),
        "labels from the ZipMap"
    );
    assert!(matches!(model.layers[1], Layer::Relu));
    let inputs = matrix(&f["inputs"]);
    let probabilities = matrix(&f["ort"]["output_probability"]);
    let labels = f["ort"]["output_label"].as_array().unwrap();
    for (i, z) in logits(&model, &inputs).iter().enumerate() {
        assert_close(
            &format!("row {i} probabilities"),
            &softmax(z),
            &probabilities[i],
            TOLERANCE,
        );
        assert_eq!(
            predicted_name(&model, &inputs[i]),
            label_text(&labels[i]),
            "row {i} label"
        );
    }
    report_largest("sklearn_digits_mlp (probabilities)");
}

// Source: the same scikit-learn recipe as tests/reference/digits_fixtures.py, so the weights skl2onnx
// stored (as float32) must be the JSON fixture's weights rounded to float32, in the same orientation.
#[test]
fn sklearn_mlp_weights_equal_the_json_fixture_of_the_same_recipe() {
    let onnx = import(
        "tests/data/onnx/sklearn_digits_mlp.onnx",
        &ImportOptions::default(),
    );
    let json = Model::load(Path::new("tests/data/digits_mlp.model.json")).unwrap();
    assert_eq!(onnx.layers.len(), json.layers.len());
    for (a, b) in onnx.layers.iter().zip(&json.layers) {
        if let (
            Layer::Dense {
                weights: wa,
                bias: ba,
            },
            Layer::Dense {
                weights: wb,
                bias: bb,
            },
        ) = (a, b)
        {
            assert_eq!(wa.shape(), wb.shape());
            for (x, y) in wa.iter().chain(ba.iter()).zip(wb.iter().chain(bb.iter())) {
                assert!((x - y).abs() <= 1e-6 * (1.0 + y.abs()), "{x} vs {y}");
            }
        }
    }
}

// Source: scikit-learn LogisticRegression (10 classes) on load_digits, skl2onnx LinearClassifier with
// post_transform SOFTMAX and an L1 Normalizer, run by onnxruntime.
#[test]
fn sklearn_multiclass_logistic_regression_matches_onnxruntime() {
    let f = fixture("sklearn_digits_logreg");
    let model = import(f["file"].as_str().unwrap(), &ImportOptions::default());
    assert_eq!(model.output_dim(), 10);
    let dropped = model.provenance.as_ref().unwrap()["dropped_final_steps"].to_string();
    assert!(
        dropped.contains("SOFTMAX") && dropped.contains("Normalizer"),
        "{dropped}"
    );
    let inputs = matrix(&f["inputs"]);
    let probabilities = matrix(&f["ort"]["probabilities"]);
    let labels = f["ort"]["label"].as_array().unwrap();
    for (i, z) in logits(&model, &inputs).iter().enumerate() {
        assert_close(
            &format!("row {i}"),
            &softmax(z),
            &probabilities[i],
            TOLERANCE,
        );
        assert_eq!(
            predicted_name(&model, &inputs[i]),
            label_text(&labels[i]),
            "row {i} label"
        );
    }
    report_largest("sklearn_digits_logreg (probabilities)");
}

// Source: scikit-learn Pipeline(StandardScaler, LogisticRegression) on load_breast_cancer (binary,
// string labels), skl2onnx Scaler + LinearClassifier(post_transform LOGISTIC), run by onnxruntime.
#[test]
fn sklearn_binary_pipeline_with_string_labels_matches_onnxruntime() {
    let f = fixture("sklearn_breast_cancer_logreg");
    let model = import(f["file"].as_str().unwrap(), &ImportOptions::default());
    assert_eq!(
        model.classes,
        Some(vec!["benign".to_string(), "malignant".to_string()])
    );
    assert!(
        matches!(model.layers[0], Layer::Normalize { .. }),
        "the Scaler stays a normalize layer"
    );
    let inputs = matrix(&f["inputs"]);
    let probabilities = matrix(&f["ort"]["probabilities"]);
    let labels = f["ort"]["label"].as_array().unwrap();
    let sklearn = f["sklearn_predicted"].as_array().unwrap();
    for (i, z) in logits(&model, &inputs).iter().enumerate() {
        let ours: Vec<f64> = z.iter().map(|v| sigmoid(*v)).collect();
        assert_close(&format!("row {i}"), &ours, &probabilities[i], TOLERANCE);
        let name = predicted_name(&model, &inputs[i]);
        assert_eq!(name, label_text(&labels[i]), "row {i} label (onnxruntime)");
        assert_eq!(
            name,
            label_text(&sklearn[i]),
            "row {i} label (scikit-learn)"
        );
    }
    report_largest("sklearn_breast_cancer_logreg (probabilities)");
}

// Source: scikit-learn Pipeline(StandardScaler, MLPClassifier) on load_breast_cancer (binary), which
// skl2onnx writes as Sigmoid(z), 1 − p and Concat([1 − p, p]); run by onnxruntime.
#[test]
fn sklearn_binary_mlp_with_sigmoid_output_becomes_a_one_logit_model() {
    let f = fixture("sklearn_breast_cancer_mlp");
    let model = import(f["file"].as_str().unwrap(), &ImportOptions::default());
    assert_eq!(model.output_dim(), 1);
    assert_eq!(
        model.classes,
        Some(vec!["benign".to_string(), "malignant".to_string()]),
        "labels from the ArgMax / ArrayFeatureExtractor branch"
    );
    let dropped = model.provenance.as_ref().unwrap()["dropped_final_steps"].to_string();
    assert!(
        dropped.contains("Sigmoid") && dropped.contains("Concat"),
        "{dropped}"
    );
    let inputs = matrix(&f["inputs"]);
    let probabilities = matrix(&f["ort"]["probabilities"]);
    let labels = f["ort"]["label"].as_array().unwrap();
    let mut positives = 0;
    for (i, z) in logits(&model, &inputs).iter().enumerate() {
        let p = sigmoid(z[0]);
        assert_close(
            &format!("row {i}"),
            &[1.0 - p, p],
            &probabilities[i],
            TOLERANCE,
        );
        assert_eq!(
            predicted_name(&model, &inputs[i]),
            label_text(&labels[i]),
            "row {i} label"
        );
        positives += usize::from(z[0] > 0.0);
    }
    assert!(
        positives > 0 && positives < inputs.len(),
        "both classes occur"
    );
    report_largest("sklearn_breast_cancer_mlp (probabilities)");
}

// Source: hand-built graph (onnx.helper): Flatten, Sub/Div, Gemm(transB=1, alpha=0.8, beta=1.5),
// BatchNormalization, Relu, Identity, Constant, MatMul+Add, Cast, Reshape, Gemm, Softmax; run by
// onnxruntime in float32 and float64.
#[test]
fn hand_built_graph_matches_onnxruntime_logits_and_probabilities() {
    for (name, tolerance) in [("hand_mlp_f32", TOLERANCE), ("hand_mlp_f64", 1e-10)] {
        let f = fixture(name);
        let file = f["file"].as_str().unwrap();
        let inputs = matrix(&f["inputs"]);
        let options = ImportOptions {
            score_output: Some("logits".into()),
            ..ImportOptions::default()
        };
        let model = import(file, &options);
        assert_eq!(model.input.dim, 6, "{name}: [N, 2, 3] flattened");
        assert!(
            matches!(model.layers[0], Layer::Normalize { .. }),
            "{name}: Sub/Div stay a normalize layer"
        );
        let relus = model
            .layers
            .iter()
            .filter(|l| matches!(l, Layer::Relu))
            .count();
        assert_eq!(relus, 2, "{name}");
        let ort_logits = matrix(&f["ort"]["logits"]);
        for (i, z) in logits(&model, &inputs).iter().enumerate() {
            assert_close(
                &format!("{name} row {i} logits"),
                z,
                &ort_logits[i],
                tolerance,
            );
        }
        report_largest(&format!("{name} (logits)"));
        let options = ImportOptions {
            score_output: Some("probs".into()),
            ..ImportOptions::default()
        };
        let model = import(file, &options);
        let dropped = model.provenance.as_ref().unwrap()["dropped_final_steps"].to_string();
        assert!(dropped.contains("Softmax 'softmax'"), "{dropped}");
        let ort_probs = matrix(&f["ort"]["probs"]);
        for (i, z) in logits(&model, &inputs).iter().enumerate() {
            assert_close(
                &format!("{name} row {i} probs"),
                &softmax(z),
                &ort_probs[i],
                tolerance,
            );
            let ours = predicted_class(z);
            let theirs = predicted_class(&ort_probs[i]);
            assert_eq!(ours, theirs, "{name} row {i} argmax");
        }
        report_largest(&format!("{name} (probabilities)"));
        let e = load_onnx(Path::new(file), u64::MAX, &ImportOptions::default()).unwrap_err();
        let message = e.to_string();
        assert!(
            message.contains("logits") && message.contains("probs") && message.contains("--output"),
            "{message}"
        );
    }
}

// Source: hand-built ai.onnx.ml LinearClassifier with one coefficient row and labels [3, 7], run by
// onnxruntime. onnxruntime reports the two scores as [1 - s, s] (NONE) or [1 - σ(s), σ(s)]
// (LOGISTIC) and the label 7 exactly when s > 0: ballast's 1-logit binary rule.
#[test]
fn one_row_binary_linear_classifier_becomes_a_one_logit_model() {
    for (name, logistic) in [
        ("binary_linear_none", false),
        ("binary_linear_logistic", true),
    ] {
        let f = fixture(name);
        let model = import(f["file"].as_str().unwrap(), &ImportOptions::default());
        assert_eq!(model.output_dim(), 1, "{name}");
        assert_eq!(model.classes, Some(vec!["3".to_string(), "7".to_string()]));
        let inputs = matrix(&f["inputs"]);
        let scores = matrix(&f["ort"]["scores"]);
        let labels = f["ort"]["label"].as_array().unwrap();
        let mut positives = 0;
        for (i, z) in logits(&model, &inputs).iter().enumerate() {
            let s = if logistic { sigmoid(z[0]) } else { z[0] };
            assert_close(
                &format!("{name} row {i}"),
                &[1.0 - s, s],
                &scores[i],
                TOLERANCE,
            );
            assert_eq!(
                predicted_name(&model, &inputs[i]),
                label_text(&labels[i]),
                "{name} row {i}"
            );
            positives += usize::from(z[0] > 0.0);
        }
        report_largest(&format!("{name} (scores)"));
        assert!(
            positives > 0 && positives < inputs.len(),
            "{name}: both classes occur"
        );
    }
}

// Source: files written by `ballast export` (float32 and --float64), run by onnxruntime.
#[test]
fn exported_files_match_onnxruntime_and_are_reproduced_byte_for_byte() {
    for (name, precision, tolerance) in [
        ("exported_digits_mlp", FloatPrecision::Float32, TOLERANCE),
        (
            "exported_digits_mlp_deep_f64",
            FloatPrecision::Float64,
            1e-10,
        ),
    ] {
        let f = fixture(name);
        let source = Model::load(Path::new(f["model"].as_str().unwrap())).unwrap();
        let inputs = matrix(&f["inputs"]);
        let ort_logits = matrix(&f["ort"]["logits"]);
        for (i, z) in logits(&source, &inputs).iter().enumerate() {
            assert_close(&format!("{name} row {i}"), z, &ort_logits[i], tolerance);
            assert_eq!(
                predicted_class(z),
                predicted_class(&ort_logits[i]),
                "{name} row {i} argmax"
            );
        }
        report_largest(&format!("{name} (logits)"));
        let bytes = export_model(&source, &ExportOptions { precision }).unwrap();
        let committed = std::fs::read(f["file"].as_str().unwrap()).unwrap();
        assert!(
            bytes == committed,
            "{name}: export output changed; rerun tests/reference/onnx_fixtures.py so onnxruntime checks it"
        );
        // Import gives the same model back (metadata carries classes, names and range).
        let back = import_model(&bytes, &ImportOptions::default()).unwrap();
        assert_eq!(back.classes, source.classes);
        assert_eq!(back.input.names, source.input.names);
        assert_eq!(back.input.lower, source.input.lower);
        assert_eq!(back.input.upper, source.input.upper);
        for (i, z) in logits(&back, &inputs).iter().enumerate() {
            assert_close(
                &format!("{name} re-imported row {i}"),
                z,
                &ort_logits[i],
                tolerance,
            );
        }
        report_largest(&format!("{name} re-imported (logits)"));
    }
}

// Source: tests/reference/out/digits_forward.json (scikit-learn test accuracy of the same recipe).
#[test]
fn onnx_models_load_wherever_a_model_path_is_accepted() {
    let model = ballast::cli::common::load_model(
        Path::new("tests/data/onnx/sklearn_digits_mlp.onnx"),
        false,
    )
    .unwrap();
    assert!(
        model.input.lower.iter().all(|v| v.is_infinite()),
        "no range info: unbounded"
    );
    let data = ballast::data::load_csv(
        Path::new("tests/data/digits_test.csv"),
        &model,
        &ballast::data::DataOptions::default(),
    )
    .unwrap();
    let network = model.classifier();
    let logits = network.forward_batch(&data.features);
    let correct = (0..data.len())
        .filter(|&i| predicted_class(logits.column(i).as_slice()) == data.labels[i])
        .count();
    let accuracy = correct as f64 / data.len() as f64;
    let text = std::fs::read_to_string("tests/reference/out/digits_forward.json").unwrap();
    let forward: Value = serde_json::from_str(&text).unwrap();
    let sklearn = forward["models"]["digits_mlp"]["test_accuracy"]
        .as_f64()
        .unwrap();
    assert!(
        (accuracy - sklearn).abs() <= 1.0 / 540.0 + 1e-12,
        "{accuracy} vs {sklearn}"
    );
}

#[test]
fn unsupported_nodes_exit_2_naming_the_node() {
    // Refused convolution graphs are checked in tests/onnx_cnn.rs.
    let dir = tempfile::tempdir().unwrap();
    let file = "tests/data/onnx/unsupported_sigmoid.onnx";
    let out = dir.path().join("model.json");
    let run = Command::new(binary())
        .args(["import", "--onnx", file, "--out"])
        .arg(&out)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&run.stderr);
    assert_eq!(run.status.code(), Some(2), "{file}: {stderr}");
    assert!(
        stderr.contains("node 'hidden_sigmoid' (Sigmoid)"),
        "{file}: {stderr}"
    );
    assert!(!out.exists(), "nothing written on error");
    let e = load_onnx(Path::new(file), u64::MAX, &ImportOptions::default()).unwrap_err();
    assert!(
        matches!(e, OnnxError::InFile { ref inner, .. } if matches!(**inner, OnnxError::Unsupported { .. })),
        "{e}"
    );
}

#[test]
fn import_command_writes_a_model_with_range_classes_and_name() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("mlp.json");
    let run = Command::new(binary())
        .args([
            "import",
            "--onnx",
            "tests/data/onnx/sklearn_breast_cancer_logreg.onnx",
            "--input-range",
            "-1,5000",
            "--classes",
            "b,m",
            "--name",
            "cancer-screen",
            "--out",
        ])
        .arg(&out)
        .output()
        .unwrap();
    assert_eq!(
        run.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let model = Model::load(&out).unwrap();
    assert_eq!(model.name.as_deref(), Some("cancer-screen"));
    assert_eq!(model.classes, Some(vec!["b".to_string(), "m".to_string()]));
    assert!(model.input.lower.iter().all(|v| (*v + 1.0).abs() < 1e-12));
    assert!(model.input.upper.iter().all(|v| (*v - 5000.0).abs() < 1e-9));

    let range = dir.path().join("range.json");
    std::fs::write(&range, r#"{"lower": 0, "upper": [1, 2, 3, 4]}"#).unwrap();
    let out = dir.path().join("binary.json");
    let run = Command::new(binary())
        .args([
            "import",
            "--onnx",
            "tests/data/onnx/binary_linear_none.onnx",
            "--input-range-file",
        ])
        .arg(&range)
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    assert_eq!(
        run.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let model = Model::load(&out).unwrap();
    assert_eq!(model.input.upper, vec![1.0, 2.0, 3.0, 4.0]);

    std::fs::write(&range, r#"{"lower": 0, "upper": [1, 2]}"#).unwrap();
    let run = Command::new(binary())
        .args([
            "import",
            "--onnx",
            "tests/data/onnx/binary_linear_none.onnx",
            "--input-range-file",
        ])
        .arg(&range)
        .arg("--out")
        .arg(dir.path().join("bad.json"))
        .output()
        .unwrap();
    assert_eq!(run.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&run.stderr).contains("2 values, the model has 4 features"));
}

#[test]
fn export_command_round_trips_through_import() {
    let dir = tempfile::tempdir().unwrap();
    let onnx = dir.path().join("m.onnx");
    let run = Command::new(binary())
        .args([
            "export",
            "--model",
            "tests/data/digits_mlp.model.json",
            "--onnx",
        ])
        .arg(&onnx)
        .output()
        .unwrap();
    assert_eq!(
        run.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let committed = std::fs::read("tests/data/onnx/exported_digits_mlp.onnx").unwrap();
    assert!(
        std::fs::read(&onnx).unwrap() == committed,
        "CLI and library export agree"
    );
    let back = ballast::cli::common::load_model(&onnx, false).unwrap();
    let source = Model::load(Path::new("tests/data/digits_mlp.model.json")).unwrap();
    assert_eq!(
        back.input.upper, source.input.upper,
        "range carried in metadata"
    );
}

#[test]
fn damaged_files_give_errors_not_panics() {
    let bytes = std::fs::read("tests/data/onnx/sklearn_digits_mlp.onnx").unwrap();
    for cut in [1, 7, 100, bytes.len() / 2, bytes.len() - 1] {
        assert!(
            import_model(&bytes[..cut], &ImportOptions::default()).is_err(),
            "cut at {cut}"
        );
    }
    let mut flipped = bytes.clone();
    for i in (0..flipped.len()).step_by(97) {
        flipped[i] ^= 0x5a;
        let _ = import_model(&flipped, &ImportOptions::default()); // must not panic
    }
    // A length prefix claiming far more bytes than present: field 7 (graph), length 2^40.
    let claim = [0x3a, 0x80, 0x80, 0x80, 0x80, 0x80, 0x20];
    let e = import_model(&claim, &ImportOptions::default()).unwrap_err();
    assert!(matches!(e, OnnxError::Decode { .. }), "{e}");
    let e = load_onnx(
        Path::new("tests/data/onnx/sklearn_digits_mlp.onnx"),
        100,
        &ImportOptions::default(),
    )
    .unwrap_err();
    assert!(e.to_string().contains("--allow-large"), "{e}");
}
