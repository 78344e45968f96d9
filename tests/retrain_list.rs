//! `ballast retrain` against a requirement list on the pump-fleet demo (two budgets and a per-class
//! floor, the sensor tolerances of demo-data/tolerances.json): the retrainer either proves every line
//! on the acceptance set or names the lines it could not prove with the levels it reached. Its claim
//! is checked against a separate `ballast certify` run of the written model on the same list (the
//! certify pipeline's verdict is the one design.md fixes; the retrainer must not report a different
//! one). A list that cannot hold is retrained with `--relax`: exit 1, the failing lines named, their
//! relaxation above 0.

use std::path::Path;
use std::process::Command;

use ballast::certify::report::{Report, Verdict};

const MODEL: &str = "models/pump-mlp.json";
const TRAIN: &str = "demo-data/train.csv";
const ACCEPTANCE: &str = "demo-data/acceptance.csv";

fn run(args: &[&str]) -> (i32, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(args)
        .output()
        .expect("ballast runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// A requirement list over the demo tolerances: `lines` as (epsilon scale, floor, class).
fn requirement(dir: &Path, lines: &[(f64, f64, Option<&str>)]) -> String {
    let tolerances = std::fs::canonicalize("demo-data/tolerances.json").unwrap();
    let mut text = format!(
        "norm = \"linf\"\ntolerances = \"{}\"\n",
        tolerances.display()
    );
    for (epsilon, floor, class) in lines {
        text.push_str(&format!(
            "\n[[requirements]]\nepsilon = {epsilon}\nfloor = {floor}\n"
        ));
        if let Some(c) = class {
            text.push_str(&format!("class = \"{c}\"\n"));
        }
    }
    let path = dir.join("release.toml");
    std::fs::write(&path, text).unwrap();
    path.to_str().unwrap().to_string()
}

fn retrain(dir: &Path, requirement: &str, extra: &[&str]) -> (i32, String, String) {
    let out = dir.join("m2.json");
    let mut args = vec![
        "retrain",
        "--model",
        MODEL,
        "--train",
        TRAIN,
        "--acceptance",
        ACCEPTANCE,
        "--requirement",
        requirement,
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    let (code, _, stderr) = run(&args);
    assert!(code == 0 || code == 1, "retrain: {stderr}");
    let sheet = std::fs::read_to_string(dir.join("m2.retrain/retrain.md")).expect("sheet");
    (code, sheet, out.to_str().unwrap().to_string())
}

fn certify(dir: &Path, model: &str, requirement: &str) -> (i32, Report) {
    let report = dir.join("after.json");
    let (code, _, stderr) = run(&[
        "certify",
        "--model",
        model,
        "--data",
        ACCEPTANCE,
        "--requirement",
        requirement,
        "--report",
        report.to_str().unwrap(),
    ]);
    assert!(code == 0 || code == 1 || code == 3, "certify: {stderr}");
    let text = std::fs::read_to_string(report).unwrap();
    (code, Report::from_json_str(&text).unwrap())
}

#[test]
fn two_budgets_and_a_class_floor_are_met_or_the_shortfall_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let list = requirement(
        dir.path(),
        &[
            (0.5, 0.85, None),
            (1.0, 0.75, None),
            (1.0, 0.8, Some("bearing-wear")),
        ],
    );
    let (code, sheet, model) = retrain(dir.path(), &list, &["--dual-step", "0.5"]);
    let (certify_code, report) = certify(dir.path(), &model, &list);
    assert_eq!(report.requirements.len(), 3);
    // The retrainer's verdict is certify's on the acceptance set.
    assert_eq!(code == 0, certify_code == 0, "{sheet}");
    for line in &report.requirements {
        assert!(sheet.contains(&line.requirement), "{sheet}");
    }
    if code == 1 {
        // Every line certify does not prove is named with the level it reached.
        for line in report
            .requirements
            .iter()
            .filter(|l| l.verdict != Verdict::Pass)
        {
            let reached = format!(
                "{}: reached {:.2}%",
                line.requirement,
                line.measured * 100.0
            );
            assert!(sheet.contains(&reached), "{reached} missing from\n{sheet}");
        }
    }
    // One price per line, in the list's order.
    let provenance = std::fs::read_to_string(&model).unwrap();
    let value: serde_json::Value = serde_json::from_str(&provenance).unwrap();
    let prices = value["provenance"]["retrain"]["prices"].as_array().unwrap();
    assert_eq!(prices.len(), 3);
    for (price, line) in prices.iter().zip(&report.requirements) {
        assert_eq!(price["constraint"], line.requirement.as_str());
        assert!(price["multiplier"].as_f64().unwrap() >= 0.0);
    }
    assert!(dir.path().join("m2.retrain/multipliers.svg").is_file());
    // models/pump-mlp.json was trained on demo-data/train.csv (its provenance names that file's
    // SHA-256), so validation rows held out of it are not new to the model: the sheet says so.
    assert!(
        sheet.contains("not new to the model") && sheet.contains(TRAIN),
        "{sheet}"
    );
}

#[test]
fn floors_that_cannot_all_hold_are_relaxed_named_and_exit_one() {
    let dir = tempfile::tempdir().unwrap();
    // 99% of the samples certified at the full sensor tolerance is beyond this small network (the
    // parent reaches 68%), together with a second budget.
    let list = requirement(dir.path(), &[(0.5, 0.9, None), (1.0, 0.99, None)]);
    let (code, sheet, model) = retrain(dir.path(), &list, &["--relax", "--epochs", "12"]);
    assert_eq!(code, 1, "{sheet}");
    let (certify_code, report) = certify(dir.path(), &model, &list);
    assert_eq!(certify_code, 1);
    let hard = &report.requirements[1];
    assert_ne!(hard.verdict, Verdict::Pass);
    assert!(
        sheet.contains(&format!(
            "{}: reached {:.2}%",
            hard.requirement,
            hard.measured * 100.0
        )),
        "{sheet}"
    );
    assert!(sheet.contains("could not all hold"), "{sheet}");
    let value: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&model).unwrap()).unwrap();
    let relaxed = value["provenance"]["retrain"]["prices"][1]["relaxed_by"]
        .as_f64()
        .unwrap();
    assert!(relaxed > 0.0, "the 99% floor was not relaxed: {relaxed}");
}
