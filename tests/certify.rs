//! Checks of `ballast certify`, the requirement, the report, shards, the journal and resume.
//!
//! Outside references: the Clopper–Pearson values of tests/reference/out/clopper_pearson.json (scipy
//! `beta.ppf`, see tests/reference/clopper_pearson.py) and their closed form at k = n; the distance from
//! a point to a hyperplane `|w·x + b| / ‖w‖_q` (Hölder's inequality, q the dual norm: ‖·‖₁ for L-inf,
//! ‖·‖₂ for L2; common practice) for linear models; the digits fixture trained by scikit-learn.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use approx::assert_abs_diff_eq;
use ballast::certify::report::{Report, Status, Verdict};
use ballast::certify::{certify, CertifyOptions, PipelineOptions, Sources};
use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::model::{predicted_class, Model};
use ballast::threat::requirement::Requirement;
use ballast::threat::{Norm, Targets};

const MODEL: &str = "tests/data/digits_mlp.model.json";
const DATA: &str = "tests/data/digits_test.csv";

fn bin() -> &'static str {
    env!("CARGO_BIN_EXE_ballast")
}

fn run(args: &[&str]) -> (i32, String, String) {
    let out = Command::new(bin())
        .args(args)
        .output()
        .expect("ballast runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn read_report(path: &Path) -> Report {
    Report::from_json_str(&std::fs::read_to_string(path).expect("report written"))
        .expect("valid report")
}

/// The first `rows` rows of the digits test set, written to `dir`.
fn small_digits(dir: &Path, rows: usize) -> PathBuf {
    let text = std::fs::read_to_string(DATA).unwrap();
    let lines: Vec<&str> = text.lines().take(rows + 1).collect();
    let path = dir.join("digits_small.csv");
    std::fs::write(&path, lines.join("\n") + "\n").unwrap();
    path
}

fn digits() -> (Model, Dataset) {
    let model = Model::load(Path::new(MODEL)).unwrap();
    let data = load_csv(Path::new(DATA), &model, &DataOptions::default()).unwrap();
    (model, data)
}

fn report_of(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    pipeline: PipelineOptions,
) -> Report {
    let options = CertifyOptions {
        pipeline,
        ..CertifyOptions::default()
    };
    certify(
        model,
        data,
        requirement,
        &Sources::in_memory(model, data),
        &options,
    )
    .expect("certify runs")
}

fn check_invariants(r: &Report) {
    let s = &r.summary;
    assert_eq!(
        s.certified + s.counterexample + s.misclassified + s.unresolved,
        s.samples
    );
    assert_eq!(r.samples.len() + s.not_run, s.samples);
    assert!(s.certified_accuracy <= s.empirical_robust_accuracy + 1e-12);
    assert!(s.empirical_robust_accuracy <= s.clean_accuracy + 1e-12);
    if s.unresolved == 0 {
        assert_abs_diff_eq!(
            s.certified_accuracy,
            s.empirical_robust_accuracy,
            epsilon = 1e-12
        );
        assert!(s.exact);
    }
    let class_total: usize = r.per_class.iter().map(|c| c.samples).sum();
    assert_eq!(class_total, r.samples.len());
    let class_certified: usize = r.per_class.iter().map(|c| c.certified).sum();
    assert_eq!(class_certified, s.certified);
    let stage_total: usize = r
        .stages
        .iter()
        .map(|st| st.certified + st.refuted + st.unresolved)
        .sum();
    assert_eq!(stage_total, r.samples.len());
    for sample in &r.samples {
        assert_eq!(
            sample.status == Status::Misclassified,
            sample.label != sample.predicted
        );
        assert_eq!(
            sample.status == Status::Counterexample,
            sample.counterexample.is_some()
        );
    }
}

/// Every counterexample of a report, checked independently: plain forward pass, class change into a
/// forbidden class, inside the ball of the requirement and the model's input range (exactly), reported
/// distance not above the radius.
fn check_counterexamples(model: &Model, data: &Dataset, r: &Report) -> usize {
    let network = model.classifier();
    let requirement = r.requirement.requirement();
    let mut checked = 0;
    for s in &r.samples {
        let outcomes: Vec<(f64, &ballast::certify::report::CounterexampleRecord)> =
            if s.sweep.is_empty() {
                s.counterexample
                    .iter()
                    .map(|c| (r.requirement.epsilon, c))
                    .collect()
            } else {
                s.sweep
                    .iter()
                    .filter_map(|o| o.counterexample.as_ref().map(|c| (o.epsilon, c)))
                    .collect()
            };
        for (eps, c) in outcomes {
            let x = data.sample(s.index);
            let budget = requirement.budget(eps, model.input.dim);
            // Inside ball ∩ range exactly, no tolerance (rational arithmetic, tests/common).
            assert!(common::in_range(
                &c.features,
                &model.input.lower,
                &model.input.upper
            ));
            let norm = match budget.norm {
                Norm::Linf => "linf",
                Norm::L2 => "l2",
            };
            assert!(
                common::ball_inside(norm, &c.features, x, &budget.radii),
                "sample {}: counterexample outside the {norm} ball",
                s.index
            );
            let largest = budget.radii.iter().copied().fold(0.0, f64::max);
            assert!(c.distance <= largest, "distance {} > {largest}", c.distance);
            let logits: Vec<f64> = network.forward(&c.features).iter().copied().collect();
            let class = predicted_class(&logits);
            assert_eq!(class, c.new_class);
            assert_ne!(class, s.label);
            assert!(requirement
                .targets
                .forbidden_for(s.label, logits.len())
                .contains(&class));
            checked += 1;
        }
    }
    checked
}

#[test]
fn clopper_pearson_matches_scipy_reference() {
    // Source: tests/reference/out/clopper_pearson.json, written by scipy.stats.beta.ppf.
    let text = std::fs::read_to_string("tests/reference/out/clopper_pearson.json").unwrap();
    let reference: serde_json::Value = serde_json::from_str(&text).unwrap();
    let entries = reference["entries"].as_array().unwrap();
    assert!(entries.len() > 100);
    for e in entries {
        let (n, k, c) = (
            e["n"].as_u64().unwrap() as usize,
            e["k"].as_u64().unwrap() as usize,
            e["confidence"].as_f64().unwrap(),
        );
        let lower = ballast::certify::statistics::clopper_pearson_lower(k, n, c).unwrap();
        let upper = ballast::certify::statistics::clopper_pearson_upper(k, n, c).unwrap();
        assert_abs_diff_eq!(lower, e["lower"].as_f64().unwrap(), epsilon = 1e-9);
        assert_abs_diff_eq!(upper, e["upper"].as_f64().unwrap(), epsilon = 1e-9);
    }
    // The k = n closed form (1 − c)^(1/n), listed in the same file under known_identities.
    for v in reference["known_identities"]["values"].as_array().unwrap() {
        if v["bound"] != "lower" {
            continue;
        }
        let (n, c) = (
            v["n"].as_u64().unwrap() as usize,
            v["confidence"].as_f64().unwrap(),
        );
        let lower = ballast::certify::statistics::clopper_pearson_lower(n, n, c).unwrap();
        assert_abs_diff_eq!(lower, (1.0 - c).powf(1.0 / n as f64), epsilon = 1e-12);
        assert_abs_diff_eq!(lower, v["value"].as_f64().unwrap(), epsilon = 1e-12);
    }
}

/// A linear two-class model `z = w·x + b` as a one-logit binary classifier, unbounded input.
fn linear_model(w: &[f64], b: f64) -> Model {
    let json = format!(
        r#"{{"format":"ballast.model/1","name":"line","input":{{"dim":{}}},"classes":["low","high"],
        "layers":[{{"kind":"dense","weights":[{:?}],"bias":[{b}]}}]}}"#,
        w.len(),
        w
    );
    Model::from_json_str(&json).unwrap()
}

