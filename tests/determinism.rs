//! Determinism: the same inputs (and seed) give the same output, whatever the number of worker threads.
//!
//! Runs the built binary twice with identical arguments and once more with a different
//! `RAYON_NUM_THREADS`, and compares the outputs byte for byte.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

fn fixture(name: &str) -> PathBuf {
    root().join("tests/data").join(name)
}

fn ballast(args: &[&str], threads: usize) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(args)
        .env("RAYON_NUM_THREADS", threads.to_string())
        .output()
        .expect("the binary runs")
}

#[test]
fn evaluate_is_byte_identical_across_runs_and_thread_counts() {
    let model = fixture("digits_mlp_deep.model.json");
    let data = fixture("digits_test.csv");
    let args = [
        "evaluate",
        "--model",
        model.to_str().expect("utf-8 path"),
        "--data",
        data.to_str().expect("utf-8 path"),
    ];
    let first = ballast(&args, 2);
    assert!(
        first.status.success(),
        "{}",
        String::from_utf8_lossy(&first.stderr)
    );
    let text = String::from_utf8_lossy(&first.stdout);
    assert!(text.contains("samples: 540"), "{text}");
    let second = ballast(&args, 2);
    let single = ballast(&args, 1);
    assert_eq!(first.stdout, second.stdout, "two identical runs differ");
    assert_eq!(first.stdout, single.stdout, "1 thread and 2 threads differ");
    assert_eq!(first.status.code(), single.status.code());
}

#[test]
fn inspect_is_byte_identical_across_runs() {
    let model = fixture("digits_mlp.model.json");
    let args = ["inspect", model.to_str().expect("utf-8 path")];
    let first = ballast(&args, 2);
    assert!(
        first.status.success(),
        "{}",
        String::from_utf8_lossy(&first.stderr)
    );
    assert!(String::from_utf8_lossy(&first.stdout).contains("inputs: 64"));
    assert_eq!(first.stdout, ballast(&args, 1).stdout);
}

/// The report with the fields that legitimately vary between identical runs removed: the run's date and
/// every timing (`seconds`, `stage_seconds`, `...seconds` except the `budget_seconds` setting).
fn without_timings(value: serde_json::Value) -> serde_json::Value {
    use serde_json::Value;
    match value {
        Value::Object(map) => Value::Object(
            map.into_iter()
                .filter(|(k, _)| k != "date" && !(k.ends_with("seconds") && k != "budget_seconds"))
                .map(|(k, v)| (k, without_timings(v)))
                .collect(),
        ),
        Value::Array(items) => Value::Array(items.into_iter().map(without_timings).collect()),
        other => other,
    }
}

struct CertifyRun {
    report: serde_json::Value,
    counterexamples: Option<Vec<u8>>,
    stdout: Vec<u8>,
    code: Option<i32>,
}

/// Runs `certify` in a fresh folder with a relative report path, so the command line is identical.
fn certify(model: &str, eps: &str, seed: &str, threads: usize) -> CertifyRun {
    let folder = tempfile::tempdir().expect("temporary folder");
    let data = fixture("digits_test.csv");
    let output = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .current_dir(folder.path())
        .args(["certify", "--model"])
        .arg(fixture(model))
        .arg("--data")
        .arg(&data)
        .args([
            "--eps", eps, "--seed", seed, "--floor", "0.5", "--report", "r.json",
        ])
        .env("RAYON_NUM_THREADS", threads.to_string())
        .output()
        .expect("the binary runs");
    assert!(
        matches!(output.status.code(), Some(0 | 1 | 3)),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let text = std::fs::read_to_string(folder.path().join("r.json")).expect("report written");
    CertifyRun {
        report: serde_json::from_str(&text).expect("report is JSON"),
        counterexamples: std::fs::read(folder.path().join("r.counterexamples.csv")).ok(),
        stdout: output.stdout,
        code: output.status.code(),
    }
}

fn statuses(report: &serde_json::Value) -> Vec<String> {
    report["samples"]
        .as_array()
        .expect("samples")
        .iter()
        .map(|s| s["status"].as_str().expect("status").to_owned())
        .collect()
}

#[test]
fn certify_reports_are_identical_apart_from_timings() {
    for model in ["digits_mlp.model.json", "digits_mlp_deep.model.json"] {
        let first = certify(model, "0.03", "7", 2);
        let second = certify(model, "0.03", "7", 2);
        let single = certify(model, "0.03", "7", 1);
        let statuses_first = statuses(&first.report);
        assert_eq!(statuses_first.len(), 540);
        // The run must decide both ways, or the comparison below says little.
        assert!(
            statuses_first.iter().any(|s| s == "certified"),
            "{model}: nothing certified"
        );
        assert!(
            statuses_first.iter().any(|s| s == "counterexample"),
            "{model}: no counterexample"
        );
        assert_eq!(
            statuses_first,
            statuses(&single.report),
            "{model}: 1 and 2 threads give other statuses"
        );
        let stripped = without_timings(first.report.clone());
        assert_eq!(
            stripped,
            without_timings(second.report),
            "{model}: two identical runs differ"
        );
        assert_eq!(
            stripped,
            without_timings(single.report),
            "{model}: 1 and 2 threads differ"
        );
        assert_eq!(
            first.counterexamples, second.counterexamples,
            "{model}: counterexample files differ"
        );
        assert_eq!(
            first.counterexamples, single.counterexamples,
            "{model}: counterexample files differ"
        );
        assert_eq!(
            first.stdout, single.stdout,
            "{model}: printed summaries differ"
        );
        assert_eq!(first.code, single.code);
    }
}

#[test]
fn another_seed_keeps_the_sound_decisions() {
    // Certified samples are proven by bounds, which use no randomness, and a sound proof rules out any
    // counterexample: a different attack seed may find other counterexamples but, when nothing is left
    // unresolved, must certify exactly the same samples.
    let a = certify("digits_mlp.model.json", "0.03", "1", 2);
    let b = certify("digits_mlp.model.json", "0.03", "2", 2);
    let certified = |r: &CertifyRun| -> Vec<usize> {
        statuses(&r.report)
            .iter()
            .enumerate()
            .filter(|(_, s)| *s == "certified")
            .map(|(i, _)| i)
            .collect()
    };
    let unresolved = |r: &CertifyRun| {
        statuses(&r.report)
            .iter()
            .filter(|s| *s == "unresolved")
            .count()
    };
    // At this budget the bounds and the attack decide every sample (otherwise the claim is void).
    assert_eq!((unresolved(&a), unresolved(&b)), (0, 0));
    assert_eq!(certified(&a), certified(&b));
    assert!(!certified(&a).is_empty());
}
