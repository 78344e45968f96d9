//! Convolution arithmetic against an outside reference, scipy.signal.correlate, and the worked example
//! of docs/model-format.md computed by hand.
//!
//! tests/reference/conv_correlate.py (Python 3.11.7, numpy 2.4.6, scipy 1.17.1; the versions are
//! recorded in its output) draws 40 random 1-D and 2-D cases — channels, kernel sizes, strides,
//! dilations and asymmetric padding — and computes each output channel as the bias plus the sum over
//! input channels of `scipy.signal.correlate(pad(x[c]), dilate(k[o, c]), "valid", method="direct")`
//! sampled at the stride. Here the same numbers are written as a one-layer `conv` model in the JSON
//! layout, so the check covers the layout's kernel order and padding order as well as the arithmetic.

use ballast::model::{deployed, Model};
use serde_json::{json, Value};

const REFERENCE: &str = "tests/reference/out/conv_correlate.json";

fn numbers(value: &Value) -> Vec<f64> {
    value
        .as_array()
        .expect("a list")
        .iter()
        .map(|v| v.as_f64().expect("a number"))
        .collect()
}

#[test]
fn conv_layers_compute_what_scipy_correlate_computes() {
    let text = std::fs::read_to_string(REFERENCE).expect("reference outputs are committed");
    let reference: Value = serde_json::from_str(&text).expect("valid JSON");
    let cases = reference["cases"].as_array().expect("cases");
    assert_eq!(cases.len(), 40);
    let mut largest: f64 = 0.0;
    for (k, case) in cases.iter().enumerate() {
        let x = numbers(&case["x"]);
        let expected = numbers(&case["expected"]);
        let model = json!({
            "format": "ballast.model/1",
            "input": {"dim": x.len(), "shape": case["shape"]},
            "layers": [{
                "kind": "conv",
                "kernel": case["kernel"],
                "bias": case["bias"],
                "stride": case["stride"],
                "padding": case["padding"],
                "dilation": case["dilation"],
            }],
        });
        let model = Model::from_json_str(&model.to_string())
            .unwrap_or_else(|e| panic!("case {k}: the layout refuses the case: {e}"));
        assert_eq!(model.output_dim(), expected.len(), "case {k}: output size");
        // The network every stage uses, and the layer evaluated as written (float64).
        let network = model.network().forward(&x);
        let as_written = deployed::forward(&model, &x);
        for (i, want) in expected.iter().enumerate() {
            for (what, got) in [("network", network[i]), ("as written", as_written[i])] {
                let gap = (got - want).abs();
                assert!(
                    gap <= 1e-12 * (1.0 + want.abs()),
                    "case {k} output {i} ({what}): ballast {got}, scipy {want}"
                );
                largest = largest.max(gap);
            }
        }
    }
    println!("largest |ballast - scipy.signal.correlate| = {largest:e}");
}

// Source: the worked example in docs/model-format.md ("a conv over a [1, 6] signal"), computed by hand.
#[test]
fn the_documented_worked_example_gives_the_hand_computed_numbers() {
    let model = Model::from_json_str(
        r#"{"format": "ballast.model/1", "input": {"dim": 6, "shape": [1, 6]},
            "layers": [
              {"kind": "conv", "kernel": [[[1, -1, 2]], [[0, 1, 0]]], "bias": [0.5, 0],
               "stride": [2], "padding": [1, 1], "dilation": [1]},
              {"kind": "relu"},
              {"kind": "maxpool", "kernel": [2], "stride": [1]},
              {"kind": "flatten"},
              {"kind": "dense", "weights": [[1, 0, -1, 0], [0, 1, 0, 1]], "bias": [0, 0]}]}"#,
    )
    .unwrap();
    let x = [1.0, 2.0, 0.0, -1.0, 3.0, 1.0];
    let close = |what: &str, got: &[f64], want: &[f64]| {
        assert_eq!(got.len(), want.len(), "{what}");
        for (g, w) in got.iter().zip(want) {
            assert!((g - w).abs() <= 1e-12, "{what}: {got:?}, by hand {want:?}");
        }
    };
    // Step by step, as the document lists it.
    let first = |n: usize| Model {
        layers: model.layers[..n].to_vec(),
        ..model.clone()
    };
    close(
        "conv",
        &deployed::forward(&first(1), &x),
        &[3.5, 0.5, -1.5, 1.0, 0.0, 3.0],
    );
    close(
        "flatten",
        &deployed::forward(&first(4), &x),
        &[3.5, 0.5, 1.0, 3.0],
    );
    close("logits", &deployed::forward(&model, &x), &[2.5, 3.5]);
    close(
        "logits (network)",
        model.network().forward(&x).as_slice(),
        &[2.5, 3.5],
    );
}