fn dataset(points: &[Vec<f64>], labels: &[usize]) -> Dataset {
    let dim = points[0].len();
    let flat: Vec<f64> = points.iter().flatten().copied().collect();
    Dataset {
        features: nalgebra::DMatrix::from_vec(dim, points.len(), flat),
        labels: labels.to_vec(),
    }
}

#[test]
fn linear_model_matches_the_hyperplane_distance() {
    // Reference: the distance from x to {w·x + b = 0} is |w·x + b| / ‖w‖₁ in L-inf and / ‖w‖₂ in L2
    // (Hölder's inequality; common practice).
    let w = [0.5, -1.5, 2.0];
    let model = linear_model(&w, 0.25);
    let points = vec![
        vec![1.0, 0.2, 0.3],
        vec![-1.0, 1.0, 0.1],
        vec![0.3, -0.4, -0.2],
    ];
    let labels: Vec<usize> = points
        .iter()
        .map(|x| {
            let z: f64 = w.iter().zip(x).map(|(a, b)| a * b).sum::<f64>() + 0.25;
            usize::from(z > 0.0)
        })
        .collect();
    let data = dataset(&points, &labels);
    for (norm, dual) in [
        (Norm::Linf, w.iter().map(|v: &f64| v.abs()).sum::<f64>()),
        (Norm::L2, w.iter().map(|v| v * v).sum::<f64>().sqrt()),
    ] {
        for (s, x) in points.iter().enumerate() {
            let z: f64 = w.iter().zip(x).map(|(a, b)| a * b).sum::<f64>() + 0.25;
            let radius = z.abs() / dual;
            let one = data.subset(&[s]);
            let inside = report_of(
                &model,
                &one,
                &Requirement::uniform(norm, radius * 0.98),
                PipelineOptions::default(),
            );
            assert_eq!(
                inside.samples[0].status,
                Status::Certified,
                "{norm} sample {s} below its radius"
            );
            let outside = report_of(
                &model,
                &one,
                &Requirement::uniform(norm, radius * 1.05),
                PipelineOptions::default(),
            );
            assert_eq!(
                outside.samples[0].status,
                Status::Counterexample,
                "{norm} sample {s} above its radius"
            );
            check_counterexamples(&model, &one, &outside);
            let with_radius = report_of(
                &model,
                &one,
                &Requirement::uniform(norm, radius * 0.5),
                PipelineOptions {
                    radius: true,
                    ..PipelineOptions::default()
                },
            );
            let found = with_radius.samples[0].radius.unwrap();
            assert!(
                found <= radius * (1.0 + 1e-9),
                "{norm}: radius {found} above the true {radius}"
            );
            assert!(
                found >= radius * 0.99,
                "{norm}: radius {found} far below the true {radius}"
            );
        }
    }
}

