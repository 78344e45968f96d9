//! Command-line behaviour a first-time user meets: every numeric flag takes negative values as values
//! (so the validation step, not the parser, answers with the one-line error naming the flag), the
//! input-range policy, and the consistency of the subcommands' flags. Each case runs the built binary.

use std::path::{Path, PathBuf};

mod common;
use common::cli::{ballast, root};

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
    // A convolutional model names its input shape: models/pump-cnn.json has input.shape [1, 64].
    let cnn = root().join("models").join("pump-cnn.json");
    let (code, out, stderr) = ballast(&["inspect", "--model", cnn.to_str().unwrap()]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(out.contains("inputs: 64 of shape [1, 64]"), "{out}");
}

#[test]
fn the_demo_output_folder_is_ignored_by_git() {
    let ignore = std::fs::read_to_string(root().join(".gitignore")).expect(".gitignore");
    assert!(ignore.lines().any(|l| l.trim() == "ballast-demo/"));
}

/// The rows the input-range policy changed reach the report (policy, rows in the file, row numbers)
/// and the sheet (a figure and a caution). The fixture's rows 3 and 5 (header = row 1) lie outside
/// [0, 1]; row 4 lies within four units in the last place of 1 and counts as on it.
#[test]
fn range_policy_counts_reach_the_report_and_the_sheet() {
    let (m, d) = range_fixture(
        "counts",
        "0.5,0.2,0\n1.5,0.2,0\n1.0000000000000002,0.9,1\n0.1,-3,1\n0.3,0.4,1\n",
    );
    let dir = m.parent().unwrap().to_path_buf();
    for (policy, clipped, skipped, samples) in [
        ("clip", vec![3, 5], vec![], 5),
        ("skip", vec![], vec![3, 5], 3),
    ] {
        let report = dir.join(format!("{policy}.json"));
        let sheet = dir.join(format!("{policy}-sheet"));
        let (code, _, stderr) = ballast(&[
            "certify",
            "--model",
            m.to_str().unwrap(),
            "--data",
            d.to_str().unwrap(),
            "--eps",
            "0.01",
            "--out-of-range",
            policy,
            "--report",
            report.to_str().unwrap(),
            "--sheet",
            sheet.to_str().unwrap(),
        ]);
        assert_eq!(code, Some(0), "{stderr}");
        let json: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(&report).unwrap()).unwrap();
        let range = &json["data"]["out_of_range"];
        assert_eq!(range["policy"], policy);
        assert_eq!(range["rows_in_file"], 5);
        assert_eq!(range["clipped"], serde_json::json!(clipped));
        assert_eq!(range["skipped"], serde_json::json!(skipped));
        assert_eq!(json["data"]["samples"], samples);
        let md = std::fs::read_to_string(sheet.join("sheet.md")).unwrap();
        let figure = if policy == "clip" {
            "| Rows clipped | 2 of 5 |"
        } else {
            "| Rows left out | 2 of 5 |"
        };
        assert!(md.contains(figure), "{md}");
        assert!(md.contains("rows 3 and 5 (header = row 1)"), "{md}");
    }
}

/// Reads a CSV file into its header and rows of fields.
fn read_csv(path: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let text = std::fs::read_to_string(path).expect("CSV written");
    let mut lines = text.lines();
    let header = lines
        .next()
        .expect("a header")
        .split(',')
        .map(String::from)
        .collect();
    let rows = lines
        .map(|l| l.split(',').map(String::from).collect())
        .collect();
    (header, rows)
}

