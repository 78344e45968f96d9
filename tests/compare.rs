//! `ballast compare`, checked from outside the library: the reports are read as plain JSON
//! (serde_json) and every expected figure is counted here by hand from their per-sample statuses.

use serde_json::Value;

mod common;
use common::cli::{ballast, certify_demo_acceptance, root};

fn exit_of(verdict: &str) -> i32 {
    // design.md §4: pass 0, fail 1, undecided 3.
    match verdict {
        "pass" | "none" => 0,
        "fail" => 1,
        _ => 3,
    }
}

fn count(report: &Value, status: &str, class: Option<u64>) -> usize {
    report["samples"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|s| s["status"] == status && class.is_none_or(|c| s["label"] == c))
        .count()
}

#[test]
fn compare_tables_two_reports_of_the_same_data_and_refuses_other_data() {
    let dir = tempfile::tempdir().unwrap();
    let tolerances = root().join("demo-data/tolerances.json");
    let (a, b) = (dir.path().join("a.json"), dir.path().join("b.json"));
    let before = certify_demo_acceptance("models/pump-linear.json", &tolerances, &a);
    let after = certify_demo_acceptance("models/pump-mlp.json", &tolerances, &b);
    let out = dir.path().join("cmp");
    let (code, stdout, err) = ballast(&[
        "compare",
        a.to_str().unwrap(),
        b.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(
        code,
        Some(exit_of(after["summary"]["verdict"].as_str().unwrap())),
        "{err}"
    );
    // The counterexample line: counts of each report's samples, and their difference.
    let (cb, ca) = (
        count(&before, "counterexample", None),
        count(&after, "counterexample", None),
    );
    let line = stdout
        .lines()
        .find(|l| l.starts_with("counterexamples"))
        .expect("a counterexample line");
    let words: Vec<&str> = line.split_whitespace().collect();
    assert_eq!(
        words[1..],
        [
            cb.to_string(),
            ca.to_string(),
            format!("{:+}", ca as i64 - cb as i64)
        ]
    );
    // Per class on the sheet: certified before → after, in percent of the class's samples.
    let html = std::fs::read_to_string(out.join("sheet.html")).unwrap();
    let md = std::fs::read_to_string(out.join("sheet.md")).unwrap();
    for (k, name) in ["normal", "misalignment", "bearing-wear", "cavitation"]
        .iter()
        .enumerate()
    {
        let n = before["samples"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|s| s["label"] == k as u64)
            .count() as f64;
        let cell = format!(
            "{:.2} → {:.2}",
            100.0 * count(&before, "certified", Some(k as u64)) as f64 / n,
            100.0 * count(&after, "certified", Some(k as u64)) as f64 / n
        );
        let row = md
            .lines()
            .find(|l| l.starts_with(&format!("| {name} |")))
            .expect("a class row");
        assert!(row.contains(&cell), "{row} lacks {cell}");
        assert!(html.contains(&cell));
    }
    // Every sample appears once in the status transitions.
    let moved: usize = md
        .split("## How the samples moved")
        .nth(1)
        .unwrap()
        .lines()
        .filter(|l| l.starts_with("| ") && !l.starts_with("| before"))
        .flat_map(|l| {
            l.split('|')
                .skip(2)
                .filter_map(|c| c.trim().parse::<usize>().ok())
                .collect::<Vec<_>>()
        })
        .sum();
    assert_eq!(moved, before["samples"].as_array().unwrap().len());

    // A report of other data is refused in one line, exit 2.
    let other = dir.path().join("other.csv");
    let text = std::fs::read_to_string(root().join("demo-data/acceptance.csv")).unwrap();
    std::fs::write(
        &other,
        text.lines().take(40).collect::<Vec<_>>().join("\n") + "\n",
    )
    .unwrap();
    let c = dir.path().join("c.json");
    let (code, _, err) = ballast(&[
        "certify",
        "--model",
        "models/pump-mlp.json",
        "--data",
        other.to_str().unwrap(),
        "--eps",
        "0.1",
        "--report",
        c.to_str().unwrap(),
    ]);
    assert_eq!(code, Some(0), "{err}");
    let (code, _, err) = ballast(&["compare", a.to_str().unwrap(), c.to_str().unwrap()]);
    assert_eq!(code, Some(2));
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(
        err.contains("not about the same data") && err.contains("SHA-256"),
        "{err}"
    );
}
