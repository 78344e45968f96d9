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

/// A two-input model with range [0, 1] and a data file in a fresh folder.
fn range_fixture(name: &str, rows: &str) -> (PathBuf, PathBuf) {
    let dir = std::env::temp_dir().join(format!("ballast-cli-{name}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp folder");
    let model = dir.join("m.json");
    std::fs::write(
        &model,
        r#"{"format":"ballast.model/1","input":{"dim":2,"names":["a","b"],"lower":0.0,"upper":1.0},
           "layers":[{"kind":"dense","weights":[[1.0,-1.0],[-1.0,1.0]],"bias":[0.0,0.0]}]}"#,
    )
    .expect("model written");
    let data = dir.join("d.csv");
    std::fs::write(&data, format!("a,b,label\n{rows}")).expect("data written");
    (model, data)
}

#[test]
fn values_a_few_ulps_past_the_range_count_as_on_it() {
    // 1.0000000000000002 is 1 + 2^-52, one unit in the last place above 1 (IEEE 754 double, common
    // practice); a min-max scaler's output can end there.
    let (m, d) = range_fixture(
        "ulps",
        "1.0000000000000002,0.2,0\n0.1,-0.0000000000000000001,1\n",
    );
    let (code, stdout, stderr) = ballast(&[
        "evaluate",
        "--model",
        m.to_str().unwrap(),
        "--data",
        d.to_str().unwrap(),
    ]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(stdout.contains("samples: 2"), "{stdout}");
    // Five units past 1 (1 + 5 * 2^-52 = 1.0000000000000011) is beyond the allowance of four.
    let (m, d) = range_fixture("ulps5", "1.0000000000000011,0.2,0\n");
    let expected = format!(
        "error: {}: row 2, column \"a\": 1.0000000000000011 lies outside the model's input range [0, 1] (--out-of-range clip or skip accepts such rows)",
        d.display()
    );
    assert_one_line_error(
        &[
            "evaluate",
            "--model",
            m.to_str().unwrap(),
            "--data",
            d.to_str().unwrap(),
        ],
        &expected,
    );
}

#[test]
fn out_of_range_policy_error_clip_skip() {
    let (m, d) = range_fixture("policy", "0.5,0.2,0\n1.5,0.2,0\n0.1,0.9,1\n");
    let (m, d) = (m.to_str().unwrap(), d.to_str().unwrap());
    assert_one_line_error(
        &["evaluate", "--model", m, "--data", d],
        &format!("error: {d}: row 3, column \"a\": 1.5 lies outside the model's input range [0, 1] (--out-of-range clip or skip accepts such rows)"),
    );
    let (code, stdout, stderr) = ballast(&[
        "evaluate",
        "--model",
        m,
        "--data",
        d,
        "--out-of-range",
        "clip",
    ]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(stdout.contains("samples: 3"), "{stdout}");
    assert!(
        stderr.contains("1 of 3 rows had values outside the model's input range"),
        "{stderr}"
    );
    let (code, stdout, stderr) = ballast(&[
        "evaluate",
        "--model",
        m,
        "--data",
        d,
        "--out-of-range",
        "skip",
    ]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(stdout.contains("samples: 2"), "{stdout}");
    assert!(
        stderr.contains("1 rows lie outside the model's input range and were left out"),
        "{stderr}"
    );
    assert_one_line_error(
        &[
            "certify",
            "--model",
            m,
            "--data",
            d,
            "--eps",
            "0.1",
            "--out-of-range",
            "wrap",
        ],
        "error: --out-of-range: \"wrap\" is not a policy, expected error, clip or skip",
    );
}

#[test]
fn inspect_takes_model_as_flag_or_positional() {
    let (code, by_flag, stderr) = ballast(&["inspect", "--model", MODEL]);
    assert_eq!(code, Some(0), "{stderr}");
    let (code, positional, stderr) = ballast(&["inspect", MODEL]);
    assert_eq!(code, Some(0), "{stderr}");
    assert_eq!(by_flag, positional);
    // 12 inputs: the demo model's input.dim in models/pump-mlp.json.
    assert!(by_flag.contains("inputs: 12"), "{by_flag}");
    let (code, _, _) = ballast(&["inspect"]);
    assert_eq!(code, Some(2));
}

#[test]
fn the_demo_output_folder_is_ignored_by_git() {
    let ignore = std::fs::read_to_string(root().join(".gitignore")).expect(".gitignore");
    assert!(ignore.lines().any(|l| l.trim() == "ballast-demo/"));
}

#[test]
fn progress_line_only_on_a_terminal_or_when_asked() {
    // The test's stderr is a pipe, not a terminal: silent by default.
    let args = ["certify", "--model", MODEL, "--data", DATA, "--eps", "0.05"];
    let (code, stdout, stderr) = ballast(&args);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(!stderr.contains("progress:"), "{stderr}");
    let samples = stdout
        .lines()
        .find_map(|l| l.strip_prefix("samples: "))
        .expect("summary names the sample count")
        .to_string();
    // Asked for: plain lines on stderr, the last one with every sample, the rate and the estimate;
    // standard output unchanged.
    let mut asked = args.to_vec();
    asked.push("--progress");
    let (code, stdout_asked, stderr) = ballast(&asked);
    assert_eq!(code, Some(0), "{stderr}");
    assert_eq!(stdout_asked, stdout);
    let last = stderr
        .lines()
        .rfind(|l| l.starts_with("progress: "))
        .unwrap_or_else(|| panic!("no progress line in {stderr:?}"));
    assert!(
        last.starts_with(&format!("progress: {samples}/{samples} samples ")),
        "{last}"
    );
    assert!(
        last.contains(" samples/s, ETA 0s") && last.contains("certified "),
        "{last}"
    );
}

#[test]
fn progress_line_names_the_search_phase() {
    // 60 digits rows at eps 0.05 leave samples open after the bounds, so branch and bound runs.
    let dir = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(root().join("tests/data/digits_test.csv")).unwrap();
    let rows: Vec<&str> = text.lines().take(61).collect();
    let data = dir.path().join("digits60.csv");
    std::fs::write(&data, rows.join("\n") + "\n").unwrap();
    let (code, _, stderr) = ballast(&[
        "certify",
        "--model",
        "tests/data/digits_mlp.model.json",
        "--data",
        data.to_str().unwrap(),
        "--eps",
        "0.05",
        "--budget",
        "0.05",
        "--progress",
    ]);
    assert!(matches!(code, Some(0)), "{stderr}");
    assert!(
        stderr
            .lines()
            .any(|l| l.starts_with("progress: ") && l.contains("branch and bound, ETA ")),
        "{stderr}"
    );
    assert!(
        stderr
            .lines()
            .last()
            .unwrap_or("")
            .starts_with("progress: 60/60 samples "),
        "{stderr}"
    );
}