/// `attack` takes the tolerance file and the class-change flags as `certify` does. Checked against the
/// files themselves: every counterexample moves a faulty pump into `normal` (the only class the rule
/// forbids; a normal sample has nothing forbidden) and moves each feature by at most its tolerance from
/// the tolerance file (the L-inf ball of docs/requirement-format.md, radius = 1 × tolerance), measured
/// from the sample's row in the data file.
#[test]
fn attack_takes_the_tolerance_file_and_the_class_change_rule() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("cx.csv");
    let (code, stdout, stderr) = ballast(&[
        "attack",
        "--model",
        MODEL,
        "--data",
        DATA,
        "--eps",
        "demo-data/tolerances.json",
        "--forbid-into",
        "normal",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(
        stdout.contains("only a change into normal counts"),
        "{stdout}"
    );
    let tolerances: serde_json::Map<String, serde_json::Value> = serde_json::from_str(
        &std::fs::read_to_string(root().join("demo-data/tolerances.json")).unwrap(),
    )
    .unwrap();
    let (data_header, data_rows) = read_csv(&root().join(DATA));
    let (header, rows) = read_csv(&out);
    assert!(!rows.is_empty(), "the demo model has counterexamples here");
    for row in &rows {
        assert_eq!(row[2], "normal", "{row:?}");
        assert_ne!(row[1], "normal", "{row:?}");
        let sample: usize = row[0].parse().unwrap();
        let original = &data_rows[sample];
        assert_eq!(original[0], row[1], "label of sample {sample}");
        for (name, tolerance) in &tolerances {
            let c = header.iter().position(|h| h == name).unwrap();
            let d = data_header.iter().position(|h| h == name).unwrap();
            let moved =
                (row[c].parse::<f64>().unwrap() - original[d].parse::<f64>().unwrap()).abs();
            // The CSV holds the data's decimals; allow the rounding of one subtraction.
            assert!(
                moved <= tolerance.as_f64().unwrap() * (1.0 + 1e-12),
                "sample {sample}, {name}: moved {moved}"
            );
        }
    }
    // The requirement file gives the same budget and rule (docs: demo-data/requirement.toml), and
    // its floor decides the exit: an attack can refute a floor (1) or leave it open (3), never pass it.
    let (code, stdout, stderr) = ballast(&[
        "attack",
        "--model",
        MODEL,
        "--data",
        DATA,
        "--requirement",
        "demo-data/requirement.toml",
    ]);
    assert!(matches!(code, Some(1 | 3)), "{stderr}");
    let found: usize = stdout
        .lines()
        .find_map(|l| l.strip_prefix("counterexamples: "))
        .and_then(|n| n.parse().ok())
        .expect("a count of counterexamples");
    // The file's rule is the same for faulty pumps and adds any change of a normal sample; a sample's
    // attack outcome does not depend on the other samples of the batch (docs/attack.md), so every
    // counterexample of the first run is found again.
    assert!(found >= rows.len(), "{stdout}");
}

#[test]
fn retrain_and_attack_offer_only_the_budget_forms_they_accept() {
    let one = "error: --eps: no budget given: pass --eps with one number or a tolerance file, or --tolerances FILE, or --requirement FILE with epsilon or tolerances";
    assert_one_line_error(
        &[
            "retrain",
            "--model",
            MODEL,
            "--train",
            TRAIN,
            "--floor",
            "0.5",
            "--out",
            "unused.json",
        ],
        one,
    );
    assert_one_line_error(&["attack", "--model", MODEL, "--data", DATA], one);
    assert_one_line_error(
        &["certify", "--model", MODEL, "--data", DATA],
        "error: --eps: no budget given: pass --eps with a number, a list, a range or a tolerance file, or --tolerances FILE, or --requirement FILE with epsilon or tolerances",
    );
    assert_one_line_error(
        &[
            "retrain", "--model", MODEL, "--train", TRAIN, "--eps", "0.1,0.2", "--floor", "0.5",
            "--out", "unused.json",
        ],
        "error: --eps: \"0.1,0.2\" is a sweep, expected one number or a tolerance file (only certify sweeps)",
    );
    // --tolerances reaches the requirement: a missing file is named.
    let (code, _, stderr) = ballast(&[
        "retrain",
        "--model",
        MODEL,
        "--train",
        TRAIN,
        "--tolerances",
        "no-such-tolerances.json",
        "--floor",
        "0.5",
        "--out",
        "unused.json",
    ]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("no-such-tolerances.json"), "{stderr}");
    assert!(!root().join("unused.json").exists());
}

#[test]
fn retrain_checks_its_output_before_training() {
    let dir = tempfile::tempdir().unwrap();
    let folder = dir.path().to_str().unwrap();
    assert_one_line_error(
        &[
            "retrain", "--model", MODEL, "--train", TRAIN, "--eps", "0.1", "--floor", "0.5",
            "--out", folder,
        ],
        &format!("error: --out: {folder}: is a folder, expected a file name"),
    );
    let missing = dir.path().join("no-such-folder").join("m.json");
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
            "0.5",
            "--out",
            missing.to_str().unwrap(),
        ],
        &format!(
            "error: --out: {}: the folder {} does not exist",
            missing.display(),
            dir.path().join("no-such-folder").display()
        ),
    );
    // A file where the log and sheet folder goes.
    let out = dir.path().join("m.json");
    std::fs::write(dir.path().join("m.retrain"), "in the way").unwrap();
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
            "0.5",
            "--out",
            out.to_str().unwrap(),
        ],
        &format!(
            "error: --out: {} is a file, but the log and sheet go into a folder of that name",
            dir.path().join("m.retrain").display()
        ),
    );
    assert!(!out.exists());
}

