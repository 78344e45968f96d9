//! A list of requirements judged by one `ballast certify` run, checked line by line against single runs
//! of the same rules (one requirement each) on the digits fixture trained by scikit-learn: the same
//! verdicts, the same measured fractions and, for the lines decided by the main run, the same per-sample
//! statuses. The exit code must be the conjunction (design.md: 0 all met, 1 some not met).

use std::path::Path;
use std::process::Command;

use approx::assert_abs_diff_eq;
use ballast::certify::lines::epsilon_position;
use ballast::certify::report::{Report, Verdict};

const MODEL: &str = "tests/data/digits_mlp.model.json";
const DATA: &str = "tests/data/digits_test.csv";

fn run(args: &[&str]) -> (i32, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(args)
        .output()
        .expect("ballast runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn certify(dir: &Path, name: &str, data: &str, extra: &[&str]) -> (i32, Report) {
    let report = dir.join(format!("{name}.json"));
    let mut args = vec![
        "certify",
        "--model",
        MODEL,
        "--data",
        data,
        "--report",
        report.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    let (code, stderr) = run(&args);
    assert!(code == 0 || code == 1 || code == 3, "{name}: {stderr}");
    let text = std::fs::read_to_string(&report).expect("report written");
    (code, Report::from_json_str(&text).expect("valid report"))
}

fn exit_code(v: Verdict) -> i32 {
    match v {
        Verdict::Pass | Verdict::None => 0,
        Verdict::Fail => 1,
        Verdict::Undecided => 3,
    }
}

#[test]
fn list_verdicts_equal_single_runs() {
    let dir = tempfile::tempdir().unwrap();
    // Floors sit near the measured fractions so that both verdicts occur.
    let list = dir.path().join("release.toml");
    std::fs::write(
        &list,
        "[[requirements]]\nepsilon = 0.01\nfloor = 0.95\n\n\
         [[requirements]]\nepsilon = 0.03\nfloor = 0.95\n\n\
         [[requirements]]\nepsilon = 0.03\nfloor = 0.85\nconfidence = 0.95\n\n\
         [[requirements]]\nepsilon = 0.02\nfloor = 0.95\nclass = 3\n\n\
         [[requirements]]\nepsilon = 0.02\nfloor = 0.96\nforbid_into = [0, 1]\n\n\
         [[requirements]]\nmin_clean_accuracy = 0.98\n",
    )
    .unwrap();
    let (code, listed) = certify(
        dir.path(),
        "list",
        DATA,
        &["--requirement", list.to_str().unwrap()],
    );
    assert_eq!(listed.requirements.len(), 6);
    let verdicts: Vec<Verdict> = listed.requirements.iter().map(|l| l.verdict).collect();
    assert!(
        verdicts.contains(&Verdict::Pass) && verdicts.contains(&Verdict::Fail),
        "{verdicts:?}"
    );
    assert_eq!(code, exit_code(listed.summary.verdict));
    assert_eq!(listed.summary.verdict, Verdict::Fail);

    // The rows of class 3 alone, for the per-class line.
    let text = std::fs::read_to_string(DATA).unwrap();
    let mut rows = text.lines();
    let header = rows.next().unwrap();
    let label = header.split(',').position(|h| h == "label").unwrap();
    let class3: Vec<&str> = rows
        .filter(|r| r.split(',').nth(label) == Some("3"))
        .collect();
    let class3_csv = dir.path().join("class3.csv");
    std::fs::write(&class3_csv, format!("{header}\n{}\n", class3.join("\n"))).unwrap();
    let class3_csv = class3_csv.to_str().unwrap().to_string();

    let singles: [(&str, &str, Vec<&str>); 6] = [
        ("eps01", DATA, vec!["--eps", "0.01", "--floor", "0.95"]),
        ("eps03", DATA, vec!["--eps", "0.03", "--floor", "0.95"]),
        (
            "eps03c",
            DATA,
            vec!["--eps", "0.03", "--floor", "0.85", "--confidence", "0.95"],
        ),
        (
            "class3",
            &class3_csv,
            vec!["--eps", "0.02", "--floor", "0.95"],
        ),
        (
            "into01",
            DATA,
            vec!["--eps", "0.02", "--floor", "0.96", "--forbid-into", "0,1"],
        ),
        (
            "clean",
            DATA,
            vec!["--eps", "0.01", "--min-clean-accuracy", "0.98"],
        ),
    ];
    for (line, (name, data, flags)) in listed.requirements.iter().zip(singles.iter()) {
        let (single_code, single) = certify(dir.path(), name, data, flags);
        assert_eq!(
            line.verdict, single.summary.verdict,
            "{name}: {}",
            line.requirement
        );
        assert_eq!(single_code, exit_code(line.verdict), "{name}");
        assert_eq!(line.samples, single.summary.samples, "{name}");
        let measured = if line.kind == "clean_accuracy" {
            single.summary.clean_accuracy
        } else {
            single.summary.certified_accuracy
        };
        assert_abs_diff_eq!(line.measured, measured, epsilon = 1e-12);
        if line.kind == "certified" {
            assert_abs_diff_eq!(
                line.upper,
                single.summary.empirical_robust_accuracy,
                epsilon = 1e-12
            );
        }
        if let (Some(a), Some(b)) = (line.lower_bound, single.summary.certified_lower_bound) {
            assert_abs_diff_eq!(a, b, epsilon = 1e-12);
        }
        // Lines over all samples with any change counting are decided by the main run: same statuses.
        if line.class.is_none() && line.forbid_into.is_empty() {
            if let Some(e) = line.epsilon {
                let k = epsilon_position(&listed.requirement.epsilons, e).expect("swept");
                for (a, b) in listed.samples.iter().zip(&single.samples) {
                    assert_eq!(a.index, b.index);
                    assert_eq!(a.status_at(k), b.status, "{name}: sample {}", a.index);
                }
            }
        }
    }
}

#[test]
fn bad_line_names_file_entry_and_field() {
    let dir = tempfile::tempdir().unwrap();
    let list = dir.path().join("bad.json");
    std::fs::write(
        &list,
        r#"{"requirements": [{"epsilon": 0.01, "floor": 0.9}, {"epsilon": 0.02, "floor": "high"}]}"#,
    )
    .unwrap();
    let report = dir.path().join("r.json");
    let (code, stderr) = run(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        DATA,
        "--requirement",
        list.to_str().unwrap(),
        "--report",
        report.to_str().unwrap(),
    ]);
    assert_eq!(code, 2, "{stderr}");
    let lines: Vec<&str> = stderr.lines().filter(|l| !l.trim().is_empty()).collect();
    assert_eq!(lines.len(), 1, "{stderr}");
    assert!(
        lines[0].contains("bad.json: requirement #2: floor"),
        "{stderr}"
    );
    assert!(!report.exists());
    // A top-level floor beside a list is refused (each rule is one entry).
    std::fs::write(
        &list,
        r#"{"requirements": [{"epsilon": 0.01, "floor": 0.9}]}"#,
    )
    .unwrap();
    let (code, stderr) = run(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        DATA,
        "--requirement",
        list.to_str().unwrap(),
        "--floor",
        "0.9",
    ]);
    assert_eq!(code, 2, "{stderr}");
    assert!(stderr.contains("--floor"), "{stderr}");
}
