//! Model layout and data loading: valid files load, malformed ones give a clear error naming the
//! field, the forward pass matches an outside reference (scikit-learn), and save → load round-trips.

use std::path::Path;
use std::process::Command;

use approx::assert_relative_eq;
use ballast::data::{load_csv, parse_csv, DataOptions};
use ballast::model::{predicted_class, Model};

const DIGITS_MODEL: &str = "tests/data/digits_mlp.model.json";
const DIGITS_DEEP_MODEL: &str = "tests/data/digits_mlp_deep.model.json";
const DIGITS_TEST: &str = "tests/data/digits_test.csv";

fn binary() -> &'static str {
    env!("CARGO_BIN_EXE_ballast")
}

fn small_model_json() -> serde_json::Value {
    serde_json::json!({
        "format": "ballast.model/1",
        "name": "small",
        "input": { "dim": 3, "names": ["a", "b", "c"], "units": ["mm/s", "1", "°C"], "lower": 0.0, "upper": [1.0, 1.0, 5.0] },
        "classes": ["normal", "worn"],
        "layers": [
            { "kind": "normalize", "mean": [0.5, 0.5, 2.0], "std": [0.2, 0.2, 1.0] },
            { "kind": "dense", "weights": [[0.1, -0.2, 0.3], [0.0, 0.4, -0.1]], "bias": [0.0, 0.1] },
            { "kind": "relu" },
            { "kind": "dense", "weights": [[1.0, -1.0], [-1.0, 1.0]], "bias": [0.0, 0.0] }
        ],
        "provenance": { "anything": [1, 2, 3] }
    })
}

fn load_value(value: &serde_json::Value) -> Result<Model, String> {
    Model::from_json_str(&value.to_string()).map_err(|e| e.to_string())
}

#[test]
fn the_layout_example_loads_and_folds() {
    let model = load_value(&small_model_json()).expect("valid model");
    assert_eq!(model.input.dim, 3);
    assert_eq!(model.class_count(), 2);
    assert_eq!(model.parameter_count(), 6 + 2 + 4 + 2);
    let network = model.network();
    assert_eq!(
        network.layers.len(),
        2,
        "normalize folds into the first dense map"
    );
    // Hand computation from the layout's definition: normalize, dense, relu, dense.
    let x = [0.7, 0.1, 3.0];
    let z: [f64; 3] = [(0.7 - 0.5) / 0.2, (0.1 - 0.5) / 0.2, (3.0 - 2.0) / 1.0];
    let h0 = (0.1 * z[0] - 0.2 * z[1] + 0.3 * z[2]).max(0.0);
    let h1 = (0.0 * z[0] + 0.4 * z[1] - 0.1 * z[2] + 0.1).max(0.0);
    let logits = network.forward(&x);
    assert_relative_eq!(logits[0], h0 - h1, epsilon = 1e-12);
    assert_relative_eq!(logits[1], -h0 + h1, epsilon = 1e-12);
}

#[test]
fn save_then_load_round_trips() {
    let model = load_value(&small_model_json()).unwrap();
    let again = Model::from_json_str(&model.to_json_string()).unwrap();
    assert_eq!(model, again);
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("m.json");
    model.save(&path).unwrap();
    assert_eq!(Model::load(&path).unwrap(), model);
}

#[test]
fn split_normalization_keeps_the_function() {
    let model = load_value(&small_model_json()).unwrap();
    let (normalization, network) = model.split_normalization();
    let normalization = normalization.expect("leading normalize layer");
    let rebuilt = model.with_network(Some(&normalization), &network);
    let x = [0.3, 0.9, 4.0];
    let a = model.network().forward(&x);
    let b = rebuilt.network().forward(&x);
    for i in 0..2 {
        assert_relative_eq!(a[i], b[i], epsilon = 1e-12);
    }
}

#[test]
fn binary_model_decides_on_the_sign_of_its_logit() {
    let value = serde_json::json!({
        "format": "ballast.model/1",
        "input": { "dim": 2 },
        "layers": [ { "kind": "dense", "weights": [[1.0, -2.0]], "bias": [0.5] } ]
    });
    let model = load_value(&value).unwrap();
    assert_eq!(model.class_count(), 2);
    let network = model.classifier();
    assert_eq!(network.output_dim(), 2);
    // logit = x0 − 2 x1 + 0.5
    assert_eq!(predicted_class(network.forward(&[1.0, 0.0]).as_slice()), 1);
    assert_eq!(predicted_class(network.forward(&[0.0, 1.0]).as_slice()), 0);
    assert_eq!(
        predicted_class(network.forward(&[0.0, 0.25]).as_slice()),
        0,
        "logit 0 is class 0"
    );
}

