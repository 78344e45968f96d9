//! Running the built binary from the project root, as a user does, for the test crates that drive the
//! command line.

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;

/// The project root (where the bundled demo data and models are).
pub fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Runs the binary with `args` from the project root; returns (exit code, stdout, stderr).
pub fn ballast(args: &[&str]) -> (Option<i32>, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(args)
        .current_dir(root())
        .output()
        .expect("the binary runs");
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// Certifies `model` on the demo acceptance set with `tolerances` at epsilon 2 and floor 0.5, and
/// returns the report read as plain JSON.
pub fn certify_demo_acceptance(model: &str, tolerances: &Path, report: &Path) -> Value {
    let (code, _, err) = ballast(&[
        "certify",
        "--model",
        model,
        "--data",
        "demo-data/acceptance.csv",
        "--tolerances",
        tolerances.to_str().unwrap(),
        "--eps",
        "2",
        "--floor",
        "0.5",
        "--report",
        report.to_str().unwrap(),
    ]);
    assert!(matches!(code, Some(0 | 1 | 3)), "{err}");
    serde_json::from_str(&std::fs::read_to_string(report).unwrap()).unwrap()
}
