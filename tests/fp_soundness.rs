//! Soundness of certificates and counterexamples under floating point, judged in exact arithmetic.
//!
//! Outside reference: tests/reference/out/fp_stress/manifest.json, written by
//! tests/reference/fp_stress.py with tests/reference/fp_exact.py. For 40 tiny ReLU models with extreme
//! scales (normalize means up to 1e8, stds down to 2^-20, weights 1e-4 and 1e3, kinks and ties near the
//! samples) the script decides every case with Python's standard `fractions` (exact rational
//! arithmetic, exact minimum margin over the real ball ∩ input range by vertex enumeration; the method
//! and its justification are in fp_exact.py's docstring). This test asserts, for every case:
//!
//! - a case the exact reference marks `not_robust` is never reported `certified`;
//! - every reported counterexample lies in the ball and the input range by an exact `≤` (no tolerance)
//!   and changes the class when the model is evaluated in exact rational arithmetic (num-rational,
//!   parameters read from the manifest's `float.hex` strings, so no decimal parser is involved).
//!
//! Both with bounds only (budget 0) and with a small branch-and-bound budget, and both for the model as
//! read from its JSON file and for the same model built directly from the manifest's doubles (so a
//! finding can be told apart from a misread number). A second test re-checks the script's witnesses
//! (flipping doubles) with the exact arithmetic of tests/exact_reference/, so those verdicts rest on two
//! independent rational implementations (Python `fractions`, Rust num-rational).

use std::collections::BTreeMap;
use std::path::Path;

use ballast::certify::report::{Report, Status};
use ballast::certify::{certify, CertifyOptions, PipelineOptions, Sources};
use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::model::{Layer, Model};
use ballast::threat::requirement::Requirement;
use ballast::threat::Norm;
use num_rational::BigRational;
use serde_json::Value;

mod exact_reference;
use exact_reference::{exact, exactly_read, hex_rational, hex_vec, ExactModel};

const DIR: &str = "tests/reference/out/fp_stress";
/// Branch-and-bound seconds per sample in the second run (small: the point is soundness, not power).
const SEARCH_BUDGET: f64 = 0.1;

/// One finding against the exact reference.
#[derive(Debug)]
struct Finding {
    case: String,
    what: String,
}

/// Counts and findings of the soundness run.
#[derive(Default)]
struct Tally {
    runs: usize,
    counterexamples: usize,
    statuses: BTreeMap<String, usize>,
    false_certificates: Vec<Finding>,
    bad_counterexamples: Vec<Finding>,
    by_kind: BTreeMap<String, usize>,
}

fn run(model: &Model, one: &Dataset, norm: Norm, eps: f64, budget: f64) -> Report {
    let options = CertifyOptions {
        pipeline: PipelineOptions {
            budget_seconds: budget,
            ..PipelineOptions::default()
        },
        ..CertifyOptions::default()
    };
    let requirement = Requirement::uniform(norm, eps);
    certify(
        model,
        one,
        &requirement,
        &Sources::in_memory(model, one),
        &options,
    )
    .expect("certify runs")
}

/// A model of the manifest as ballast loads it, its data, the exact reference and its kind.
struct Loaded {
    model: Model,
    /// The same model with the manifest's doubles put in directly (bypasses the JSON number reader).
    exact_model: Model,
    data: Dataset,
    reference: ExactModel,
    kind: String,
}

fn load_manifest() -> (BTreeMap<String, Loaded>, Vec<Value>) {
    let text = std::fs::read_to_string(format!("{DIR}/manifest.json")).unwrap();
    let manifest: Value = serde_json::from_str(&text).unwrap();
    let mut models = BTreeMap::new();
    for m in manifest["models"].as_array().unwrap() {
        let id = m["id"].as_str().unwrap().to_string();
        let model_path = format!("{DIR}/{}", m["model"].as_str().unwrap());
        let model = Model::load(Path::new(&model_path)).unwrap();
        let data_path = format!("{DIR}/{}", m["data"].as_str().unwrap());
        let data = load_csv(Path::new(&data_path), &model, &DataOptions::default()).unwrap();
        let reference = ExactModel::from_manifest(&m["exact"]);
        // The CSV holds the manifest's samples: the reference and ballast judge the same centres.
        for (i, sample) in reference.samples.iter().enumerate() {
            let read: Vec<BigRational> = data.sample(i).iter().map(|v| exact(*v)).collect();
            assert_eq!(
                &read, sample,
                "{id} row {i}: CSV value differs from the manifest"
            );
        }
        let family = m["family"].as_str().unwrap();
        let depth = m["hidden"].as_array().unwrap().len();
        let kind = format!("{family}/{depth}h");
        let exact_model = exactly_read(&model, &m["exact"]);
        models.insert(
            id,
            Loaded {
                model,
                exact_model,
                data,
                reference,
                kind,
            },
        );
    }
    (models, manifest["cases"].as_array().unwrap().clone())
}