/// Each malformed case must fail with a message naming the place.
#[test]
fn malformed_models_name_the_field() {
    let base = small_model_json();
    let mut cases: Vec<(serde_json::Value, &str)> = Vec::new();
    let mut ragged = base.clone();
    ragged["layers"][1]["weights"][1] = serde_json::json!([0.0, 0.4]);
    cases.push((ragged, "layers[1].weights: row 1 has 2 values, expected 3"));
    let mut bias = base.clone();
    bias["layers"][1]["bias"] = serde_json::json!([0.0]);
    cases.push((bias, "layers[1].bias: has 1 values, expected 2"));
    let mut kind = base.clone();
    kind["layers"][2]["kind"] = serde_json::json!("sigmoid");
    cases.push((kind, "layers[2]"));
    let mut std = base.clone();
    std["layers"][0]["std"][1] = serde_json::json!(0.0);
    cases.push((std, "layers[0].std: entry 1 is 0"));
    let mut classes = base.clone();
    classes["classes"] = serde_json::json!(["a", "b", "c"]);
    cases.push((classes, "classes: has 3 names, expected 2"));
    let mut unknown = base.clone();
    unknown["input"]["dimm"] = serde_json::json!(3);
    cases.push((unknown, "dimm"));
    let mut names = base.clone();
    names["input"]["names"] = serde_json::json!(["a", "b"]);
    cases.push((names, "input.names: has 2 names, expected 3"));
    let mut units = base.clone();
    units["input"]["units"] = serde_json::json!(["A", "bar"]);
    cases.push((units, "input.units: has 2 units, expected 3"));
    let mut format = base.clone();
    format["format"] = serde_json::json!("other/1");
    cases.push((format, "format"));
    for (value, expected) in cases {
        let error = load_value(&value).expect_err(expected);
        assert!(
            error.contains(expected),
            "error {error:?} should contain {expected:?}"
        );
    }
}

#[test]
fn syntax_errors_give_line_and_column() {
    let text = "{\n  \"format\": \"ballast.model/1\",\n  \"input\": { \"dim\": 2 \n";
    let error = Model::from_json_str(text).unwrap_err().to_string();
    assert!(error.contains("line 4"), "{error}");
    let nan = "{\"format\":\"ballast.model/1\",\"input\":{\"dim\":1},\"layers\":[{\"kind\":\"dense\",\"weights\":[[NaN]],\"bias\":[0]}]}";
    let error = Model::from_json_str(nan).unwrap_err().to_string();
    assert!(error.contains("line 1"), "{error}");
}

/// The command line maps every malformed model to exit 2 with a one-line message, never a panic.
#[test]
fn malformed_model_files_exit_2_without_panic() {
    let dir = tempfile::tempdir().unwrap();
    let cases: Vec<(&str, String, &str)> = vec![
        ("empty.json", String::new(), "empty file"),
        (
            "truncated.json",
            small_model_json().to_string()[..80].to_string(),
            "line 1",
        ),
        ("array.json", "[1, 2, 3]".into(), "expected a JSON object"),
        (
            "nan.json",
            small_model_json().to_string().replace("0.1,", "NaN,"),
            "line 1",
        ),
        (
            "ragged.json",
            {
                let mut v = small_model_json();
                v["layers"][3]["weights"][0] = serde_json::json!([1.0]);
                v.to_string()
            },
            "layers[3].weights: row 0 has 1 values, expected 2",
        ),
    ];
    for (name, text, expected) in cases {
        let path = dir.path().join(name);
        std::fs::write(&path, text).unwrap();
        let out = Command::new(binary())
            .arg("inspect")
            .arg(&path)
            .output()
            .unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{name}: {stderr}");
        assert!(stderr.contains(expected), "{name}: {stderr}");
        assert!(
            stderr.contains(name),
            "{name}: message names the file: {stderr}"
        );
        assert!(!stderr.contains("panicked"), "{name}: {stderr}");
        assert_eq!(
            stderr.trim().lines().count(),
            1,
            "{name}: one line: {stderr}"
        );
    }
}

fn reference() -> serde_json::Value {
    let text = std::fs::read_to_string("tests/reference/out/digits_forward.json").unwrap();
    serde_json::from_str(&text).unwrap()
}

