//! Command-line behaviour a first-time user meets: every numeric flag takes negative values as values
//! (so the validation step, not the parser, answers with the one-line error naming the flag), the
//! input-range policy, and the consistency of the subcommands' flags. Each case runs the built binary.

use std::path::{Path, PathBuf};
use std::process::Command;

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Runs the binary; returns (exit code, stdout, stderr).
fn ballast(args: &[&str]) -> (Option<i32>, String, String) {
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

/// Asserts exit 2 and exactly one stderr line, equal to `expected`.
fn assert_one_line_error(args: &[&str], expected: &str) {
    let (code, _, stderr) = ballast(args);
    assert_eq!(code, Some(2), "args {args:?}, stderr {stderr}");
    let lines: Vec<&str> = stderr.lines().collect();
    assert_eq!(lines, vec![expected], "args {args:?}");
}

const MODEL: &str = "models/pump-mlp.json";
const DATA: &str = "demo-data/acceptance.csv";
const TRAIN: &str = "demo-data/train.csv";

#[test]
fn negative_numbers_reach_the_validation_step_in_either_form() {
    let eps = "error: --eps: -0.1 is not allowed, expected a finite number ≥ 0";
    let floor = "error: --floor: -0.1 is not allowed, expected a fraction in [0, 1]";
    let budget = "error: --budget: -1 is not allowed, expected seconds ≥ 0";
    for (tail, expected) in [
        (vec!["--eps", "-0.1"], eps),
        (vec!["--eps=-0.1"], eps),
        (vec!["--eps", "0.1", "--floor", "-0.1"], floor),
        (vec!["--eps", "0.1", "--floor=-0.1"], floor),
        (vec!["--eps", "0.1", "--budget", "-1"], budget),
        (vec!["--eps", "0.1", "--budget=-1"], budget),
    ] {
        let mut args = vec!["certify", "--model", MODEL, "--data", DATA];
        args.extend(tail);
        assert_one_line_error(&args, expected);
    }
    assert_one_line_error(
        &[
            "certify", "--model", MODEL, "--data", DATA, "--eps", "0.1", "--floor", "-1e-3",
        ],
        "error: --floor: -0.001 is not allowed, expected a fraction in [0, 1]",
    );
    assert_one_line_error(
        &["attack", "--model", MODEL, "--data", DATA, "--eps", "-0.1"],
        eps,
    );
    assert_one_line_error(
        &[
            "retrain",
            "--model",
            MODEL,
            "--train",
            TRAIN,
            "--eps",
            "-0.1",
            "--floor",
            "0.5",
            "--out",
            "unused.json",
        ],
        eps,
    );
    assert_one_line_error(
        &[
            "retrain",
            "--model",
            MODEL,
            "--train",
            TRAIN,
            "--eps",
            "0.1",
            "--floor",
            "-0.1",
            "--out",
            "unused.json",
        ],
        floor,
    );
    assert!(!Path::new(&root().join("unused.json")).exists());
}
