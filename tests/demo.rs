//! The bundled pump-fleet demo: generator determinism, the committed data and models, and
//! `ballast demo --quick` end to end from another working directory (the spectra and the CNN:
//! tests/demo_spectrum.rs).

use std::path::{Path, PathBuf};
use std::process::Command;

use approx::assert_abs_diff_eq;
use ballast::cli::evaluate::evaluate;
use ballast::data::{load_csv, DataOptions, Dataset};
use ballast::demo::{bundle, files, generator, models, scenario};
use ballast::model::{Layer, Model};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn read(path: &Path) -> String {
    std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

fn committed_model(file: &str) -> Model {
    Model::load(&root().join("models").join(file)).expect("committed model loads")
}

fn committed_data(file: &str, model: &Model) -> Dataset {
    load_csv(
        &root().join("demo-data").join(file),
        model,
        &DataOptions::default(),
    )
    .expect("committed data loads")
}

fn reference() -> serde_json::Value {
    serde_json::from_str(&read(
        &root().join("tests/reference/out/demo_reference.json"),
    ))
    .expect("valid JSON")
}

#[test]
fn same_seed_gives_identical_bytes_and_another_seed_differs() {
    let a = generator::generate(scenario::DEFAULT_SEED);
    let b = generator::generate(scenario::DEFAULT_SEED);
    assert!(a.train.to_csv() == b.train.to_csv());
    assert!(a.acceptance.to_csv() == b.acceptance.to_csv());
    let c = generator::generate(scenario::DEFAULT_SEED + 1);
    assert!(a.train.to_csv() != c.train.to_csv());
    // Training and acceptance rows come from different streams: no row is shared.
    let train_csv = a.train.to_csv();
    let train_rows: std::collections::HashSet<&str> = train_csv.lines().skip(1).collect();
    let shared = a
        .acceptance
        .to_csv()
        .lines()
        .skip(1)
        .filter(|l| train_rows.contains(l))
        .count();
    assert_eq!(shared, 0);
}

#[test]
fn committed_demo_data_equal_the_generator_output() {
    let data = generator::generate(scenario::DEFAULT_SEED);
    let folder = root().join("demo-data");
    assert!(
        read(&folder.join(files::TRAIN_FILE)) == data.train.to_csv(),
        "train.csv is stale: run generate-demo"
    );
    assert!(
        read(&folder.join(files::ACCEPTANCE_FILE)) == data.acceptance.to_csv(),
        "acceptance.csv is stale"
    );
    assert!(
        read(&folder.join(files::TOLERANCE_FILE)) == files::tolerance_json(),
        "tolerances.json is stale"
    );
    assert!(
        read(&folder.join(files::REQUIREMENT_FILE)) == files::requirement_toml(),
        "requirement.toml is stale"
    );
    assert!(
        read(&folder.join(files::SPECTRUM_TRAIN_FILE)) == data.spectrum_train.to_csv(),
        "spectrum-train.csv is stale"
    );
    assert!(
        read(&folder.join(files::SPECTRUM_ACCEPTANCE_FILE)) == data.spectrum_acceptance.to_csv(),
        "spectrum-acceptance.csv is stale"
    );
    assert!(
        read(&folder.join(files::SPECTRUM_TOLERANCE_FILE)) == files::spectrum_tolerance_json(),
        "spectrum-tolerances.json is stale"
    );
    assert!(
        read(&folder.join(files::SPECTRUM_REQUIREMENT_FILE)) == files::spectrum_requirement_toml(),
        "spectrum-requirement.toml is stale"
    );
    // The spectra come from their own streams: no row equals another file's row.
    let train_csv = data.spectrum_train.to_csv();
    let train_rows: std::collections::HashSet<&str> = train_csv.lines().skip(1).collect();
    let acceptance_csv = data.spectrum_acceptance.to_csv();
    assert!(acceptance_csv
        .lines()
        .skip(1)
        .all(|l| !train_rows.contains(l)));
}

#[test]
fn generate_demo_data_only_reproduces_the_committed_files() {
    let out = tempfile::tempdir().expect("temporary folder");
    let status = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(["generate-demo", "--data-only", "--out"])
        .arg(out.path())
        .output()
        .expect("runs");
    assert!(
        status.status.success(),
        "{}",
        String::from_utf8_lossy(&status.stderr)
    );
    for (name, _) in bundle::DATA_FILES {
        let written = std::fs::read(out.path().join("demo-data").join(name)).expect("written");
        let committed = std::fs::read(root().join("demo-data").join(name)).expect("committed");
        assert!(
            written == committed,
            "{name} differs from the committed file"
        );
    }
}

#[test]
fn committed_csv_parse_matches_numpy() {
    // Reference: tests/reference/demo_reference.py (Python csv module + numpy column statistics).
    let reference = reference();
    let model = committed_model(models::MLP_FILE);
    let train = committed_data(files::TRAIN_FILE, &model);
    let acceptance = committed_data(files::ACCEPTANCE_FILE, &model);
    assert_eq!(
        train.len() as u64,
        reference["train_rows"].as_u64().unwrap()
    );
    assert_eq!(
        acceptance.len() as u64,
        reference["acceptance_rows"].as_u64().unwrap()
    );
    for c in 0..scenario::CLASSES.len() {
        let count = acceptance.labels.iter().filter(|l| **l == c).count() as u64;
        assert_eq!(
            count,
            reference["acceptance_class_counts"][c].as_u64().unwrap()
        );
    }
    let names: Vec<&str> = reference["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    let ours: Vec<&str> = scenario::FEATURES.iter().map(|f| f.name).collect();
    assert_eq!(names, ours);
    for (i, feature) in scenario::FEATURES.iter().enumerate() {
        let row = train.features.row(i);
        let mean = row.mean();
        let std = row.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / train.len() as f64;
        assert_abs_diff_eq!(
            mean,
            reference["train_mean"][i].as_f64().unwrap(),
            epsilon = 1e-9
        );
        assert_abs_diff_eq!(
            std.sqrt(),
            reference["train_std"][i].as_f64().unwrap(),
            epsilon = 1e-9
        );
        for v in row.iter() {
            assert!(
                *v >= feature.lower && *v <= feature.upper,
                "{} = {v} outside its range",
                feature.name
            );
        }
    }
}

#[test]
fn committed_models_reach_the_documented_clean_accuracy() {
    // Documented in docs/demo-scenario.md: pump-linear 0.9333 (336/360), pump-mlp 0.9083 (327/360).
    // Outside reference: scikit-learn LogisticRegression / MLPClassifier(32, 32) on the same files
    // (tests/reference/demo_reference.py).
    let reference = reference();
    for (file, documented, sklearn_key, allowed_gap) in [
        (
            models::LINEAR_FILE,
            336.0 / 360.0,
            "logistic_regression_acceptance_accuracy",
            0.03,
        ),
        (
            models::MLP_FILE,
            327.0 / 360.0,
            "mlp_32_32_acceptance_accuracy",
            0.05,
        ),
    ] {
        let model = committed_model(file);
        assert_eq!(model.input.dim, 12, "{file}");
        assert_eq!(
            model.classes.as_deref(),
            Some(&scenario::class_names()[..]),
            "{file}"
        );
        assert_eq!(
            model.input.names.as_deref(),
            Some(&scenario::feature_names()[..]),
            "{file}"
        );
        for (i, f) in scenario::FEATURES.iter().enumerate() {
            assert_abs_diff_eq!(model.input.lower[i], f.lower);
            assert_abs_diff_eq!(model.input.upper[i], f.upper);
        }
        let provenance = model.provenance.as_ref().expect("provenance");
        assert_eq!(
            provenance["data_seed"].as_u64(),
            Some(scenario::DEFAULT_SEED),
            "{file}"
        );
        let acceptance = committed_data(files::ACCEPTANCE_FILE, &model);
        let accuracy = evaluate(&model, &acceptance).accuracy;
        assert_abs_diff_eq!(accuracy, documented, epsilon = 1e-9);
        assert!(
            (0.90..=0.97).contains(&accuracy),
            "{file}: clean accuracy {accuracy}"
        );
        let sklearn = reference[sklearn_key].as_f64().unwrap();
        assert!(
            (accuracy - sklearn).abs() <= allowed_gap,
            "{file}: {accuracy} vs scikit-learn {sklearn}"
        );
    }
    // Shapes: softmax regression and 12-32-32-4.
    assert_eq!(
        committed_model(models::LINEAR_FILE)
            .network()
            .hidden_sizes(),
        Vec::<usize>::new()
    );
    assert_eq!(
        committed_model(models::MLP_FILE).network().hidden_sizes(),
        vec![32, 32]
    );
}

#[test]
fn retraining_the_demo_models_gives_comparable_accuracy() {
    let data = generator::generate(scenario::DEFAULT_SEED);
    let (linear, mlp) =
        models::train_demo_models(&data.train, scenario::DEFAULT_SEED).expect("trains");
    let acceptance = data.acceptance.to_dataset();
    for (trained, file) in [(linear, models::LINEAR_FILE), (mlp, models::MLP_FILE)] {
        let fresh = evaluate(&trained.model, &acceptance).accuracy;
        let committed = evaluate(&committed_model(file), &acceptance).accuracy;
        assert!(
            (fresh - committed).abs() <= 0.02,
            "{file}: fresh {fresh}, committed {committed}"
        );
    }
    let cnn = models::train_cnn_model(
        &data.spectrum_train,
        scenario::DEFAULT_SEED,
        scenario::DEFAULT_SEED,
    )
    .expect("trains");
    let acceptance = data.spectrum_acceptance.to_dataset();
    let fresh = evaluate(&cnn.model, &acceptance).accuracy;
    let committed = evaluate(&committed_model(models::CNN_FILE), &acceptance).accuracy;
    assert!(
        (fresh - committed).abs() <= 0.02,
        "pump-cnn: fresh {fresh}, committed {committed}"
    );
}

#[test]
fn demo_quick_runs_from_another_folder_and_writes_its_files() {
    let work = tempfile::tempdir().expect("temporary folder");
    let output = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(["demo", "--quick", "--out", "out"])
        .current_dir(work.path())
        .output()
        .expect("runs");
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(
        output.status.success(),
        "stdout:\n{stdout}\nstderr:\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let out = work.path().join("out");
    for (name, text) in bundle::DATA_FILES {
        assert!(read(&out.join("demo-data").join(name)) == text, "{name}");
    }
    for (name, text) in bundle::MODEL_FILES {
        assert!(read(&out.join("models").join(name)) == text, "{name}");
    }
    for name in ["pump-mlp-retrained", "pump-cnn-retrained"] {
        let retrained =
            Model::load(&out.join(format!("models/{name}.json"))).expect("retrained model loads");
        assert_eq!(retrained.name.as_deref(), Some(name));
    }
    let cnn = Model::load(&out.join("models/pump-cnn-retrained.json")).expect("loads");
    assert!(
        cnn.layers.iter().any(|l| matches!(l, Layer::Conv(_))),
        "the retrained CNN keeps its convolutions"
    );
    for stage in ["before", "after", "cnn-before", "cnn-after"] {
        let folder = out.join(stage);
        for file in ["report.json", "sheet.md", "sheet.html"] {
            assert!(folder.join(file).is_file(), "{stage}/{file} missing");
        }
        let report: serde_json::Value =
            serde_json::from_str(&read(&folder.join("report.json"))).expect("JSON");
        assert_eq!(report["format"].as_str(), Some("ballast.report/1"));
        assert_eq!(report["summary"]["samples"].as_u64(), Some(48));
        let verdict = report["summary"]["verdict"].as_str().unwrap_or("");
        assert!(
            ["pass", "fail", "undecided"].contains(&verdict),
            "{stage}: verdict {verdict}"
        );
        assert!(
            stdout.contains(&format!("out/{stage}/report.json")),
            "summary lacks the {stage} report path"
        );
    }
}

#[test]
fn demo_into_a_file_path_is_a_clear_input_error() {
    let work = tempfile::tempdir().expect("temporary folder");
    let blocker = work.path().join("taken");
    std::fs::write(&blocker, "not a folder").expect("written");
    let output = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .args(["demo", "--quick", "--out"])
        .arg(&blocker)
        .output()
        .expect("runs");
    assert_eq!(output.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("taken"),
        "the message names the path: {stderr}"
    );
    assert!(!stderr.contains("panicked"), "{stderr}");
}
