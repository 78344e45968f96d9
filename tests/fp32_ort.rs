//! The float32 claim, checked against onnxruntime: for a model deployed in float32, every sample
//! `ballast certify` certifies keeps its class when onnxruntime evaluates the ONNX graph in float32 at
//! the points where a change is most likely.
//!
//! Outside reference: tests/reference/out/fp32_ort/manifest.json, written by tests/reference/fp32_ort.py
//! with onnxruntime 1.32.0 (numpy 2.4.6, onnx 1.23.2; checked below against the manifest). For 16
//! float32 graphs built with onnx.helper (ordinary MLPs; large and small scales; float32 subnormal
//! hidden values; two classes within float32 rounding of each other; affine steps an importer might
//! compose — a bias of 1e5 then an Add of −1e5, MatMul after MatMul with cancelling entries,
//! BatchNormalization with a running mean of 1e4, input normalisation around 1e4, Mul/Add of 1e4 after
//! a ReLU; logits that overflow float32) the script tunes radii so that the margin at the
//! gradient-sign box corner is at most 1e-2..1e-7 of the logits (and just below zero), and records
//! onnxruntime's float32 verdict at the box corners chosen by the sign of the margin's gradient, their
//! neighbours (one low-gradient coordinate flipped), the same corners rounded inward to float32, the
//! best points of a float64 PGD on the margin and the corners at those points. A point "keeps" the
//! class only when the label's logit is strictly highest in all four ways onnxruntime evaluated it
//! (graph optimisations on and off, batched and one point alone).
//!
//! The test runs the built binary on the ONNX files (`certify --eps <every radius of the model> --report`,
//! with bounds only and with a small branch-and-bound budget) and asserts that no point within a
//! certified radius of a row (exact L-inf distance, num-rational) changes class in onnxruntime. A second
//! test shows the check has teeth: the same graphs imported with `--arithmetic float64` (a certificate
//! for float64 evaluation only) are certified at radii where onnxruntime's float32 answer changes.

use std::collections::BTreeMap;
use std::path::Path;
use std::process::Command;

use ballast::certify::report::{Report, Status};
use num_rational::BigRational;
use serde_json::Value;

const DIR: &str = "tests/reference/out/fp32_ort";
/// Branch-and-bound seconds per sample and radius in the second run (small: soundness, not power).
const SEARCH_BUDGET: &str = "0.05";

/// One evaluated point of a row.
struct Point {
    x: Vec<f64>,
    kind: String,
    kept: bool,
    exact_margin: Option<f64>,
}

/// One sample of a model with its points.
struct Row {
    centre: Vec<f64>,
    radii: Vec<f64>,
    points: Vec<Point>,
}

/// One graph of the manifest.
struct Graph {
    id: String,
    family: String,
    onnx: String,
    data: String,
    rows: Vec<Row>,
}

impl Graph {
    /// Every radius of the model's cases, ascending, as `--eps` text (shortest round-trip form).
    fn eps_argument(&self) -> String {
        let mut radii: Vec<f64> = self.rows.iter().flat_map(|r| r.radii.clone()).collect();
        radii.sort_by(f64::total_cmp);
        radii.dedup();
        radii
            .iter()
            .map(|e| format!("{e:?}"))
            .collect::<Vec<_>>()
            .join(",")
    }
}

