//! Retraining under a reviewer's confidence rule (`ballast::train::confidence`, `retrain --confidence`).
//!
//! Outside reference: tests/reference/out/retrain_confidence.json, written by
//! tests/reference/retrain_confidence.py from scipy.stats.beta.ppf (the one-sided Clopper–Pearson
//! bound) and scipy.stats.betabinom (the predictive of the acceptance count), the mass cross-checked
//! there by numerical integration. The checks: the least passing count, the aimed validation count, the
//! pass probability and the expected lower bound for 447 reachable plans, the highest reachable floor
//! for 93 unreachable ones, spot values of the predictive, and the figures `ballast retrain` writes
//! into the model's provenance on the demo data.

use std::path::{Path, PathBuf};

use approx::assert_abs_diff_eq;
use ballast::train::confidence::{ConfidenceError, Evidence, Plan, Predictive, ReviewerRule};
use serde_json::Value;

mod common;
use common::cli::{ballast, root};

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

fn folder(name: &str) -> PathBuf {
    let dir =
        std::env::temp_dir().join(format!("ballast-confidence-{name}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp folder");
    dir
}

/// A short demo retraining under the reference table's rule (floor 0.8, 95%); `extra` selects the
/// acceptance data or its size. Returns the exit code and the provenance's confidence record.
fn retrain_demo(name: &str, extra: &[&str]) -> (Option<i32>, Value, String) {
    let dir = folder(name);
    let out = dir.join("m2.json");
    let out_text = out.display().to_string();
    let mut args = vec![
        "retrain",
        "--model",
        "models/pump-mlp.json",
        "--train",
        "demo-data/train.csv",
        "--requirement",
        "demo-data/requirement.toml",
        "--confidence",
        "0.95",
        "--epochs",
        "2",
        "--max-rounds",
        "1",
        "--out",
        &out_text,
    ];
    args.extend_from_slice(extra);
    let (code, stdout, stderr) = ballast(&args);
    assert!(matches!(code, Some(0 | 1)), "{stderr}");
    let model: Value =
        serde_json::from_str(&std::fs::read_to_string(&out).expect("model written")).expect("JSON");
    let sheet = std::fs::read_to_string(dir.join("m2.retrain/retrain.md")).expect("sheet");
    assert!(
        stdout.contains("reviewer's rule (floor 0.8 at 95%)"),
        "{stdout}"
    );
    (
        code,
        model["provenance"]["retrain"]["confidence"].clone(),
        sheet,
    )
}

#[test]
fn retrain_records_the_aim_and_the_prediction() {
    // Source: the reference "table" (floor 0.8, 95%, 360 acceptance samples, 320 validation rows,
    // pass probability 0.95), scipy beta.ppf and betabinom.
    let table = reference()["table"].clone();
    let (code, record, sheet) = retrain_demo("size", &["--acceptance-size", "360"]);
    let plan = &record["plan"];
    assert_eq!(plan["evidence"], "prediction");
    assert_eq!(count(&plan["validation_size"]), 320);
    assert_eq!(
        count(&plan["passing_count"]),
        count(&table["passing_count"])
    );
    let aimed = count(&plan["aimed_count"]);
    // The least count whose pass probability reaches 0.95.
    let pass = table["pass_probability"].as_array().expect("table");
    assert!(number(&pass[aimed]) >= 0.95 && number(&pass[aimed - 1]) < 0.95);
    assert_abs_diff_eq!(
        number(&plan["expected_lower_bound"]),
        number(&table["expected_lower_bound"][aimed]),
        epsilon = 1e-8
    );
    let last = &record["rounds"][0];
    let certified = count(&last["certified"]);
    assert_eq!(count(&last["samples"]), 320);
    let predicted = number(&last["pass_probability"]);
    assert_abs_diff_eq!(predicted, number(&pass[certified]), epsilon = 1e-9);
    assert_abs_diff_eq!(
        number(&last["highest_floor"]),
        number(&table["highest_floor"][certified]),
        epsilon = 1e-9
    );
    // The verdict follows the prediction, and the exit code the verdict.
    let met = last["met"].as_bool().expect("flag");
    assert_eq!(met, predicted >= 0.95);
    assert_eq!(code, Some(if met { 0 } else { 1 }));
    assert!(record["probability_model"]
        .as_str()
        .expect("text")
        .contains("BetaBinomial(m, V + 1, n - V + 1)"));
    assert!(sheet.contains("## The reviewer's check"), "{sheet}");
    assert!(
        sheet.contains(&format!(
            "**{:.4}** ({aimed} certified)",
            aimed as f64 / 320.0
        )),
        "{sheet}"
    );
}

#[test]
fn with_acceptance_data_the_verdict_is_the_reviewers_bound() {
    // Source: the reference "table"'s Clopper–Pearson bounds for 360 samples at 95% (scipy beta.ppf).
    let table = reference()["table"].clone();
    let (code, record, _) = retrain_demo("data", &["--acceptance", "demo-data/acceptance.csv"]);
    assert_eq!(record["plan"]["evidence"], "acceptance_data");
    // The acceptance data is assessed once, after the last round (earlier rounds never see it).
    let rounds = record["rounds"].as_array().expect("rounds");
    let last = rounds.last().expect("a round");
    assert!(rounds[..rounds.len() - 1].iter().all(|r| r.is_null()));
    let certified = count(&last["certified"]);
    assert_eq!(count(&last["samples"]), 360);
    let bound = number(&table["lower_bound"][certified]);
    assert_abs_diff_eq!(number(&last["lower_bound"]), bound, epsilon = 1e-9);
    assert_abs_diff_eq!(number(&last["highest_floor"]), bound, epsilon = 1e-9);
    let met = last["met"].as_bool().expect("flag");
    assert_eq!(met, bound >= 0.8);
    assert_eq!(code, Some(if met { 0 } else { 1 }));
}

fn assert_one_line_error(args: &[&str], expected: &str) {
    let (code, _, stderr) = ballast(args);
    assert_eq!(code, Some(2), "args {args:?}, stderr {stderr}");
    let lines: Vec<&str> = stderr.lines().collect();
    assert_eq!(lines.len(), 1, "{stderr}");
    assert!(lines[0].contains(expected), "{stderr}");
}

#[test]
fn bad_confidence_settings_are_one_line_errors() {
    let dir = folder("errors");
    let out = dir.join("never.json");
    let out_text = out.display().to_string();
    let base = [
        "retrain",
        "--model",
        "models/pump-mlp.json",
        "--train",
        "demo-data/train.csv",
        "--requirement",
        "demo-data/requirement.toml",
        "--out",
        &out_text,
    ];
    let run = |extra: &[&str], expected: &str| {
        let mut args = base.to_vec();
        args.extend_from_slice(extra);
        assert_one_line_error(&args, expected);
    };
    run(
        &["--confidence", "0.95"],
        "--confidence: the reviewer's check needs the acceptance set",
    );
    run(
        &["--confidence", "1.5", "--acceptance-size", "360"],
        "--confidence: 1.5 is not allowed",
    );
    run(
        &[
            "--confidence",
            "0.95",
            "--acceptance-size",
            "360",
            "--acceptance",
            "demo-data/acceptance.csv",
        ],
        "--acceptance-size: not allowed with --acceptance",
    );
    run(&["--acceptance-size", "360"], "only used with --confidence");
    run(
        &[
            "--confidence",
            "0.95",
            "--acceptance-size",
            "360",
            "--pass-probability",
            "1",
        ],
        "--pass-probability: 1 is not allowed",
    );
    // 0.05^(1/30) = 0.905 (the k = n closed form of the bound): a floor of 0.95 cannot be shown on
    // 30 samples at 95% by any model.
    run(
        &[
            "--confidence",
            "0.95",
            "--acceptance-size",
            "30",
            "--floor",
            "0.95",
        ],
        "floor 0.95 cannot be reached at confidence 0.95 on 30 acceptance samples",
    );
    assert!(!out.exists());
}

#[test]
fn the_requirement_files_confidence_key_applies() {
    let dir = folder("file");
    let requirement = dir.join("requirement.toml");
    let demo = std::fs::read_to_string(root().join("demo-data/requirement.toml")).expect("demo");
    let tolerances = root().join("demo-data/tolerances.json");
    let text = demo.replace(
        "tolerances = \"tolerances.json\"",
        &format!(
            "tolerances = {:?}\nconfidence = 0.9",
            tolerances.display().to_string()
        ),
    );
    assert!(text.contains("confidence = 0.9"));
    std::fs::write(&requirement, text).expect("written");
    let requirement_text = requirement.display().to_string();
    let out = dir.join("m2.json").display().to_string();
    let args = [
        "retrain",
        "--model",
        "models/pump-mlp.json",
        "--train",
        "demo-data/train.csv",
        "--requirement",
        &requirement_text,
        "--acceptance-size",
        "360",
        "--epochs",
        "1",
        "--max-rounds",
        "1",
        "--out",
        &out,
    ];
    let (code, _, stderr) = ballast(&args);
    assert!(matches!(code, Some(0 | 1)), "{stderr}");
    let model: Value =
        serde_json::from_str(&std::fs::read_to_string(Path::new(&out)).expect("written"))
            .expect("JSON");
    let plan = &model["provenance"]["retrain"]["confidence"]["plan"];
    assert_abs_diff_eq!(number(&plan["rule"]["confidence"]), 0.9);
    // The wanted pass probability defaults to the confidence level.
    assert_abs_diff_eq!(number(&plan["pass_probability"]), 0.9);
}

#[test]
fn the_evidence_follows_the_data_given() {
    use ballast::data::{load_csv, DataOptions};
    use ballast::model::Model;
    use ballast::threat::requirement::RequirementSpec;
    use ballast::train::confidence::ConfidenceSettings;
    let model = Model::load(&root().join("models/pump-mlp.json")).expect("model");
    let load = |file: &str| {
        load_csv(
            &root().join("demo-data").join(file),
            &model,
            &DataOptions::default(),
        )
        .expect("data")
    };
    let (train, acceptance) = (load("train.csv"), load("acceptance.csv"));
    let spec = |confidence: Option<f64>| RequirementSpec {
        epsilons: Some((vec![0.1], "--eps".into())),
        floor: Some((0.8, "--floor".into())),
        confidence: confidence.map(|c| (c, "--confidence".into())),
        ..Default::default()
    };
    let with = spec(Some(0.95)).resolve(&model).expect("requirement");
    let without = spec(None).resolve(&model).expect("requirement");
    let sized = |size: usize| ConfidenceSettings {
        acceptance_size: Some(size),
        pass_probability: None,
    };
    let none = ConfidenceSettings::default();
    // Validation data standing in for the acceptance data: only a stated size will do.
    assert!(matches!(
        Plan::for_run(&with, &none, Some(&train), &train),
        Err(ConfidenceError::Settings(_))
    ));
    let plan = Plan::for_run(&with, &sized(360), Some(&train), &train)
        .expect("plan")
        .expect("a confidence level");
    assert_eq!(plan.evidence, Evidence::Prediction);
    assert_eq!(
        (plan.rule.acceptance_size, plan.validation_size),
        (360, train.len())
    );
    let checked = plan.check_requirement(&with);
    assert_eq!((checked.floor, checked.confidence), (None, None));
    // Acceptance data of its own: its size, which a stated size must match.
    let plan = Plan::for_run(&with, &none, Some(&train), &acceptance)
        .expect("plan")
        .expect("a confidence level");
    assert_eq!(plan.evidence, Evidence::AcceptanceData);
    assert_eq!(plan.rule.acceptance_size, acceptance.len());
    assert_eq!(plan.check_requirement(&with), with);
    assert!(Plan::for_run(&with, &sized(359), Some(&train), &acceptance).is_err());
    assert!(Plan::for_run(&with, &none, None, &acceptance).is_err());
    // Without a confidence level there is no plan, and its settings are refused.
    assert_eq!(
        Plan::for_run(&without, &none, Some(&train), &acceptance),
        Ok(None)
    );
    assert!(Plan::for_run(&without, &sized(360), Some(&train), &acceptance).is_err());
}
