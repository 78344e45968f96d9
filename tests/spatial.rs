//! Convolutional layer kinds (conv 1-D/2-D, batch norm, average and max pooling, flatten): the bounds
//! every stage relies on never exclude an exact value, and the model file round-trips.
//!
//! Outside reference: exact rational arithmetic (tests/common/exact_model.rs) evaluates each model as
//! its file describes it, at double inputs sampled in the region's inner box and at its corners; the
//! kernel indexing there follows the ONNX operator definitions directly, not ballast's lowering.

mod common;

use ballast::bound::{self, Method};
use ballast::model::Model;
use ballast::threat::{Budget, Norm};
use common::exact_model::exact_logits;
use common::rational;
use num_traits::Signed;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value};

fn values(rng: &mut ChaCha8Rng, n: usize, scale: f64) -> Vec<f64> {
    (0..n).map(|_| scale * rng.gen_range(-1.0..1.0)).collect()
}

/// A nested kernel `[out][in][k]` (1-D) or `[out][in][kh][kw]` (2-D).
fn kernel(
    rng: &mut ChaCha8Rng,
    out: usize,
    input: usize,
    kh: usize,
    kw: usize,
    two_d: bool,
) -> Value {
    let scale = (2.0 / (input * kh * kw) as f64).sqrt();
    let mut outer = Vec::new();
    for _ in 0..out {
        let mut channels = Vec::new();
        for _ in 0..input {
            if two_d {
                let rows: Vec<Value> = (0..kh).map(|_| json!(values(rng, kw, scale))).collect();
                channels.push(Value::Array(rows));
            } else {
                channels.push(json!(values(rng, kw, scale)));
            }
        }
        outer.push(Value::Array(channels));
    }
    Value::Array(outer)
}

/// A random small CNN over `[C, L]` or `[C, H, W]` features, and the shape's feature count.
fn random_cnn(rng: &mut ChaCha8Rng, case: usize) -> (Model, usize) {
    let two_d = case.is_multiple_of(2);
    let channels = rng.gen_range(1..=2);
    let (h, w) = if two_d {
        (rng.gen_range(3..=5), rng.gen_range(3..=5))
    } else {
        (1, rng.gen_range(5..=9))
    };
    let dim = channels * h * w;
    let shape = if two_d {
        json!([channels, h, w])
    } else {
        json!([channels, w])
    };
    let out = rng.gen_range(1..=3);
    let (kh, kw) = if two_d {
        (2, rng.gen_range(1..=3))
    } else {
        (1, rng.gen_range(2..=3))
    };
    let stride = rng.gen_range(1..=2);
    let pad = rng.gen_range(0..=1);
    let per_axis = |v: usize| if two_d { json!([v, v]) } else { json!([v]) };
    let padding = if two_d {
        json!([pad, pad, pad, pad])
    } else {
        json!([pad, pad])
    };
    let mut layers = vec![];
    if case.is_multiple_of(3) {
        let mean = values(rng, dim, 0.5);
        let std: Vec<f64> = (0..dim).map(|_| rng.gen_range(0.25..2.0)).collect();
        layers.push(json!({"kind": "normalize", "mean": mean, "std": std}));
    }
    let dilation = 1 + case % 2 * usize::from(kw == 1);
    layers.push(json!({
        "kind": "conv",
        "kernel": kernel(rng, out, channels, kh, kw, two_d),
        "bias": values(rng, out, 0.3),
        "stride": per_axis(stride),
        "padding": padding,
        "dilation": per_axis(dilation),
    }));
    // Output extent (common practice): (n + 2p − d(k − 1) − 1)/s + 1; the pool window fits it.
    let extent = |n: usize, k: usize, d: usize| (n + 2 * pad - d * (k - 1) - 1) / stride + 1;
    let window = |n: usize| n.min(2);
    let pool_kernel = if two_d {
        json!([
            window(extent(h, kh, dilation)),
            window(extent(w, kw, dilation))
        ])
    } else {
        json!([window(extent(w, kw, dilation))])
    };
    if case % 4 < 2 {
        // variance + epsilon is a square of a double, so the exact reference needs no irrational root.
        let roots: Vec<f64> = (0..out)
            .map(|_| [0.5, 1.5, 2.0, 0.75][rng.gen_range(0..4)])
            .collect();
        layers.push(json!({
            "kind": "batchnorm",
            "scale": values(rng, out, 1.5),
            "shift": values(rng, out, 0.5),
            "mean": values(rng, out, 0.3),
            "variance": roots.iter().map(|r| r * r).collect::<Vec<f64>>(),
            "epsilon": 0.0,
        }));
    }
    let pool_first = case.is_multiple_of(5); // max pool before the ReLU: inputs of either sign
    let pool = json!({
        "kind": if case % 3 == 1 { "averagepool" } else { "maxpool" },
        "kernel": pool_kernel,
        "stride": per_axis(1),
    });
    if pool_first {
        layers.push(pool.clone());
        layers.push(json!({"kind": "relu"}));
    } else {
        layers.push(json!({"kind": "relu"}));
        layers.push(pool);
    }
    layers.push(json!({"kind": "flatten"}));
    let text = json!({
        "format": "ballast.model/1",
        "input": {"dim": dim, "shape": shape},
        "layers": layers,
    });
    // The dense head needs the flattened size: read it from a model without the head.
    let partial = Model::from_json_str(&text.to_string()).expect("valid partial model");
    let features = partial.output_dim();
    let classes = rng.gen_range(2..=3);
    let mut full = text.clone();
    let head: Vec<Vec<f64>> = (0..classes)
        .map(|_| values(rng, features, (2.0 / features as f64).sqrt()))
        .collect();
    full["layers"]
        .as_array_mut()
        .unwrap()
        .push(json!({"kind": "dense", "weights": head, "bias": values(rng, classes, 0.2)}));
    (
        Model::from_json_str(&full.to_string()).expect("valid model"),
        dim,
    )
}

