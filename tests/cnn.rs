//! A convolutional classifier decided exactly: ballast's verdicts on a digits CNN equal the exact
//! answer of a mixed-integer program.
//!
//! Outside reference: tests/reference/out/milp_digits_cnn.json, written by
//! tests/reference/cnn_fixtures.py — the CNN (tests/data/digits_cnn.model.json: conv 3×3 ×8 stride 2
//! pad 1, relu, dense 10 on scikit-learn's 8×8 digits) written out as dense matrices with
//! scipy.signal.correlate, encoded big-M and solved by scipy.optimize.milp (HiGHS) for 30 test rows
//! at L-inf eps 0.07 clipped to [0, 1]. ballast reads the convolution as a convolution.

use std::path::Path;

use ballast::bound::linear;
use ballast::data::{load_csv, DataOptions};
use ballast::model::Model;
use ballast::search::{verify_batch, SearchProblem, SearchSettings, Verdict};
use ballast::threat::{Budget, Norm};
use serde_json::Value;

#[test]
fn cnn_verdicts_match_highs_milp_where_bounds_alone_do_not_decide() {
    let model = Model::load(Path::new("tests/data/digits_cnn.model.json")).unwrap();
    let data = load_csv(
        Path::new("tests/data/digits_test.csv"),
        &model,
        &DataOptions::default(),
    )
    .unwrap();
    let text = std::fs::read_to_string("tests/reference/out/milp_digits_cnn.json").unwrap();
    let reference: Value = serde_json::from_str(&text).unwrap();
    let epsilon = reference["epsilon"].as_f64().unwrap();
    let network = model.classifier();
    let mut problems = Vec::new();
    let mut exact_minima = Vec::new();
    for s in reference["samples"].as_array().unwrap() {
        let index = s["index"].as_u64().unwrap() as usize;
        let targets: Vec<(usize, f64)> = s["targets"]
            .as_array()
            .unwrap()
            .iter()
            .map(|t| {
                (
                    t["target"].as_u64().unwrap() as usize,
                    t["exact"].as_f64().unwrap(),
                )
            })
            .collect();
        let region = Budget::uniform(Norm::Linf, epsilon, model.input.dim).region(
            data.sample(index),
            &model.input.lower,
            &model.input.upper,
        );
        problems.push(SearchProblem {
            index,
            region,
            label: s["label"].as_u64().unwrap() as usize,
            targets: targets.iter().map(|(j, _)| *j).collect(),
        });
        exact_minima.push(
            targets
                .iter()
                .map(|(_, v)| *v)
                .fold(f64::INFINITY, f64::min),
        );
    }
    assert_eq!(problems.len(), 30);
    // The fixture is a hard one: for some robust sample the linear bound alone is not enough.
    let open = problems
        .iter()
        .zip(&exact_minima)
        .filter(|(p, exact)| {
            let b = linear::margin_lower_bounds(&network, &p.region, p.label, &p.targets, None)
                .unwrap();
            **exact > 0.0 && b.lower.iter().any(|v| *v <= 0.0)
        })
        .count();
    assert!(
        open >= 1,
        "every robust sample is decided by the linear bound"
    );
    let outcomes = verify_batch(&network, &problems, &SearchSettings::default());
    for ((problem, exact), outcome) in problems.iter().zip(&exact_minima).zip(outcomes) {
        match outcome.unwrap().verdict {
            Verdict::Proved { min_margin_lower } => {
                assert!(
                    *exact > 0.0,
                    "sample {} proved, HiGHS: not robust",
                    problem.index
                );
                assert!(
                    min_margin_lower <= exact + 1e-6,
                    "bound above the exact minimum"
                );
            }
            Verdict::Counterexample(c) => {
                assert!(
                    *exact <= 0.0,
                    "sample {} refuted, HiGHS: robust",
                    problem.index
                );
                assert!(problem.region.contains(&c.input));
                let z = model.network().forward(&c.input);
                assert!(
                    c.predicted != problem.label && z[c.predicted] >= z[problem.label],
                    "the counterexample does not change the class in a plain forward pass"
                );
            }
            Verdict::Unresolved { .. } => panic!("sample {} unresolved", problem.index),
        }
    }
}