#[test]
fn digits_report_invariants_and_counterexamples() {
    let (model, data) = digits();
    let r = report_of(
        &model,
        &data,
        &Requirement::uniform(Norm::Linf, 0.05),
        PipelineOptions::default(),
    );
    check_invariants(&r);
    // scikit-learn's test accuracy of this fixture (tests/reference/out/digits_forward.json).
    let reference: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string("tests/reference/out/digits_forward.json").unwrap(),
    )
    .unwrap();
    let fixture = &reference["models"]["digits_mlp"];
    assert_abs_diff_eq!(
        r.summary.clean_accuracy,
        fixture["test_accuracy"].as_f64().unwrap(),
        epsilon = 1e-12
    );
    let predicted = fixture["predicted"].as_array().unwrap();
    for s in &r.samples {
        assert_eq!(s.predicted as u64, predicted[s.index].as_u64().unwrap());
    }
    assert!(r.summary.counterexample > 0 && r.summary.certified > 0);
    assert_eq!(
        check_counterexamples(&model, &data, &r),
        r.summary.counterexample
    );
}

#[test]
fn verdict_and_exit_code_follow_the_floor() {
    let dir = tempfile::tempdir().unwrap();
    let data = small_digits(dir.path(), 120);
    let data = data.to_str().unwrap();
    let report = dir.path().join("r.json");
    let report_s = report.to_str().unwrap();
    let (code, _, err) = run(&[
        "certify", "--model", MODEL, "--data", data, "--eps", "0.05", "--report", report_s,
    ]);
    assert_eq!(code, 0, "no floor: {err}");
    let base = read_report(&report);
    check_invariants(&base);
    assert_eq!(base.summary.verdict, Verdict::None);
    let (certified, empirical) = (
        base.summary.certified_accuracy,
        base.summary.empirical_robust_accuracy,
    );
    assert!(
        base.summary.unresolved > 0 && certified < empirical,
        "this setting leaves samples open"
    );
    let cases = [
        (certified - 0.05, 0, Verdict::Pass),
        (certified, 0, Verdict::Pass),
        ((certified + empirical) / 2.0, 3, Verdict::Undecided),
        (empirical, 3, Verdict::Undecided),
        (empirical + 0.01, 1, Verdict::Fail),
    ];
    for (floor, expected, verdict) in cases {
        let floor_text = format!("{floor}");
        let (code, out, err) = run(&[
            "certify",
            "--model",
            MODEL,
            "--data",
            data,
            "--eps",
            "0.05",
            "--floor",
            &floor_text,
            "--report",
            report_s,
        ]);
        assert_eq!(code, expected, "floor {floor}: {out}{err}");
        let r = read_report(&report);
        assert_eq!(r.summary.verdict, verdict);
        assert_eq!(
            r.summary.unresolved > 0,
            code == 3 || r.summary.unresolved > 0
        );
        assert!(out.contains(&format!("verdict: {}", verdict.name())));
    }
    // With nothing unresolved (search decides every sample), the floor between the old bounds is decided.
    let (code, _, err) = run(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        data,
        "--eps",
        "0.05",
        "--budget",
        "5",
        "--floor",
        &format!("{}", (certified + empirical) / 2.0),
        "--report",
        report_s,
    ]);
    let r = read_report(&report);
    check_invariants(&r);
    if r.summary.unresolved == 0 {
        assert!(code == 0 || code == 1, "{err}");
    } else {
        assert_eq!(code, 3);
    }
}