#[test]
fn no_exact_margin_below_a_bound_for_any_layer_kind() {
    let mut rng = ChaCha8Rng::seed_from_u64(1818);
    let mut checked = 0;
    let mut informative = 0;
    for case in 0..40 {
        let (model, dim) = random_cnn(&mut rng, case);
        let network = model.classifier();
        let center = values(&mut rng, dim, 1.0);
        let norm = if case % 4 == 3 { Norm::L2 } else { Norm::Linf };
        let radius = rng.gen_range(0.02..0.3);
        let region =
            Budget::uniform(norm, radius, dim).region(&center, &vec![-1.5; dim], &vec![1.5; dim]);
        let logits = exact_logits(&model, &center);
        let label = (0..logits.len()).fold(0, |b, j| if logits[j] > logits[b] { j } else { b });
        let targets: Vec<usize> = (0..logits.len()).filter(|j| *j != label).collect();
        let mut points: Vec<Vec<f64>> = (0..40)
            .map(|_| {
                let mut x: Vec<f64> = (0..dim)
                    .map(|i| rng.gen_range(region.inner_lower[i]..=region.inner_upper[i]))
                    .collect();
                region.project(&mut x);
                x
            })
            .collect();
        for _ in 0..20 {
            let mut x: Vec<f64> = (0..dim)
                .map(|i| {
                    if rng.gen_bool(0.5) {
                        region.inner_upper[i]
                    } else {
                        region.inner_lower[i]
                    }
                })
                .collect();
            region.project(&mut x);
            points.push(x);
        }
        points.retain(|x| region.contains(x));
        // The network the engine sees computes the model (up to rounding).
        let z = network.forward(&center);
        for (c, exact) in logits.iter().enumerate() {
            let diff = (rational(z[c]) - exact).abs();
            assert!(
                diff <= rational(1e-9),
                "case {case}: forward pass off by {diff}"
            );
        }
        for method in [Method::Interval, Method::Linear, Method::OptimisedLinear] {
            let result =
                bound::margin_lower_bounds(&network, &region, label, &targets, method, None)
                    .unwrap();
            for x in &points {
                let z = exact_logits(&model, x);
                for (t, &j) in targets.iter().enumerate() {
                    assert!(
                        &z[label] - &z[j] >= rational(result.lower[t]),
                        "case {case} {method:?}: exact margin below the bound {}",
                        result.lower[t]
                    );
                    checked += 1;
                }
            }
            informative += result.lower.iter().filter(|b| **b > -1.0).count();
        }
    }
    assert!(checked > 5000, "only {checked} checks");
    assert!(informative > 30, "only {informative} informative bounds");
}

#[test]
fn spatial_models_round_trip_through_the_file() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    for case in 0..12 {
        let (model, _) = random_cnn(&mut rng, case);
        let again = Model::from_json_str(&model.to_json_string()).expect("reloads");
        assert_eq!(again, model, "case {case}");
    }
}

#[test]
fn a_kernel_with_the_wrong_channels_names_the_layer_and_field() {
    let text = json!({
        "format": "ballast.model/1",
        "input": {"dim": 8, "shape": [2, 4]},
        "layers": [
            {"kind": "conv", "kernel": [[[1.0, 2.0]]], "bias": [0.0]},
            {"kind": "flatten"},
            {"kind": "dense", "weights": [[1.0, 1.0, 1.0]], "bias": [0.0]}
        ]
    });
    let err = Model::from_json_str(&text.to_string())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("layers[0].kernel") && err.contains("expected 2"),
        "{err}"
    );
}