fn numbers(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn load() -> (Value, Vec<Graph>) {
    let text = std::fs::read_to_string(format!("{DIR}/manifest.json")).unwrap();
    let manifest: Value = serde_json::from_str(&text).unwrap();
    let graphs = manifest["models"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| Graph {
            id: m["id"].as_str().unwrap().into(),
            family: m["family"].as_str().unwrap().into(),
            onnx: format!("{DIR}/{}", m["onnx"].as_str().unwrap()),
            data: format!("{DIR}/{}", m["data"].as_str().unwrap()),
            rows: m["rows"]
                .as_array()
                .unwrap()
                .iter()
                .map(|r| Row {
                    centre: numbers(&r["centre"]),
                    radii: r["cases"]
                        .as_array()
                        .unwrap()
                        .iter()
                        .map(|c| c["eps"].as_str().unwrap().parse().unwrap())
                        .collect(),
                    points: r["points"]
                        .as_array()
                        .unwrap()
                        .iter()
                        .map(|p| Point {
                            x: numbers(&p["x"]),
                            kind: p["kind"].as_str().unwrap().into(),
                            kept: p["ort_kept"].as_bool().unwrap(),
                            exact_margin: p["exact_margin"].as_f64(),
                        })
                        .collect(),
                })
                .collect(),
        })
        .collect();
    (manifest, graphs)
}

fn exact(v: f64) -> BigRational {
    BigRational::from_float(v).expect("finite")
}

/// `max_i |x_i − c_i| ≤ eps` in exact arithmetic.
fn within(x: &[f64], c: &[f64], eps: f64) -> bool {
    let eps = exact(eps);
    x.iter().zip(c).all(|(a, b)| {
        let d = exact(*a) - exact(*b);
        d <= eps && -d <= eps
    })
}

fn ballast(args: &[&str]) -> String {
    let out = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(args)
        .output()
        .expect("ballast runs");
    assert!(
        matches!(out.status.code(), Some(0)),
        "ballast {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn certify(graph: &Graph, model: &str, budget: &str, dir: &Path) -> Report {
    let report = dir.join(format!("{}-{budget}.json", graph.id));
    let report_text = report.to_str().unwrap();
    let eps = graph.eps_argument();
    ballast(&[
        "certify",
        "--model",
        model,
        "--data",
        &graph.data,
        "--eps",
        &eps,
        "--budget",
        budget,
        "--report",
        report_text,
    ]);
    Report::from_json_str(&std::fs::read_to_string(&report).unwrap()).unwrap()
}

/// What certifying the rows of one report means against onnxruntime.
#[derive(Default)]
struct Tally {
    /// Certified (row, radius) pairs.
    certified: usize,
    /// Points inside a certified radius (each checked).
    checked: usize,
    /// Certified (row, radius) pairs with a point inside that changes class in onnxruntime.
    contradicted: usize,
    /// (graph, row, radius, point kind, exact margin) for a certified radius whose point changes class.
    false_certificates: Vec<String>,
    /// (row, radius) pairs not certified with a point inside that changes class in onnxruntime.
    refused: usize,
}

fn judge(graph: &Graph, report: &Report, tally: &mut Tally) {
    assert_eq!(report.samples.len(), graph.rows.len(), "{}", graph.id);
    for (sample, row) in report.samples.iter().zip(&graph.rows) {
        assert!(!sample.sweep.is_empty(), "{}: a sweep ran", graph.id);
        for outcome in &sample.sweep {
            let inside: Vec<&Point> = row
                .points
                .iter()
                .filter(|p| within(&p.x, &row.centre, outcome.epsilon))
                .collect();
            if outcome.status != Status::Certified {
                tally.refused += usize::from(inside.iter().any(|p| !p.kept));
                continue;
            }
            tally.certified += 1;
            tally.checked += inside.len();
            tally.contradicted += usize::from(inside.iter().any(|p| !p.kept));
            for p in inside.iter().filter(|p| !p.kept) {
                tally.false_certificates.push(format!(
                    "{} ({}) row {} eps {:?}: {} point {:?}, exact margin {:?}",
                    graph.id,
                    graph.family,
                    sample.index,
                    outcome.epsilon,
                    p.kind,
                    p.x,
                    p.exact_margin
                ));
            }
        }
    }
}

#[test]
fn reference_is_onnxruntime_1_32_and_has_float32_only_changes() {
    let (manifest, graphs) = load();
    assert_eq!(manifest["versions"]["onnxruntime"], "1.32.0");
    let points: Vec<&Point> = graphs
        .iter()
        .flat_map(|g| g.rows.iter().flat_map(|r| r.points.iter()))
        .collect();
    // Not vacuous: many points change class in float32, and some of them keep it in exact arithmetic
    // (the exact margin is positive there: only float32's rounding changes the answer).
    let changed = points.iter().filter(|p| !p.kept).count();
    let float32_only = points
        .iter()
        .filter(|p| !p.kept && p.exact_margin.is_some_and(|m| m > 0.0))
        .count();
    assert!(changed >= 200, "{changed} points change class");
    assert!(float32_only >= 20, "{float32_only} float32-only changes");
    // Every point is a double inside its row's largest radius (the ball the script claims).
    for g in &graphs {
        for r in &g.rows {
            let largest = r.radii.iter().copied().fold(0.0, f64::max);
            assert!(r.points.iter().all(|p| within(&p.x, &r.centre, largest)));
        }
    }
}

#[test]
fn certified_samples_keep_their_class_in_onnxruntime_float32() {
    let (_, graphs) = load();
    let dir = tempfile::tempdir().unwrap();
    let mut by_budget: BTreeMap<&str, Tally> = BTreeMap::new();
    for budget in ["0", SEARCH_BUDGET] {
        let tally = by_budget.entry(budget).or_default();
        for graph in &graphs {
            let report = certify(graph, &graph.onnx, budget, dir.path());
            assert_eq!(report.model.arithmetic.as_deref(), Some("float32"));
            judge(graph, &report, tally);
        }
    }
    for (budget, t) in &by_budget {
        println!(
            "budget {budget}: {} certified (row, eps), {} points checked inside them, {} (row, eps) \
             not certified with a float32 change inside",
            t.certified, t.checked, t.refused
        );
        for f in t.false_certificates.iter().take(20) {
            println!("  false certificate: {f}");
        }
    }
    for (budget, t) in &by_budget {
        assert!(
            t.false_certificates.is_empty(),
            "budget {budget}: {} certified radii with a point onnxruntime's float32 evaluation moves \
             to another class (first: {})",
            t.false_certificates.len(),
            t.false_certificates[0]
        );
        // Not vacuous: many certificates, each checked at many points, and refusals where it matters.
        assert!(
            t.certified >= 100 && t.checked >= 500 && t.refused >= 100,
            "budget {budget}: {} certified, {} checked, {} refused",
            t.certified,
            t.checked,
            t.refused
        );
    }
}

#[test]
fn a_float64_certificate_is_caught_by_the_float32_evaluation() {
    // The same graphs imported as deployed in float64: the certificates then cover float64 evaluation
    // only, and the float32 reference must find radii where that claim fails for float32.
    let (_, graphs) = load();
    let dir = tempfile::tempdir().unwrap();
    let mut tally = Tally::default();
    for graph in &graphs {
        let json = dir.path().join(format!("{}.model.json", graph.id));
        let json_text = json.to_str().unwrap();
        let said = ballast(&[
            "import",
            "--onnx",
            &graph.onnx,
            "--out",
            json_text,
            "--arithmetic",
            "float64",
        ]);
        assert!(said.contains("deployed in float64"), "{said}");
        let inspected = ballast(&["inspect", json_text]);
        assert!(
            inspected.contains("deployed arithmetic: float64"),
            "{inspected}"
        );
        let report = certify(graph, json_text, "0", dir.path());
        assert_eq!(report.model.arithmetic.as_deref(), Some("float64"));
        judge(graph, &report, &mut tally);
    }
    println!(
        "float64 claim: {} certified (row, eps), {} contradicted by float32 ({} points)",
        tally.certified,
        tally.contradicted,
        tally.false_certificates.len()
    );
    assert!(
        tally.contradicted >= 5,
        "only {} float64 certificates fail in float32: the reference no longer separates the two",
        tally.contradicted
    );
}
