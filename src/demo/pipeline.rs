//! The whole job on the bundled demo, as `ballast demo` runs it: write the embedded files, evaluate
//! both models, certify `pump-mlp` against the demo requirement, retrain it toward the floor with the
//! constrained (primal-dual) retrainer, certify the retrained model again, and write both reports and
//! sheets.
//!
//! Every verdict comes from the certify pipeline ([`crate::certify::certify`], sound bounds, validated
//! counterexamples, search with a time budget); this module only chooses the demo's settings and
//! file layout. Progress lines go to an observer callback; nothing here prints.

use std::path::{Path, PathBuf};

use crate::certify::{
    certify, write_counterexamples, CertifyOptions, PipelineOptions, Report, Sources, Summary,
};
use crate::cli::evaluate::evaluate;
use crate::data::{load_csv, DataOptions, Dataset};
use crate::model::Model;
use crate::threat::requirement::{Requirement, RequirementSpec};
use crate::threat::{Budget, Norm, Targets};
use crate::train::confidence::ConfidenceSettings;
use crate::train::constrained::{ConstrainedSettings, Constraint, Formulation};
use crate::train::lineage::{lineage, DataSource, RetrainData};
use crate::train::plain::split_validation;
use crate::train::retrain::{retrain, Keep, NearMisses, RetrainSettings, RetrainVerdict};
use crate::train::robust::RobustLoss;
use crate::train::{OptimizerKind, TrainSettings};

use super::bundle::{write_bundle, BundlePaths, MODEL_FOLDER};
use super::DemoError;

/// File name of the retrained model inside the models folder.
pub const RETRAINED_FILE: &str = "pump-mlp-retrained.json";
/// Folder (inside the output folder) of the report and sheet of the bundled model.
pub const BEFORE_FOLDER: &str = "before";
/// Folder of the report and sheet of the retrained model.
pub const AFTER_FOLDER: &str = "after";
/// File name of a report inside its folder.
pub const REPORT_FILE: &str = "report.json";
/// Acceptance rows used by `--quick` (the first rows of acceptance.csv).
pub const QUICK_ROWS: usize = 48;

/// How to run the demo.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoOptions {
    /// Output folder (created if missing).
    pub out: PathBuf,
    /// Smoke-test mode: the first [`QUICK_ROWS`] acceptance rows, bounds only, a short retraining.
    pub quick: bool,
    /// The command line, recorded in the reports.
    pub command_line: Vec<String>,
}

/// One certified model: where its report and sheet went and what it found.
#[derive(Debug, Clone)]
pub struct CertifiedModel {
    /// The model file certified.
    pub model: PathBuf,
    /// The report (`ballast.report/1`).
    pub report: PathBuf,
    /// The Markdown sheet.
    pub sheet_markdown: PathBuf,
    /// The HTML sheet.
    pub sheet_html: PathBuf,
    /// The report's summary (verdict, certified and empirical robust accuracy).
    pub summary: Summary,
}

/// What the demo did.
#[derive(Debug, Clone)]
pub struct DemoOutcome {
    /// The files written from the bundle.
    pub bundle: BundlePaths,
    /// Acceptance samples used (all, or [`QUICK_ROWS`] with `--quick`).
    pub samples: usize,
    /// Clean accuracy of `pump-linear` on the acceptance samples.
    pub linear_clean_accuracy: f64,
    /// Clean accuracy of `pump-mlp` on the acceptance samples.
    pub mlp_clean_accuracy: f64,
    /// The requirement in plain words.
    pub requirement: String,
    /// The bundled `pump-mlp` against the requirement.
    pub before: CertifiedModel,
    /// The retrainer's own verdict on its final round.
    pub retrain_verdict: RetrainVerdict,
    /// Rounds the retrainer ran.
    pub retrain_rounds: usize,
    /// The retrained model against the requirement.
    pub after: CertifiedModel,
}

