//! The statistics of how far counterexamples moved each feature (report key
//! `counterexample_movement`), recomputed outside the library from the report read as plain JSON
//! (serde_json) and the data rows read from the CSV text.

use serde_json::Value;

mod common;
use common::cli::{certify_demo_acceptance, root};

/// The statistics of how far counterexamples moved each feature, recomputed here from the saved
/// perturbed inputs and the CSV rows: mean and largest |δ| / radius, share at the radius (|δ| ≥ 0.999 ×
/// radius), radius = epsilon × tolerance; a feature with tolerance 0 is held fixed and has none.
#[test]
fn counterexample_movement_matches_the_saved_counterexamples() {
    let dir = tempfile::tempdir().unwrap();
    let mut tolerances: serde_json::Map<String, Value> = serde_json::from_str(
        &std::fs::read_to_string(root().join("demo-data/tolerances.json")).unwrap(),
    )
    .unwrap();
    tolerances.insert("flow_m3_h".into(), Value::from(0.0));
    let file = dir.path().join("tol.json");
    std::fs::write(&file, Value::Object(tolerances.clone()).to_string()).unwrap();
    let report = certify_demo_acceptance("models/pump-mlp.json", &file, &dir.path().join("r.json"));
    let movement = &report["counterexample_movement"];
    let csv = std::fs::read_to_string(root().join("demo-data/acceptance.csv")).unwrap();
    let mut lines = csv.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let rows: Vec<Vec<f64>> = lines
        .map(|l| l.split(',').skip(1).map(|v| v.parse().unwrap()).collect())
        .collect();
    let names = &report["model"]["features"];
    let cex: Vec<(usize, Vec<f64>)> = report["samples"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|s| s["status"] == "counterexample")
        .map(|s| {
            let f = s["counterexample"]["features"].as_array().unwrap();
            (
                s["index"].as_u64().unwrap() as usize,
                f.iter().map(|v| v.as_f64().unwrap()).collect(),
            )
        })
        .collect();
    assert!(
        cex.len() >= 5,
        "too few counterexamples to check: {}",
        cex.len()
    );
    assert_eq!(
        movement["counterexamples"].as_u64().unwrap() as usize,
        cex.len()
    );
    for (i, entry) in movement["features"].as_array().unwrap().iter().enumerate() {
        let name = names[i].as_str().unwrap();
        assert_eq!(entry["feature"], name);
        let column = header.iter().position(|h| *h == name).unwrap() - 1;
        let radius = 2.0 * tolerances[name].as_f64().unwrap();
        if radius == 0.0 {
            assert!(entry["mean_relative_change"].is_null(), "{name} moved");
            for (index, x) in &cex {
                assert_eq!(x[i], rows[*index][column], "fixed feature {name} moved");
            }
            continue;
        }
        let relative: Vec<f64> = cex
            .iter()
            .map(|(index, x)| (x[i] - rows[*index][column]).abs() / radius)
            .collect();
        let n = relative.len() as f64;
        let mean = relative.iter().sum::<f64>() / n;
        let max = relative.iter().copied().fold(0.0, f64::max);
        let share = relative.iter().filter(|r| **r >= 0.999).count() as f64 / n;
        approx::assert_abs_diff_eq!(
            entry["mean_relative_change"].as_f64().unwrap(),
            mean,
            epsilon = 1e-9
        );
        approx::assert_abs_diff_eq!(
            entry["max_relative_change"].as_f64().unwrap(),
            max,
            epsilon = 1e-9
        );
        approx::assert_abs_diff_eq!(
            entry["share_at_radius"].as_f64().unwrap(),
            share,
            epsilon = 1e-12
        );
        assert!(max <= 1.0 + 1e-9, "{name} moved past its radius: {max}");
    }
}