#[test]
fn usage_errors_name_the_flag_and_write_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("r.json");
    let report_s = report.to_str().unwrap();
    for (args, flag) in [
        (vec!["--eps", "0.05", "--floor", "1.5"], "--floor"),
        (vec!["--eps", "abc"], "--eps"),
        (vec!["--eps", "0.05", "--norm", "l3"], "--norm"),
        (
            vec!["--eps", "0.05", "--forbid-into", "eleven"],
            "--forbid-into",
        ),
        (vec!["--eps", "0.05", "--confidence", "1.0"], "--confidence"),
        (vec!["--eps", "0.05", "--shard", "4/3"], "--shard"),
        (vec!["--eps", "0.05", "--budget=-1"], "--budget"),
    ] {
        let mut all = vec![
            "certify", "--model", MODEL, "--data", DATA, "--report", report_s,
        ];
        all.extend(args.iter());
        let (code, _, err) = run(&all);
        assert_eq!(code, 2, "{args:?}");
        assert!(err.contains(flag), "{args:?}: {err}");
        assert!(!report.exists(), "{args:?} wrote a report");
    }
    let bad = dir.path().join("req.toml");
    std::fs::write(&bad, "epsilon = 0.05\nflor = 0.9\n").unwrap();
    let (code, _, err) = run(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        DATA,
        "--requirement",
        bad.to_str().unwrap(),
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("req.toml") && err.contains("flor"), "{err}");
}

#[test]
fn requirement_file_tolerances_and_flags_agree() {
    let dir = tempfile::tempdir().unwrap();
    let data = small_digits(dir.path(), 60);
    let data_s = data.to_str().unwrap();
    let (model, _) = digits();
    // Tolerance file: 0.04 for every pixel, as CSV; scale 0.5 → radius 0.02.
    let mut csv = String::from("feature,tolerance\n");
    for i in 0..64 {
        csv.push_str(&format!("{},0.04\n", model.feature_name(i)));
    }
    let tolerances = dir.path().join("tol.csv");
    std::fs::write(&tolerances, csv).unwrap();
    let requirement = dir.path().join("req.toml");
    std::fs::write(
        &requirement,
        format!(
            "epsilon = 0.5\ntolerances = \"{}\"\nfloor = 0.99\nnorm = \"linf\"\n",
            tolerances.display()
        ),
    )
    .unwrap();
    let a = dir.path().join("a.json");
    let b = dir.path().join("b.json");
    // The file says floor 0.99; the flag overrides it with 0.5.
    let (code_a, _, err) = run(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        data_s,
        "--requirement",
        requirement.to_str().unwrap(),
        "--floor",
        "0.5",
        "--report",
        a.to_str().unwrap(),
    ]);
    assert_eq!(code_a, 0, "{err}");
    let (_, _, err) = run(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        data_s,
        "--eps",
        "0.02",
        "--report",
        b.to_str().unwrap(),
    ]);
    let (ra, rb) = (read_report(&a), read_report(&b));
    assert!(err.is_empty() || !err.contains("error"), "{err}");
    assert_abs_diff_eq!(ra.requirement.floor.unwrap(), 0.5);
    let statuses = |r: &Report| r.samples.iter().map(|s| s.status).collect::<Vec<_>>();
    assert_eq!(statuses(&ra), statuses(&rb));
    // A tolerance file that misses a feature is refused, naming the feature.
    std::fs::write(&tolerances, "feature,tolerance\npx0,0.1\n").unwrap();
    let (code, _, err) = run(&[
        "certify",
        "--model",
        MODEL,
        "--data",
        data_s,
        "--eps",
        tolerances.to_str().unwrap(),
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("px1"), "{err}");
}