/// Runs the whole demo into `options.out`; `progress` receives one line per step.
pub fn run_demo(
    options: &DemoOptions,
    progress: &mut dyn FnMut(&str),
) -> Result<DemoOutcome, DemoError> {
    let bundle = write_bundle(&options.out)?;
    progress(&format!(
        "wrote the demo files to {}",
        options.out.join(super::bundle::DATA_FOLDER).display()
    ));
    let linear = Model::load(&bundle.linear_model)?;
    let mlp = Model::load(&bundle.mlp_model)?;
    let train = load_data(&bundle.train, &mlp)?;
    let mut acceptance = load_data(&bundle.acceptance, &mlp)?;
    if options.quick {
        acceptance = first_rows(&acceptance, QUICK_ROWS);
    }
    let linear_clean_accuracy = evaluate(&linear, &acceptance).accuracy;
    let mlp_clean_accuracy = evaluate(&mlp, &acceptance).accuracy;
    progress(&format!(
        "clean accuracy on {} acceptance samples: pump-linear {linear_clean_accuracy:.4}, pump-mlp {mlp_clean_accuracy:.4}",
        acceptance.len()
    ));
    let requirement = RequirementSpec::from_file(&bundle.requirement)?.resolve(&mlp)?;
    let described = requirement.describe(&|c| mlp.class_name(c));
    progress(&format!("requirement: {described}"));
    let pipeline = pipeline_options(options.quick);
    let quick_rows = options.quick.then_some(acceptance.len());

    let before = certify_model(
        &mlp,
        &bundle.mlp_model,
        &bundle.acceptance,
        &acceptance,
        &requirement,
        &pipeline,
        &options.out.join(BEFORE_FOLDER),
        &options.command_line,
        quick_rows,
    )?;
    progress(&format!("pump-mlp: {}", describe(&before.summary)));

    progress("retraining pump-mlp toward the floor (constrained primal-dual trainer)");
    let settings = retrain_settings(&requirement, options.quick, pipeline.clone());
    // As `ballast retrain` does by default: 20% of the training rows steer and select (validation).
    let (train, validation) = split_validation(&train, 0.2, super::scenario::DEFAULT_SEED);
    let result = retrain(
        &mlp,
        &train,
        validation.as_ref(),
        &acceptance,
        &requirement,
        &settings,
        &mut |_| {},
    )?;
    let mut retrained = result.model.clone();
    retrained.name = Some("pump-mlp-retrained".into());
    let digest = |path: &Path| crate::digest::sha256_file(path).ok();
    let data_source = |path: &Path, rows| DataSource {
        source: path.display().to_string(),
        sha256: digest(path),
        rows,
    };
    let lineage = lineage(
        &bundle.mlp_model.display().to_string(),
        &digest(&bundle.mlp_model).unwrap_or_default(),
        &settings,
        &result,
        &RetrainData {
            train: data_source(&bundle.train, train.len()),
            validation: DataSource {
                source: format!("20% of {} held out", bundle.train.display()),
                ..data_source(&bundle.train, validation.as_ref().map_or(0, Dataset::len))
            },
            acceptance: Some(data_source(&bundle.acceptance, acceptance.len())),
        },
    );
    let mut provenance = retrained
        .provenance
        .take()
        .unwrap_or(serde_json::Value::Null);
    let retraining = serde_json::json!({
        "retrained_from": format!("{MODEL_FOLDER}/{}", super::models::MLP_FILE),
        "rounds": result.rounds,
        "epochs": result.epochs.len(),
        "retrainer_verdict": result.verdict,
        "lineage": lineage,
    });
    match &mut provenance {
        serde_json::Value::Object(map) => {
            map.insert("retrain".into(), retraining);
        }
        _ => provenance = serde_json::json!({ "retrain": retraining }),
    }
    retrained.provenance = Some(provenance);
    let retrained_path = options.out.join(MODEL_FOLDER).join(RETRAINED_FILE);
    retrained.save(&retrained_path)?;
    progress(&format!(
        "wrote {} ({} rounds, {} epochs)",
        retrained_path.display(),
        result.rounds.len(),
        result.epochs.len()
    ));

    let after = certify_model(
        &retrained,
        &retrained_path,
        &bundle.acceptance,
        &acceptance,
        &requirement,
        &pipeline,
        &options.out.join(AFTER_FOLDER),
        &options.command_line,
        quick_rows,
    )?;
    progress(&format!("pump-mlp-retrained: {}", describe(&after.summary)));
    Ok(DemoOutcome {
        bundle,
        samples: acceptance.len(),
        linear_clean_accuracy,
        mlp_clean_accuracy,
        requirement: described,
        before,
        retrain_verdict: result.verdict,
        retrain_rounds: result.rounds.len(),
        after,
    })
}

/// One line of figures from a summary.
pub fn describe(summary: &Summary) -> String {
    format!(
        "verdict {}, certified {:.4} (lower bound), empirical robust {:.4} (upper bound), clean {:.4}, unresolved {}",
        summary.verdict.name(),
        summary.certified_accuracy,
        summary.empirical_robust_accuracy,
        summary.clean_accuracy,
        summary.unresolved
    )
}

