//! Resuming never keeps results of another version of ballast: a journal whose fingerprint names
//! another tool version (or none) is refused with exit code 2 and a message naming both versions; a run
//! without `--resume` starts over and writes the current version.

use std::path::Path;
use std::process::Command;

const MODEL: &str = "tests/data/digits_mlp.model.json";
const DATA: &str = "tests/data/digits_test.csv";

fn certify(report: &Path, data: &Path, resume: bool) -> (i32, String) {
    let mut args = vec![
        "certify".to_string(),
        "--model".into(),
        MODEL.into(),
        "--data".into(),
        data.display().to_string(),
        "--eps".into(),
        "0.01".into(),
        "--report".into(),
        report.display().to_string(),
    ];
    if resume {
        args.push("--resume".into());
    }
    let out = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(&args)
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn a_journal_of_another_version_is_refused_and_a_fresh_run_replaces_it() {
    let dir = tempfile::tempdir().unwrap();
    let data = dir.path().join("few.csv");
    let text = std::fs::read_to_string(DATA).unwrap();
    let few: Vec<&str> = text.lines().take(6).collect();
    std::fs::write(&data, few.join("\n") + "\n").unwrap();
    let report = dir.path().join("r.json");
    let journal = dir.path().join("r.journal.jsonl");
    let (code, err) = certify(&report, &data, false);
    assert_eq!(code, 0, "{err}");
    let this = env!("CARGO_PKG_VERSION");
    let header = |path: &Path| -> serde_json::Value {
        let text = std::fs::read_to_string(path).unwrap();
        serde_json::from_str(text.lines().next().unwrap()).unwrap()
    };
    assert_eq!(header(&journal)["fingerprint"]["tool_version"], this);
    // Same version: resuming is accepted.
    let (code, err) = certify(&report, &data, true);
    assert_eq!(code, 0, "{err}");
    // Another version in the header: refused, naming both.
    let text = std::fs::read_to_string(&journal).unwrap();
    let with_header = |header: &serde_json::Value| {
        let rest: Vec<&str> = text.lines().skip(1).collect();
        format!("{header}\n{}\n", rest.join("\n"))
    };
    let mut other = header(&journal);
    other["fingerprint"]["tool_version"] = "0.0.1".into();
    std::fs::write(&journal, with_header(&other)).unwrap();
    let (code, err) = certify(&report, &data, true);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("written by ballast 0.0.1")
            && err.contains(&format!("this is ballast {this}")),
        "{err}"
    );
    // No version at all (a journal from before versions were recorded): refused too.
    other["fingerprint"]
        .as_object_mut()
        .unwrap()
        .remove("tool_version");
    std::fs::write(&journal, with_header(&other)).unwrap();
    let (code, err) = certify(&report, &data, true);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("did not record its version"), "{err}");
    // Without --resume the run starts over and the journal carries this version again.
    let (code, err) = certify(&report, &data, false);
    assert_eq!(code, 0, "{err}");
    assert_eq!(header(&journal)["fingerprint"]["tool_version"], this);
}