/// Every pair of an element of `a` and one of `b`.
fn itertools_product<'a, A: Copy, B: Copy>(
    a: &'a [A],
    b: &'a [B],
) -> impl Iterator<Item = (A, B)> + 'a {
    a.iter().flat_map(move |x| b.iter().map(move |y| (*x, *y)))
}

/// How many normalize / dense numbers of the model as ballast read it differ from the manifest's doubles
/// (a diagnostic: ballast certifies the model it read).
fn misread_numbers(loaded: &Loaded) -> (usize, usize) {
    let r = &loaded.reference;
    let mut read: Vec<f64> = Vec::new();
    let mut written: Vec<&BigRational> = Vec::new();
    let mut dense = r.dense.iter();
    for layer in &loaded.model.layers {
        match layer {
            Layer::Normalize { mean, std } => {
                read.extend(mean.iter().chain(std.iter()));
                written.extend(r.mean.iter().chain(&r.std));
            }
            Layer::Dense { weights, bias } => {
                let (w, b) = dense.next().expect("as many dense layers");
                for (i, row) in w.iter().enumerate() {
                    read.extend(weights.row(i).iter());
                    written.extend(row);
                }
                read.extend(bias.iter());
                written.extend(b);
            }
            Layer::Relu => {}
            _ => unreachable!("the stress models are dense"),
        }
    }
    assert_eq!(read.len(), written.len());
    let misread = read
        .iter()
        .zip(written)
        .filter(|(a, b)| exact(**a) != **b)
        .count();
    (misread, read.len())
}

/// A case's norm, eps (as the double and as the exact rational, checked equal) and label.
fn case_setup(case: &Value, data: &Dataset) -> (usize, Norm, f64, BigRational, usize) {
    let row = case["row"].as_u64().unwrap() as usize;
    let norm: Norm = case["norm"].as_str().unwrap().parse().unwrap();
    // Rust's `str::parse::<f64>` is correctly rounded; the hex form must denote the same double.
    let eps: f64 = case["eps"].as_str().unwrap().parse().unwrap();
    let eps_exact = hex_rational(case["eps_hex"].as_str().unwrap());
    assert_eq!(exact(eps), eps_exact, "row {row}: eps");
    let label = case["label"].as_u64().unwrap() as usize;
    assert_eq!(data.labels[row], label, "row {row}: label");
    (row, norm, eps, eps_exact, label)
}

#[test]
fn reference_witnesses_check_out_in_exact_rust_arithmetic() {
    // A second, independent exact implementation (num-rational here, Python fractions in the script)
    // re-checks every flipping double the script recorded, and the label at every centre.
    let (models, cases) = load_manifest();
    let mut verdicts: BTreeMap<String, usize> = BTreeMap::new();
    let mut witnesses = 0;
    for case in &cases {
        let verdict = case["verdict"].as_str().unwrap();
        *verdicts.entry(verdict.to_string()).or_default() += 1;
        let loaded = &models[case["model"].as_str().unwrap()];
        let (row, norm, _, eps, label) = case_setup(case, &loaded.data);
        let center = &loaded.reference.samples[row];
        assert_eq!(
            loaded.reference.class(center),
            label,
            "row {row}: label is the exact class"
        );
        if let Some(flip) = case["flip_double"].as_object() {
            assert_eq!(verdict, "not_robust");
            let x = hex_vec(&flip["point_hex"]);
            assert!(loaded.reference.in_region(center, &eps, norm, &x), "{case}");
            let class = loaded.reference.class(&x);
            assert_ne!(class, label, "{case}");
            assert_eq!(
                class as u64,
                flip["exact_class"].as_u64().unwrap(),
                "{case}"
            );
            witnesses += 1;
        }
    }
    // Not vacuous: the reference decides both ways, and many not-robust cases have a double witness.
    assert!(
        verdicts.get("robust").copied().unwrap_or(0) >= 100,
        "{verdicts:?}"
    );
    assert!(
        verdicts.get("not_robust").copied().unwrap_or(0) >= 100,
        "{verdicts:?}"
    );
    assert!(witnesses >= 50, "only {witnesses} flipping doubles");
}

