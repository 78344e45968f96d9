//! Numbers in JSON files are read correctly rounded: every double written in shortest round-trip form
//! reads back bit for bit, through model load, model save + load, and requirement files; and a
//! `normalize` mean equal to the input gives exactly `x − mean = 0`, which can decide the class.
//!
//! References: a fixture written by Python's float repr (tests/reference/shortest_floats.py; repr is
//! the shortest string that reads back to the same double, Python documentation "Floating Point
//! Arithmetic: Issues and Limitations"), and Rust's own `{}` / `{:e}` formatting with `str::parse`,
//! which std documents as correctly rounded (common practice: its shortest digits round-trip too, and
//! the test checks that with `str::parse` before using them).

use ballast::cli::evaluate::evaluate;
use ballast::data::{parse_csv, DataOptions};
use ballast::model::{Layer, Model};
use ballast::threat::requirement::RequirementSpec;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// A one-unit dense model whose weight row is `values` written with `text`, bias `bias`.
fn model_text(values: &[f64], bias: f64, text: &dyn Fn(f64) -> String) -> String {
    let row: Vec<String> = values.iter().map(|v| text(*v)).collect();
    format!(
        r#"{{"format": "ballast.model/1", "input": {{"dim": {}}},
            "layers": [{{"kind": "dense", "weights": [[{}]], "bias": [{}]}}]}}"#,
        values.len(),
        row.join(", "),
        text(bias)
    )
}

/// The weight row and bias of a one-unit dense model.
fn row_and_bias(model: &Model) -> Vec<f64> {
    match &model.layers[..] {
        [Layer::Dense { weights, bias }] => weights.iter().chain(bias.iter()).copied().collect(),
        other => panic!("expected one dense layer, got {other:?}"),
    }
}

/// Asserts that `model` holds exactly `expected` (bit patterns), naming the first difference.
fn assert_bits(model: &Model, expected: &[f64], how: &str) {
    let got = row_and_bias(model);
    assert_eq!(got.len(), expected.len(), "{how}: value count");
    let wrong: Vec<String> = got
        .iter()
        .zip(expected)
        .filter(|(g, e)| g.to_bits() != e.to_bits())
        .map(|(g, e)| format!("{e:e} read as {g:e}"))
        .collect();
    assert!(
        wrong.is_empty(),
        "{how}: {} of {} values not read back exactly, e.g. {:?}",
        wrong.len(),
        got.len(),
        &wrong[..wrong.len().min(5)]
    );
}

/// Load, save + load (text and file) must all give back `expected` exactly.
fn check_round_trips(text: &str, expected: &[f64], how: &str) {
    let model = Model::from_json_str(text).unwrap_or_else(|e| panic!("{how}: {e}"));
    assert_bits(&model, expected, &format!("{how}, load"));
    let again = Model::from_json_str(&model.to_json_string()).expect("saved text loads");
    assert_bits(&again, expected, &format!("{how}, save + load"));
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("m.json");
    model.save(&path).unwrap();
    let from_file = Model::load(&path).expect("saved file loads");
    assert_bits(&from_file, expected, &format!("{how}, save + load file"));
}

/// Finite doubles from random bit patterns (all exponents, both signs, subnormals) and doubles with
/// random 17-digit decimal significands near 1 (the hard cases for fast parsers).
fn random_doubles(seed: u64, count: usize) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = Vec::with_capacity(count);
    while out.len() < count / 2 {
        let x = f64::from_bits(rng.gen::<u64>());
        if x.is_finite() {
            out.push(x);
        }
    }
    while out.len() < count {
        let significand: u64 = rng.gen_range(10_000_000_000_000_000..100_000_000_000_000_000);
        let exponent: i32 = rng.gen_range(-25..=5);
        let x: f64 = format!("{significand}e{exponent}").parse().unwrap();
        out.push(if rng.gen::<bool>() { -x } else { x });
    }
    out
}

