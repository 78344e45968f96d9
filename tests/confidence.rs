//! Retraining under a reviewer's confidence rule (`ballast::train::confidence`, `retrain --confidence`).
//!
//! Outside reference: tests/reference/out/retrain_confidence.json, written by
//! tests/reference/retrain_confidence.py from scipy.stats.beta.ppf (the one-sided Clopper–Pearson
//! bound) and scipy.stats.betabinom (the predictive of the acceptance count), the mass cross-checked
//! there by numerical integration. The checks: the least passing count, the aimed validation count, the
//! pass probability and the expected lower bound for 447 reachable plans, the highest reachable floor
//! for 93 unreachable ones, and spot values of the predictive.

use std::path::PathBuf;

use approx::assert_abs_diff_eq;
use ballast::train::confidence::{ConfidenceError, Evidence, Plan, Predictive, ReviewerRule};
use serde_json::Value;

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn reference() -> Value {
    let path = root().join("tests/reference/out/retrain_confidence.json");
    serde_json::from_str(&std::fs::read_to_string(path).expect("reference file")).expect("JSON")
}

fn number(v: &Value) -> f64 {
    v.as_f64().expect("a number")
}

fn count(v: &Value) -> usize {
    v.as_u64().expect("a count") as usize
}

#[test]
fn plans_match_scipy() {
    // Source: tests/reference/out/retrain_confidence.json ("plans"), scipy beta.ppf and betabinom.
    let reference = reference();
    let plans = reference["plans"].as_array().expect("plans");
    assert_eq!(plans.len(), 540);
    let (mut reachable, mut unreachable) = (0, 0);
    for p in plans {
        let rule = ReviewerRule {
            floor: number(&p["floor"]),
            confidence: number(&p["confidence"]),
            acceptance_size: count(&p["acceptance"]),
        };
        let n = count(&p["validation"]);
        let q = number(&p["pass"]);
        let passing = rule.passing_count().expect("valid rule");
        assert_eq!(
            passing,
            p["passing_count"].as_u64().map(|k| k as usize),
            "{p}"
        );
        match Plan::new(rule, n, q, Evidence::Prediction) {
            Ok(plan) => {
                assert!(p["reachable"].as_bool().expect("flag"), "{p}");
                assert_eq!(plan.aimed_count, count(&p["aimed_count"]), "{p}");
                assert_abs_diff_eq!(plan.aimed_level, plan.aimed_count as f64 / n as f64);
                assert_abs_diff_eq!(
                    plan.pass_probability_at_aim,
                    number(&p["pass_probability_at_aim"]),
                    epsilon = 1e-9
                );
                assert!(plan.pass_probability_at_aim >= q);
                assert_abs_diff_eq!(
                    plan.expected_lower_bound,
                    number(&p["expected_lower_bound"]),
                    epsilon = 1e-8
                );
                reachable += 1;
            }
            Err(ConfidenceError::Unreachable { highest_floor, .. }) => {
                assert!(!p["reachable"].as_bool().expect("flag"), "{p}");
                assert_abs_diff_eq!(highest_floor, number(&p["highest_floor"]), epsilon = 1e-9);
                assert!(highest_floor < rule.floor);
                unreachable += 1;
            }
            Err(e) => panic!("{p}: {e}"),
        }
    }
    assert_eq!((reachable, unreachable), (447, 93));
}

#[test]
fn the_predictive_matches_scipy_betabinom() {
    // Source: the "predictive" spot values, scipy.stats.betabinom (pmf, sf, mean).
    for s in reference()["predictive"].as_array().expect("spots") {
        let d = Predictive::new(
            count(&s["certified"]),
            count(&s["seen"]),
            count(&s["acceptance"]),
        );
        let k = count(&s["k"]);
        assert_abs_diff_eq!(d.probability(k), number(&s["pmf"]), epsilon = 1e-12);
        assert_abs_diff_eq!(d.at_least(k), number(&s["at_least"]), epsilon = 1e-10);
        let mean = d.mean_of(|k| Ok::<_, ()>(k as f64)).expect("finite");
        assert_abs_diff_eq!(mean, number(&s["mean"]), epsilon = 1e-8);
    }
}