#[test]
fn no_false_certificate_and_exact_counterexamples_on_fp_stress_cases() {
    let (models, cases) = load_manifest();
    let mut tally = Tally::default();
    let mut cases_hit = std::collections::BTreeSet::new();
    for case in &cases {
        let verdict = case["verdict"].as_str().unwrap();
        let id = case["model"].as_str().unwrap();
        let loaded = &models[id];
        let (row, norm, eps, eps_exact, label) = case_setup(case, &loaded.data);
        let (kind, reference) = (&loaded.kind, &loaded.reference);
        let center = &reference.samples[row];
        let name = format!("{id} row {row} {norm} eps {eps} ({kind}, exact {verdict})");
        let one = loaded.data.subset(&[row]);
        let sources = [("file", &loaded.model), ("doubles", &loaded.exact_model)];
        for (budget, (source, model)) in itertools_product(&[0.0, SEARCH_BUDGET], &sources) {
            let report = run(model, &one, norm, eps, budget);
            tally.runs += 1;
            let sample = &report.samples[0];
            let key = format!(
                "{source}, budget {budget}, exact {verdict}: {}",
                sample.status.name()
            );
            *tally.statuses.entry(key).or_default() += 1;
            if sample.status == Status::Certified && verdict == "not_robust" {
                let flips = !case["flip_double"].is_null();
                tally.false_certificates.push(Finding {
                    case: name.clone(),
                    what: format!(
                        "{source}, budget {budget}: certified at stage {} with margin lower bound {:?}; exact minimum {:e}, flipping double {}",
                        sample.stage.name(),
                        sample.margin_lower,
                        case["min_margin"].as_f64().unwrap(),
                        if flips { "found" } else { "not found" }
                    ),
                });
                cases_hit.insert((source, flips, name.clone()));
                let key = format!(
                    "false certificate, {source}, budget {budget}, {kind}, stage {}, flipping double {flips}",
                    sample.stage.name()
                );
                *tally.by_kind.entry(key).or_default() += 1;
            }
            if let Some(c) = &sample.counterexample {
                tally.counterexamples += 1;
                let x: Vec<BigRational> = c.features.iter().map(|v| exact(*v)).collect();
                let inside = reference.in_region(center, &eps_exact, norm, &x);
                let class = reference.class(&x);
                if !inside || class == label {
                    tally.bad_counterexamples.push(Finding {
                        case: name.clone(),
                        what: format!(
                            "{source}, budget {budget}: counterexample {:?} (class {} claimed) is {} the region and has exact class {class}",
                            c.features,
                            c.new_class,
                            if inside { "inside" } else { "outside" }
                        ),
                    });
                    let why = match (inside, class == label) {
                        (false, true) => "outside, no flip",
                        (false, false) => "outside",
                        _ => "no flip in exact arithmetic",
                    };
                    let key =
                        format!("bad counterexample, {source}, budget {budget}, {kind}: {why}");
                    *tally.by_kind.entry(key).or_default() += 1;
                }
            }
        }
    }
    let (misread, numbers) = models
        .values()
        .map(misread_numbers)
        .fold((0, 0), |(a, b), (c, d)| (a + c, b + d));
    println!(
        "{} cases, {} certify runs, {} counterexamples; {misread} of {numbers} model numbers read by \
         ballast differ from the double written",
        cases.len(),
        tally.runs,
        tally.counterexamples,
    );
    for source in ["file", "doubles"] {
        let hit = |flips: bool| {
            cases_hit
                .iter()
                .filter(|(s, f, _)| *s == source && *f == flips)
                .count()
        };
        println!(
            "  {source}: distinct cases falsely certified (either budget): {} with a flipping double, {} without",
            hit(true),
            hit(false)
        );
    }
    for (kind, count) in tally.statuses.iter().chain(&tally.by_kind) {
        println!("  {kind}: {count}");
    }
    for f in tally
        .false_certificates
        .iter()
        .chain(&tally.bad_counterexamples)
        .take(30)
    {
        println!("  {}: {}", f.case, f.what);
    }
    assert!(
        tally.false_certificates.is_empty(),
        "{} false certificates against the exact reference (first: {:?})",
        tally.false_certificates.len(),
        tally.false_certificates.first()
    );
    assert!(
        tally.bad_counterexamples.is_empty(),
        "{} counterexamples outside the region or not flipping in exact arithmetic (first: {:?})",
        tally.bad_counterexamples.len(),
        tally.bad_counterexamples.first()
    );
}