#[test]
fn python_repr_values_read_back_bit_for_bit() {
    let text = std::fs::read_to_string("tests/data/shortest_floats.model.json").unwrap();
    let expected: Vec<f64> = std::fs::read_to_string("tests/data/shortest_floats.bits.txt")
        .unwrap()
        .lines()
        .map(|l| f64::from_bits(u64::from_str_radix(l, 16).expect("hex bits")))
        .collect();
    assert_eq!(expected.len(), 6000);
    check_round_trips(&text, &expected, "Python repr fixture");
}

#[test]
fn rust_shortest_forms_read_back_bit_for_bit() {
    let values = random_doubles(11, 20_000);
    let forms: [(&str, &dyn Fn(f64) -> String); 2] = [
        ("exponent form {:e}", &|v| format!("{v:e}")),
        ("positional form {}", &|v| format!("{v}")),
    ];
    for (how, text) in forms {
        // The generator itself: std's parse (correctly rounded) must give every value back.
        assert!(values
            .iter()
            .all(|v| text(*v).parse::<f64>().unwrap().to_bits() == v.to_bits()));
        for chunk in values.chunks(5_000) {
            let (row, bias) = chunk.split_at(chunk.len() - 1);
            check_round_trips(&model_text(row, bias[0], text), chunk, how);
        }
    }
}

#[test]
fn requirement_json_numbers_read_back_bit_for_bit() {
    let values: Vec<f64> = random_doubles(12, 400)
        .into_iter()
        .map(f64::abs)
        .filter(|v| *v > 1e-300 && *v < 1e300)
        .collect();
    let list: Vec<String> = values.iter().map(|v| format!("{v:e}")).collect();
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("req.json");
    std::fs::write(
        &path,
        format!(r#"{{"norm": "linf", "epsilon": [{}]}}"#, list.join(", ")),
    )
    .unwrap();
    let spec = RequirementSpec::from_file(&path).expect("valid requirement");
    let (read, _) = spec.epsilons.expect("epsilons");
    assert_eq!(read.len(), values.len());
    for (r, v) in read.iter().zip(&values) {
        assert_eq!(r.to_bits(), v.to_bits(), "{v:e} read as {r:e}");
    }
}

/// A 3-class model on one feature: `normalize` with mean `m` and std `s`, then logits
/// `(z, −z, 1e-300)` with `z = (x − m)/s`. Class 2 wins only when `z` is exactly 0.
fn tie_model(m: f64, s: f64) -> String {
    format!(
        r#"{{"format": "ballast.model/1", "input": {{"dim": 1, "names": ["x"]}},
            "classes": ["above", "below", "at"],
            "layers": [
              {{"kind": "normalize", "mean": [{m:e}], "std": [{s:e}]}},
              {{"kind": "dense", "weights": [[1.0], [-1.0], [0.0]], "bias": [0.0, 0.0, 1e-300]}}
            ]}}"#
    )
}

#[test]
fn a_normalize_mean_equal_to_the_input_gives_exactly_zero() {
    let mut rng = ChaCha8Rng::seed_from_u64(13);
    // Powers of two as std keep the folded affine map exact, so the tie depends only on reading the
    // mean and the data exactly.
    for s in [1.0, 0.5, 4.0, 0.0078125] {
        for _ in 0..250 {
            let significand: u64 = rng.gen_range(10_000_000_000_000_000..100_000_000_000_000_000);
            let m: f64 = format!("{significand}e-{}", rng.gen_range(14..=20))
                .parse()
                .unwrap();
            let model = Model::from_json_str(&tie_model(m, s)).expect("valid model");
            let csv = format!("x,label\n{m:e},at\n{m},at\n");
            let data = parse_csv(&csv, &model, &DataOptions::default()).expect("valid data");
            assert_eq!(data.features[(0, 0)].to_bits(), m.to_bits());
            let logits = model.classifier().forward(&[m]);
            assert_eq!(
                logits[0], 0.0,
                "mean {m:e}, std {s}: x − mean = {}",
                logits[0]
            );
            let result = evaluate(&model, &data);
            assert_eq!(
                result.accuracy, 1.0,
                "mean {m:e}, std {s}: {:?}",
                result.confusion
            );
        }
    }
}