#[test]
fn forbidden_targets_only_count_the_named_class() {
    let (model, data) = digits();
    let data = data.subset(&(0..150).collect::<Vec<_>>());
    let any = report_of(
        &model,
        &data,
        &Requirement::uniform(Norm::Linf, 0.05),
        PipelineOptions::default(),
    );
    let into_eight = Requirement {
        targets: Targets::Into {
            classes: vec![8],
            from: None,
        },
        ..Requirement::uniform(Norm::Linf, 0.05)
    };
    let restricted = report_of(&model, &data, &into_eight, PipelineOptions::default());
    check_invariants(&restricted);
    // Fewer forbidden classes: a smaller set of violations (common practice: a weaker property).
    assert!(restricted.summary.certified >= any.summary.certified);
    for (a, r) in any.samples.iter().zip(&restricted.samples) {
        if a.status == Status::Certified {
            assert_eq!(r.status, Status::Certified);
        }
        if let Some(c) = &r.counterexample {
            assert_eq!(c.new_class, 8);
        }
    }
    check_counterexamples(&model, &data, &restricted);
}

#[test]
fn sweep_is_monotone_and_sound() {
    let (model, data) = digits();
    let data = data.subset(&(0..120).collect::<Vec<_>>());
    let sweep = Requirement {
        epsilons: vec![0.01, 0.03, 0.05],
        ..Requirement::uniform(Norm::Linf, 0.05)
    };
    let r = report_of(&model, &data, &sweep, PipelineOptions::default());
    check_invariants(&r);
    assert_eq!(r.sweep.len(), 3);
    for pair in r.sweep.windows(2) {
        assert!(pair[1].summary.certified <= pair[0].summary.certified);
        assert!(
            pair[1].summary.empirical_robust_accuracy
                <= pair[0].summary.empirical_robust_accuracy + 1e-12
        );
    }
    for s in &r.samples {
        for k in 1..s.sweep.len() {
            if s.sweep[k].status == Status::Certified {
                assert_eq!(
                    s.sweep[k - 1].status,
                    Status::Certified,
                    "sample {}",
                    s.index
                );
            }
            if s.sweep[k - 1].status == Status::Counterexample {
                assert_eq!(
                    s.sweep[k].status,
                    Status::Counterexample,
                    "sample {}",
                    s.index
                );
            }
        }
    }
    check_counterexamples(&model, &data, &r);
    // Each sweep point is at least as decided as a single run at that epsilon.
    for (k, &eps) in sweep.epsilons.iter().enumerate() {
        let single = report_of(
            &model,
            &data,
            &Requirement::uniform(Norm::Linf, eps),
            PipelineOptions::default(),
        );
        assert!(r.sweep[k].summary.certified >= single.summary.certified);
        assert!(
            r.sweep[k].summary.empirical_robust_accuracy
                <= single.summary.empirical_robust_accuracy + 1e-12
        );
    }
}