/// Outside reference: scikit-learn 1.9.1 `MLPClassifier` on the `load_digits` dataset, exported by the
/// recipe in docs/model-format.md; logits from numpy and predictions from `predict_proba(X).argmax(1)`
/// (tests/reference/digits_fixtures.py).
#[test]
fn forward_pass_matches_scikit_learn_on_digits() {
    let reference = reference();
    for (key, path) in [
        ("digits_mlp", DIGITS_MODEL),
        ("digits_mlp_deep", DIGITS_DEEP_MODEL),
    ] {
        let model = Model::load(Path::new(path)).unwrap();
        let data = load_csv(Path::new(DIGITS_TEST), &model, &DataOptions::default()).unwrap();
        let expected = &reference["models"][key];
        let predicted = expected["predicted"].as_array().unwrap();
        let logits = expected["logits"].as_array().unwrap();
        assert_eq!(data.len(), predicted.len());
        let network = model.network();
        let batch = network.forward_batch(&data.features);
        for i in 0..data.len() {
            let single = network.forward(data.sample(i));
            let row = logits[i].as_array().unwrap();
            for (c, value) in row.iter().enumerate() {
                let want = value.as_f64().unwrap();
                assert!(
                    (single[c] - want).abs() <= 1e-9,
                    "{key} sample {i} logit {c}"
                );
                assert!(
                    (batch[(c, i)] - want).abs() <= 1e-9,
                    "{key} batch sample {i} logit {c}"
                );
            }
            assert_eq!(
                predicted_class(single.as_slice()) as u64,
                predicted[i].as_u64().unwrap(),
                "{key} sample {i}"
            );
        }
    }
}

#[test]
fn data_errors_name_row_and_column() {
    let model = load_value(&small_model_json()).unwrap();
    let options = DataOptions::default();
    let cases = [
        ("label,a,b,c\nnormal,0.1,0.2\n", "row 2"),
        ("label,a,b,c\nbroken,0.1,0.2,1\n", "row 2, column \"label\""),
        (
            "label,a,b,c\n7,0.1,0.2,1\n",
            "class index 7 is out of range",
        ),
        ("label,a,b,c\n0,0.1,x,1\n", "row 2, column \"b\""),
        (
            "label,a,b,c\n0,0.1,0.2,9\n",
            "outside the model's input range",
        ),
        (
            "label,a,b,c,d\n0,0.1,0.2,1,3\n",
            "column \"d\" is not an input",
        ),
        ("label,a,a,c\n0,0.1,0.2,1\n", "appears twice"),
        ("a,b,c\n0.1,0.2,1\n", "no label column"),
        ("label,a,b,c\n", "no data rows"),
        ("", "header"),
    ];
    for (text, expected) in cases {
        let (place, message) = parse_csv(text, &model, &options).expect_err(expected);
        let full = format!("{place}: {message}");
        assert!(
            full.contains(expected),
            "{full:?} should contain {expected:?}"
        );
    }
}

#[test]
fn data_columns_match_by_name_and_labels_by_name_or_index() {
    let model = load_value(&small_model_json()).unwrap();
    let text = "c,label,b,a\n3.0,worn,0.2,0.1\n1.0,0,0.4,0.3\n";
    let data = parse_csv(text, &model, &DataOptions::default()).unwrap();
    assert_eq!(data.labels, vec![1, 0]);
    assert_eq!(data.sample(0), &[0.1, 0.2, 3.0]);
    assert_eq!(data.sample(1), &[0.3, 0.4, 1.0]);
}

/// Outside reference: scikit-learn 1.9.1 `Pipeline(MinMaxScaler, MLPClassifier)` on the bundled
/// breast-cancer data, exported by `export_pipeline` exactly as docs/model-format.md prints it
/// (tests/reference/pipeline_fixture.py). ballast's sigmoid of the one logit matches the pipeline's
/// `predict_proba[:, 1]` on the 171 test rows (clipped to the training range, which the recipe declares
/// as the input range, so the CSV path accepts every row as it is).
#[test]
fn pipeline_recipe_matches_scikit_learn_predict_proba() {
    let text = std::fs::read_to_string("tests/reference/out/pipeline_minmax.json").unwrap();
    let reference: serde_json::Value = serde_json::from_str(&text).unwrap();
    let model =
        Model::from_json_str(&reference["model"].to_string()).expect("the recipe's model loads");
    assert!(matches!(
        model.layers.first(),
        Some(ballast::model::Layer::Normalize { .. })
    ));
    let names: Vec<String> = (0..model.input.dim)
        .map(|i| model.feature_name(i))
        .collect();
    let rows = reference["rows"].as_array().unwrap();
    let labels = reference["labels"].as_array().unwrap();
    let mut csv = format!("{},label\n", names.join(","));
    for (row, label) in rows.iter().zip(labels) {
        let cells: Vec<String> = row
            .as_array()
            .unwrap()
            .iter()
            .map(|v| format!("{}", v.as_f64().unwrap()))
            .collect();
        csv.push_str(&format!("{},{}\n", cells.join(","), label));
    }
    let data = parse_csv(&csv, &model, &DataOptions::default())
        .expect("every clipped row lies in the declared range");
    assert_eq!(data.len(), 171);
    let network = model.network();
    let expected = reference["probability_class_1"].as_array().unwrap();
    assert_eq!(expected.len(), data.len());
    for (i, want) in expected.iter().enumerate() {
        let z = network.forward(data.sample(i))[0];
        let p = 1.0 / (1.0 + (-z).exp());
        let want = want.as_f64().unwrap();
        assert!((p - want).abs() <= 1e-9, "row {i}: {p} vs {want}");
    }
}