/// The certify pipeline settings of the demo: every bounding stage and the quick attack; half a second
/// of branch and bound per undecided sample (none with `quick`).
pub fn pipeline_options(quick: bool) -> PipelineOptions {
    PipelineOptions {
        budget_seconds: if quick { 0.0 } else { 0.5 },
        seed: super::scenario::DEFAULT_SEED,
        ..PipelineOptions::default()
    }
}

/// The retrainer settings of the demo (budget, targets and floor are taken from `requirement`).
pub fn retrain_settings(
    requirement: &Requirement,
    quick: bool,
    pipeline: PipelineOptions,
) -> RetrainSettings {
    let floor = requirement.floor.unwrap_or(0.0);
    let epochs = if quick { 4 } else { 60 };
    RetrainSettings {
        constrained: ConstrainedSettings {
            train: TrainSettings {
                epochs,
                batch_size: 32,
                optimizer: OptimizerKind::adam(0.002),
                weight_decay: 1e-4,
                seed: super::scenario::DEFAULT_SEED,
                validation_fraction: 0.0,
                patience: None,
            },
            budget: Budget::uniform(Norm::Linf, 0.0, super::scenario::FEATURES.len()),
            targets: Targets::Any,
            loss: RobustLoss::LinearInterval {
                final_linear_weight: 0.0,
            },
            constraint: Constraint::RobustError { floor, slack: 0.02 },
            formulation: Formulation::PrimalDual {
                dual_step: 0.5,
                initial_multiplier: 0.1,
                per_class: false,
            },
            ramp_epochs: if quick { 1 } else { 20 },
            measure_certified: true,
            gap_correction: true,
            checks_per_epoch: 4,
            final_rate_factor: 1.0,
            average_tail: 0.0,
        },
        round_epochs: if quick { 1 } else { 20 },
        max_rounds: if quick { 1 } else { 3 },
        slack_step: 0.02,
        pipeline,
        keep: Keep::BestFeasible,
        near_misses: NearMisses::OFF,
        confidence: ConfidenceSettings::default(),
    }
}

#[allow(clippy::too_many_arguments)]
fn certify_model(
    model: &Model,
    model_path: &Path,
    data_path: &Path,
    data: &Dataset,
    requirement: &Requirement,
    pipeline: &PipelineOptions,
    folder: &Path,
    command_line: &[String],
    first_rows_only: Option<usize>,
) -> Result<CertifiedModel, DemoError> {
    std::fs::create_dir_all(folder).map_err(|cause| DemoError::Io {
        path: folder.display().to_string(),
        cause,
    })?;
    let mut sources =
        Sources::from_files(model_path, data_path).map_err(|cause| DemoError::Io {
            path: model_path.display().to_string(),
            cause,
        })?;
    if let Some(rows) = first_rows_only {
        sources.data_path = format!("{} (first {rows} rows, --quick)", data_path.display());
    }
    let options = CertifyOptions {
        pipeline: pipeline.clone(),
        label_column: "label".into(),
        command_line: command_line.to_vec(),
        ..CertifyOptions::default()
    };
    let mut report: Report = certify(model, data, requirement, &sources, &options)?;
    let report_path = folder.join(REPORT_FILE);
    if report.summary.counterexample > 0 {
        let csv = folder.join("report.counterexamples.csv");
        write_counterexamples(&report, &csv)?;
        report.counterexamples = Some("report.counterexamples.csv".into());
    }
    crate::atomic::write_file(&report_path, report.to_json_string().as_bytes()).map_err(
        |cause| DemoError::Io {
            path: report_path.display().to_string(),
            cause,
        },
    )?;
    let (sheet_markdown, sheet_html) = crate::sheet::write_sheet(&report, folder)?;
    Ok(CertifiedModel {
        model: model_path.to_path_buf(),
        report: report_path,
        sheet_markdown,
        sheet_html,
        summary: report.summary,
    })
}

fn load_data(path: &Path, model: &Model) -> Result<Dataset, DemoError> {
    Ok(load_csv(path, model, &DataOptions::default())?)
}

fn first_rows(data: &Dataset, rows: usize) -> Dataset {
    let rows = rows.min(data.len());
    Dataset {
        features: data.features.columns(0, rows).into_owned(),
        labels: data.labels[..rows].to_vec(),
    }
}