/// The help of `certify`, `attack` and `retrain`: options grouped under headings, the requirement
/// flags word for word the same in all three, every default in one form (`[default: …]`).
#[test]
fn help_is_grouped_and_the_requirement_flags_read_the_same() {
    let section = |help: &str, heading: &str| -> String {
        let start = help.find(&format!("\n{heading}:\n")).expect(heading);
        let rest = &help[start + heading.len() + 3..];
        rest[..rest.find("\n\n").unwrap_or(rest.len())].to_string()
    };
    let mut requirement_blocks = Vec::new();
    for command in ["certify", "attack", "retrain"] {
        let (code, help, _) = ballast(&[command, "--help"]);
        assert_eq!(code, Some(0));
        for heading in ["Inputs", "Requirement", "Output"] {
            assert!(
                help.contains(&format!("\n{heading}:\n")),
                "{command}: {heading}"
            );
        }
        assert!(!help.contains("(default"), "{command}: {help}");
        let block = section(&help, "Requirement");
        for flag in [
            "--eps",
            "--tolerances",
            "--requirement",
            "--norm",
            "--floor",
            "--forbid-into",
            "--forbid-from",
        ] {
            assert!(block.contains(flag), "{command}: {flag}");
        }
        // The shared flags come first; certify adds its own after them. Clap lays long help out
        // in one or two columns, so compare the words.
        let words = block.split_whitespace().collect::<Vec<_>>().join(" ");
        let end = "(others: any change counts)";
        let shared = &words[..words.find(end).expect("--forbid-from's help") + end.len()];
        requirement_blocks.push(shared.to_string());
    }
    assert_eq!(requirement_blocks[0], requirement_blocks[1]);
    assert_eq!(requirement_blocks[0], requirement_blocks[2]);
}

/// `retrain` without `--model`: a requirement file names no model, so the one-line error says what is
/// missing and what to give (exit 2, nothing written); the advanced formulation flags sit under a
/// heading of their own, apart from the common training schedule.
#[test]
fn retrain_without_a_model_says_what_is_missing() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("m2.json");
    assert_one_line_error(
        &[
            "retrain",
            "--requirement",
            "demo-data/requirement.toml",
            "--train",
            TRAIN,
            "--out",
            out.to_str().unwrap(),
        ],
        "error: --model: missing; retrain fine-tunes a model and a requirement file names none: give --model M.json (with --hidden it supplies only the input range, feature names and classes)",
    );
    assert!(!out.exists());
    let (code, help, _) = ballast(&["retrain", "--help"]);
    assert_eq!(code, Some(0));
    let advanced = &help[help.find("\nFormulation (advanced):\n").expect("heading")..];
    let advanced = &advanced[..advanced.find("\nKept weights:\n").expect("next heading")];
    for flag in [
        "--loss",
        "--constraint",
        "--penalty",
        "--dual-step",
        "--slack ",
    ] {
        assert!(
            advanced.contains(flag),
            "{flag} not under the heading:\n{advanced}"
        );
    }
    assert!(!advanced.contains("--epochs <"), "{advanced}");
}

/// An ONNX model imported without input names, with a tolerance file keyed by the data's names: the
/// error says what the inputs are called and how to name them (the ONNX fixture is scikit-learn's
/// breast-cancer pipeline, 30 inputs, see tests/reference/onnx_fixtures.py).
#[test]
fn unnamed_inputs_and_a_tolerance_file_by_name_get_a_hint() {
    let dir = tempfile::tempdir().unwrap();
    let tolerances = dir.path().join("t.csv");
    std::fs::write(&tolerances, "feature,tolerance\narea_error,1.0\n").unwrap();
    let data = dir.path().join("d.csv");
    let header: Vec<String> = (0..30).map(|i| format!("f{i}")).collect();
    std::fs::write(
        &data,
        format!("{},label\n{}0\n", header.join(","), "1,".repeat(30)),
    )
    .unwrap();
    assert_one_line_error(
        &[
            "certify",
            "--model",
            "tests/data/onnx/sklearn_breast_cancer_mlp.onnx",
            "--data",
            data.to_str().unwrap(),
            "--tolerances",
            tolerances.to_str().unwrap(),
        ],
        &format!(
            "error: {}: row 2, column \"tolerance\": \"area_error\" is not an input feature of the model: the model names no inputs, so they are x0 … x29 (an ONNX file imports without names unless its metadata has them); name them with `ballast import --onnx FILE --input-range-file R.json --out M.json`, R.json holding lower, upper and names, or key the tolerances by x0 … x29",
            tolerances.display()
        ),
    );
    // With names, the message lists the first of them.
    std::fs::write(&tolerances, "feature,tolerance\nrpm,1.0\n").unwrap();
    let (code, _, stderr) = ballast(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        DATA,
        "--tolerances",
        tolerances.to_str().unwrap(),
    ]);
    assert_eq!(code, Some(2));
    assert!(
        stderr.contains("\"rpm\" is not an input feature of the model, expected one of its 12 input names (vel_1x_mm_s, vel_2x_mm_s, vel_high_band_mm_s, vel_axial_mm_s, …)"),
        "{stderr}"
    );
}

/// A value the parser cannot read at all (a sign on a count, a word for a number) is one line naming
/// the flag, exit 2, like the values the validation step refuses.
#[test]
fn unreadable_numbers_are_one_line_naming_the_flag() {
    assert_one_line_error(
        &[
            "attack", "--model", MODEL, "--data", DATA, "--eps", "0.1", "--steps", "-1",
        ],
        "error: invalid value '-1' for '--steps <STEPS>': invalid digit found in string",
    );
    assert_one_line_error(
        &[
            "certify", "--model", MODEL, "--data", DATA, "--eps", "0.1", "--floor", "abc",
        ],
        "error: invalid value 'abc' for '--floor <F>': invalid float literal",
    );
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