#[test]
fn shards_merge_into_the_single_run() {
    let dir = tempfile::tempdir().unwrap();
    let data = small_digits(dir.path(), 90);
    let data_s = data.to_str().unwrap();
    let single = dir.path().join("single.json");
    let common = [
        "certify",
        "--model",
        MODEL,
        "--data",
        data_s,
        "--eps",
        "0.01,0.05",
        "--floor",
        "0.8",
    ];
    let mut args = common.to_vec();
    args.extend(["--report", single.to_str().unwrap()]);
    let (code_single, _, err) = run(&args);
    assert!(
        code_single == 0 || code_single == 1 || code_single == 3,
        "{err}"
    );
    let mut shard_files = Vec::new();
    for k in 1..=3 {
        let path = dir.path().join(format!("shard{k}.json"));
        let shard = format!("{k}/3");
        let mut args = common.to_vec();
        args.extend(["--shard", &shard, "--report", path.to_str().unwrap()]);
        run(&args);
        let r = read_report(&path);
        assert_eq!(r.samples.len(), 30);
        assert!(r.samples.iter().all(|s| s.index % 3 == k - 1));
        shard_files.push(path.to_str().unwrap().to_string());
    }
    let merged = dir.path().join("merged.json");
    let mut args = vec!["merge"];
    // Any order.
    args.extend([
        shard_files[2].as_str(),
        shard_files[0].as_str(),
        shard_files[1].as_str(),
    ]);
    args.extend(["--out", merged.to_str().unwrap()]);
    let (code_merge, _, err) = run(&args);
    assert_eq!(code_merge, code_single, "{err}");
    let (a, b) = (read_report(&single), read_report(&merged));
    assert_eq!(a.summary_json(), b.summary_json());
    assert_eq!(
        serde_json::to_string(&a.sweep).unwrap(),
        serde_json::to_string(&b.sweep).unwrap()
    );
    assert_eq!(
        serde_json::to_string(&a.per_class).unwrap(),
        serde_json::to_string(&b.per_class).unwrap()
    );
    // A shard of another requirement is refused, naming what differs.
    let other = dir.path().join("other.json");
    let mut args = common.to_vec();
    args[6] = "0.01,0.04";
    args.extend(["--shard", "3/3", "--report", other.to_str().unwrap()]);
    run(&args);
    let (code, _, err) = run(&[
        "merge",
        &shard_files[0],
        &shard_files[1],
        other.to_str().unwrap(),
        "--out",
        merged.to_str().unwrap(),
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("requirement"), "{err}");
    // A missing shard is refused.
    let (code, _, err) = run(&[
        "merge",
        &shard_files[0],
        &shard_files[1],
        "--out",
        merged.to_str().unwrap(),
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("3/3") && err.contains("missing"), "{err}");
}

fn statuses(r: &Report) -> Vec<(usize, Status)> {
    r.samples.iter().map(|s| (s.index, s.status)).collect()
}

#[test]
fn killed_run_resumes_to_the_same_statuses() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("r.json");
    let journal = dir.path().join("r.journal.jsonl");
    let args = [
        "certify",
        "--model",
        MODEL,
        "--data",
        DATA,
        "--eps",
        "0.05",
        "--radius",
        "--report",
        report.to_str().unwrap(),
    ];
    let mut child = Command::new(bin())
        .args(args)
        .env("RAYON_NUM_THREADS", "1")
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let mut lines = 0;
    for _ in 0..4000 {
        lines = std::fs::read_to_string(&journal)
            .map(|t| t.lines().count())
            .unwrap_or(0);
        if lines > 60 {
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    child.kill().unwrap(); // SIGKILL
    child.wait().unwrap();
    assert!(!report.exists(), "the killed run must not have finished");
    assert!(
        lines > 60 && lines < 541,
        "killed halfway ({lines} journal lines)"
    );
    let mut resume = args.to_vec();
    resume.push("--resume");
    let (code, _, err) = run(&resume);
    assert_eq!(code, 0, "{err}");
    let resumed = read_report(&report);
    assert!(resumed.complete);
    // Reference: an uninterrupted run with two threads (also checks thread-count independence).
    let fresh = dir.path().join("fresh.json");
    let mut again = args.to_vec();
    let last = again.len() - 1;
    again[last] = fresh.to_str().unwrap();
    let out = Command::new(bin())
        .args(&again)
        .env("RAYON_NUM_THREADS", "2")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0));
    let fresh = read_report(&fresh);
    assert_eq!(statuses(&resumed), statuses(&fresh));
    assert_eq!(resumed.summary_json(), fresh.summary_json());
    // Resuming against other settings is refused.
    let mut other = resume.clone();
    other[6] = "0.04";
    let (code, _, err) = run(&other);
    assert_eq!(code, 2);
    assert!(err.contains("another run"), "{err}");
}

#[test]
fn sigint_writes_a_partial_report_and_exits_130() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("r.json");
    let journal = dir.path().join("r.journal.jsonl");
    let mut child = Command::new(bin())
        .args([
            "certify",
            "--model",
            MODEL,
            "--data",
            DATA,
            "--eps",
            "0.05",
            "--radius",
            "--floor",
            "0.5",
            "--report",
            report.to_str().unwrap(),
        ])
        .env("RAYON_NUM_THREADS", "1")
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    for _ in 0..4000 {
        let lines = std::fs::read_to_string(&journal)
            .map(|t| t.lines().count())
            .unwrap_or(0);
        if lines > 30 {
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    let status = Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let code = child.wait().unwrap().code();
    let r = read_report(&report);
    if r.complete {
        // The run finished before the signal arrived; nothing more to check.
        return;
    }
    assert_eq!(code, Some(130));
    assert!(r.summary.not_run > 0);
    assert_eq!(r.summary.not_run + r.samples.len(), 540);
    // Samples not run count as open, so the verdict cannot be a pass on their account.
    assert_eq!(r.summary.verdict, Verdict::Undecided);
    check_invariants(&r);
}
