//! Tests of the deployed-arithmetic error bound against float32 and float64 evaluation.

use super::*;

fn model(arithmetic: &str) -> Model {
    let text = format!(
        r#"{{"format": "ballast.model/1", "input": {{"dim": 2}}, "arithmetic": "{arithmetic}",
        "layers": [{{"kind": "normalize", "mean": [1.0, 2.0], "std": [0.5, 4.0]}},
                   {{"kind": "dense", "weights": [[1.0, -2.0], [0.5, 0.25]], "bias": [0.1, 0.0]}},
                   {{"kind": "relu"}},
                   {{"kind": "dense", "weights": [[1.0, 1.0], [-1.0, 2.0]], "bias": [0.0, 0.3]}}]}}"#
    );
    Model::from_json_str(&text).unwrap()
}

/// Evaluates the model in float32, layer by layer as written.
fn forward_f32(x: &[f64]) -> Vec<f64> {
    let mut h: Vec<f32> = x.iter().map(|v| *v as f32).collect();
    h = vec![(h[0] - 1.0) / 0.5, (h[1] - 2.0) / 4.0];
    let z1 = [h[0] - 2.0 * h[1] + 0.1, 0.5 * h[0] + 0.25 * h[1]];
    let a = [z1[0].max(0.0), z1[1].max(0.0)];
    vec![(a[0] + a[1]) as f64, (-a[0] + 2.0 * a[1] + 0.3) as f64]
}

#[test]
fn float32_evaluation_stays_within_the_bound() {
    // The float32 evaluation is an outside check of the error model (common practice: compare the
    // low-precision result with a high-precision one).
    let m = model("float32");
    let bounds = DeployedError::new(&m);
    let (lower, upper) = ([0.0, 0.0], [3.0, 9.0]);
    let errors = bounds.bound(&lower, &upper, &[]);
    let net = m.network();
    for i in 0..=30 {
        for j in 0..=30 {
            let x = [3.0 * i as f64 / 30.0, 9.0 * j as f64 / 30.0];
            let exact = net.forward(&x);
            let single = forward_f32(&x);
            for c in 0..2 {
                assert!((single[c] - exact[c]).abs() <= errors[c]);
            }
        }
    }
    // float64 bounds are about 2^29 times smaller.
    let f64_errors = DeployedError::new(&model("float64")).bound(&lower, &upper, &[]);
    assert!(f64_errors[0] < errors[0] * 1e-7);
}

fn scaled(arithmetic: &str, w1: f64, w2: f64) -> Model {
    let text = format!(
        r#"{{"format": "ballast.model/1", "input": {{"dim": 1}}, "arithmetic": "{arithmetic}",
        "layers": [{{"kind": "dense", "weights": [[{w1:e}]], "bias": [0.0]}}, {{"kind": "relu"}},
                   {{"kind": "dense", "weights": [[{w2:e}], [1.0]], "bias": [0.0, 0.0]}}]}}"#
    );
    Model::from_json_str(&text).unwrap()
}

#[test]
fn float32_subnormal_values_stay_within_the_bound() {
    // x · 1e-25 for x in [1e-15, 1e-14] is a float32 subnormal (below 2^-126 ≈ 1.2e-38), rounded
    // to a multiple of 2^-149: relative errors up to ~1e-5, far above float32's unit roundoff, then
    // multiplied by 1e37. Rust's f32 arithmetic (IEEE 754 with gradual underflow) is the check.
    let m = scaled("float32", 1e-25, 1e37);
    let (lower, upper) = ([1e-15], [1e-14]);
    let errors = DeployedError::new(&m).bound(&lower, &upper, &[]);
    let net = m.network();
    let mut worst: f64 = 0.0;
    for i in 0..=200 {
        let x = 1e-15 + 9e-15 * i as f64 / 200.0;
        let h = ((x as f32) * (1e-25f32)).max(0.0);
        let single = f64::from(h * 1e37f32);
        let exact = net.forward(&[x])[0];
        worst = worst.max((single - exact).abs());
        assert!((single - exact).abs() <= errors[0], "x {x}");
    }
    // The underflow is real here: the relative-error model alone (unit roundoff times the
    // magnitudes, ~1e-9) would not cover it.
    assert!(worst > 1e-9, "{worst}");
}

#[test]
fn a_possible_float32_overflow_leaves_no_bound() {
    // Logits up to 4e38 exceed float32's largest finite number (about 3.4e38).
    let errors = DeployedError::new(&scaled("float32", 1e38, 1.0)).bound(&[1.0], &[4.0], &[]);
    assert!(errors.iter().all(|e| e.is_infinite()));
    let errors = DeployedError::new(&scaled("float64", 1e38, 1.0)).bound(&[1.0], &[4.0], &[]);
    assert!(errors.iter().all(|e| e.is_finite()));
}

#[test]
fn boxes_bounded_together_get_their_own_bounds() {
    // One overflowing box among ordinary ones: only its column is infinite.
    for arithmetic in ["float32", "float64"] {
        let bounds = DeployedError::new(&model(arithmetic));
        let hidden = [LayerBounds {
            lower: vec![-0.5, 0.0],
            upper: vec![1.5, 0.5],
        }];
        let boxes = [
            ([0.0, 0.0], [3.0, 9.0], &hidden[..]),
            ([1.0, 2.0], [1.0, 2.0], &[][..]),
            ([-1e308, 0.0], [1e308, 1.0], &[][..]),
            ([0.5, -1.0], [2.0, 5.0], &hidden[..]),
        ];
        let many = bounds.bound_many(
            &boxes
                .iter()
                .map(|(lower, upper, hidden)| ErrorBox {
                    lower,
                    upper,
                    hidden,
                })
                .collect::<Vec<_>>(),
        );
        for ((lower, upper, hidden), together) in boxes.iter().zip(&many) {
            let alone = bounds.bound(lower, upper, hidden);
            for (a, b) in alone.iter().zip(together) {
                assert!(
                    a == b || (a - b).abs() <= 1e-12 * a.abs(),
                    "{arithmetic}: {a} vs {b}"
                );
            }
        }
        assert!(many[2].iter().all(|e| e.is_infinite()), "{arithmetic}");
        assert!(many[3].iter().all(|e| e.is_finite()), "{arithmetic}");
    }
}
