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
