//! The whole job on the bundled demo, as `ballast demo` runs it: write the embedded files, evaluate
//! the models, then for `pump-mlp` (twelve readings) and `pump-cnn` (64-bin spectra) in turn certify
//! the bundled model against its requirement, retrain it toward the floor with the constrained
//! (primal-dual) retrainer, certify the retrained model again, and write both reports and sheets
//! ([`super::case`]).
//!
//! Every verdict comes from the certify pipeline ([`crate::certify::certify`], sound bounds, validated
//! counterexamples, search with a time budget); this module only chooses the demo's settings and
//! file layout. Progress lines go to an observer callback; nothing here prints.

use std::path::{Path, PathBuf};

use crate::certify::PipelineOptions;
use crate::cli::evaluate::evaluate;
use crate::data::{load_csv, DataOptions, Dataset};
use crate::model::Model;
use crate::threat::requirement::{Requirement, RequirementSpec};
use crate::threat::{Budget, Norm, Targets};
use crate::train::confidence::ConfidenceSettings;
use crate::train::constrained::{ConstrainedSettings, Constraint, Formulation};
use crate::train::retrain::{Keep, NearMisses, RetrainSettings};
use crate::train::robust::RobustLoss;
use crate::train::{OptimizerKind, TrainSettings};

use super::bundle::{write_bundle, BundlePaths};
use super::case::{run_case, Case, CaseOutcome};
use super::scenario::{DEFAULT_SEED, FEATURES};
use super::spectrum;
use super::DemoError;

pub use super::case::{describe, CertifiedModel, REPORT_FILE};

/// Name of the retrained MLP (file `models/pump-mlp-retrained.json`).
pub const RETRAINED_NAME: &str = "pump-mlp-retrained";
/// Name of the retrained CNN (file `models/pump-cnn-retrained.json`).
pub const CNN_RETRAINED_NAME: &str = "pump-cnn-retrained";
/// Folder (inside the output folder) of the report and sheet of the bundled MLP.
pub const BEFORE_FOLDER: &str = "before";
/// Folder of the report and sheet of the retrained MLP.
pub const AFTER_FOLDER: &str = "after";
/// Folder of the report and sheet of the bundled CNN.
pub const CNN_BEFORE_FOLDER: &str = "cnn-before";
/// Folder of the report and sheet of the retrained CNN.
pub const CNN_AFTER_FOLDER: &str = "cnn-after";
/// Acceptance rows used by `--quick` (the first rows of each acceptance file).
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

/// What the demo did.
#[derive(Debug, Clone)]
pub struct DemoOutcome {
    /// The files written from the bundle.
    pub bundle: BundlePaths,
    /// Acceptance samples used per model (all, or [`QUICK_ROWS`] with `--quick`).
    pub samples: usize,
    /// Clean accuracy of `pump-linear` on the acceptance samples.
    pub linear_clean_accuracy: f64,
    /// The requirement on the twelve readings, in plain words.
    pub requirement: String,
    /// The requirement on the spectra, in plain words.
    pub spectrum_requirement: String,
    /// `pump-mlp`: certified, retrained, certified again.
    pub mlp: CaseOutcome,
    /// `pump-cnn`: certified, retrained, certified again.
    pub cnn: CaseOutcome,
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
    let cnn = Model::load(&bundle.cnn_model)?;
    let train = load_data(&bundle.train, &mlp)?;
    let spectrum_train = load_data(&bundle.spectrum_train, &cnn)?;
    let mut acceptance = load_data(&bundle.acceptance, &mlp)?;
    let mut spectrum_acceptance = load_data(&bundle.spectrum_acceptance, &cnn)?;
    if options.quick {
        acceptance = first_rows(&acceptance, QUICK_ROWS);
        spectrum_acceptance = first_rows(&spectrum_acceptance, QUICK_ROWS);
    }
    let linear_clean_accuracy = evaluate(&linear, &acceptance).accuracy;
    progress(&format!(
        "clean accuracy on {} acceptance samples: pump-linear {linear_clean_accuracy:.4}, pump-mlp {:.4}, pump-cnn {:.4} (spectra)",
        acceptance.len(),
        evaluate(&mlp, &acceptance).accuracy,
        evaluate(&cnn, &spectrum_acceptance).accuracy,
    ));
    let requirement = RequirementSpec::from_file(&bundle.requirement)?.resolve(&mlp)?;
    let spectrum_requirement =
        RequirementSpec::from_file(&bundle.spectrum_requirement)?.resolve(&cnn)?;
    let described = requirement.describe(&|c| mlp.class_name(c));
    let spectrum_described = spectrum_requirement.describe(&|c| cnn.class_name(c));
    progress(&format!("requirement: {described}"));
    let pipeline = pipeline_options(options.quick);
    let first_rows_only = options.quick.then_some(acceptance.len());
    let mlp_case = Case {
        model: &mlp,
        model_path: &bundle.mlp_model,
        train: &train,
        train_path: &bundle.train,
        acceptance: &acceptance,
        acceptance_path: &bundle.acceptance,
        requirement: &requirement,
        pipeline: &pipeline,
        retrain: retrain_settings(&requirement, options.quick, pipeline.clone()),
        retrained_name: RETRAINED_NAME,
        folders: (
            options.out.join(BEFORE_FOLDER),
            options.out.join(AFTER_FOLDER),
        ),
        first_rows_only,
        command_line: &options.command_line,
    };
    let mlp_outcome = run_case(&mlp_case, &options.out, DEFAULT_SEED, progress)?;
    progress(&format!("spectrum requirement: {spectrum_described}"));
    let cnn_case = Case {
        model: &cnn,
        model_path: &bundle.cnn_model,
        train: &spectrum_train,
        train_path: &bundle.spectrum_train,
        acceptance: &spectrum_acceptance,
        acceptance_path: &bundle.spectrum_acceptance,
        requirement: &spectrum_requirement,
        retrain: cnn_retrain_settings(&spectrum_requirement, options.quick, pipeline.clone()),
        retrained_name: CNN_RETRAINED_NAME,
        folders: (
            options.out.join(CNN_BEFORE_FOLDER),
            options.out.join(CNN_AFTER_FOLDER),
        ),
        ..mlp_case
    };
    let cnn_outcome = run_case(&cnn_case, &options.out, DEFAULT_SEED, progress)?;
    Ok(DemoOutcome {
        bundle,
        samples: acceptance.len(),
        linear_clean_accuracy,
        requirement: described,
        spectrum_requirement: spectrum_described,
        mlp: mlp_outcome,
        cnn: cnn_outcome,
    })
}

/// The certify pipeline settings of the demo: every bounding stage and the quick attack; half a second
/// of branch and bound per undecided sample (none with `quick`).
pub fn pipeline_options(quick: bool) -> PipelineOptions {
    PipelineOptions {
        budget_seconds: if quick { 0.0 } else { 0.5 },
        seed: DEFAULT_SEED,
        ..PipelineOptions::default()
    }
}

/// The retrainer settings of the demo for `pump-mlp` (budget, targets and floor are taken from
/// `requirement`): 60 epochs with a 20-epoch epsilon ramp, later rounds of 20 epochs.
pub fn retrain_settings(
    requirement: &Requirement,
    quick: bool,
    pipeline: PipelineOptions,
) -> RetrainSettings {
    let schedule = (60, 20, 20, 4);
    settings_with(requirement, quick, pipeline, FEATURES.len(), schedule)
}

/// The retrainer settings of the demo for `pump-cnn`: as [`retrain_settings`] with a shorter
/// schedule, 16 epochs with a 6-epoch ramp, later rounds of 8 epochs, and one validation check per
/// epoch (each check bounds every validation row; on the CNN these bounds cost most of the
/// retraining time, docs/benchmarks/cnn-retrain.md).
pub fn cnn_retrain_settings(
    requirement: &Requirement,
    quick: bool,
    pipeline: PipelineOptions,
) -> RetrainSettings {
    let schedule = (16, 6, 8, 1);
    settings_with(requirement, quick, pipeline, spectrum::BINS, schedule)
}

/// `(epochs, ramp_epochs, round_epochs, checks_per_epoch)` of a full run; `quick` runs 4 epochs
/// with a 1-epoch ramp in one round.
fn settings_with(
    requirement: &Requirement,
    quick: bool,
    pipeline: PipelineOptions,
    dim: usize,
    (epochs, ramp_epochs, round_epochs, checks_per_epoch): (usize, usize, usize, usize),
) -> RetrainSettings {
    let floor = requirement.floor.unwrap_or(0.0);
    let epochs = if quick { 4 } else { epochs };
    RetrainSettings {
        constrained: ConstrainedSettings {
            train: TrainSettings {
                epochs,
                batch_size: 32,
                optimizer: OptimizerKind::adam(0.002),
                weight_decay: 1e-4,
                seed: DEFAULT_SEED,
                validation_fraction: 0.0,
                patience: None,
            },
            budget: Budget::uniform(Norm::Linf, 0.0, dim),
            targets: Targets::Any,
            loss: RobustLoss::LinearInterval {
                final_linear_weight: 0.0,
            },
            constraint: Constraint::RobustError { floor, slack: 0.02 },
            terms: Vec::new(),
            relax: None,
            formulation: Formulation::PrimalDual {
                dual_step: 0.5,
                initial_multiplier: 0.1,
                per_class: false,
            },
            ramp_epochs: if quick { 1 } else { ramp_epochs },
            measure_certified: true,
            gap_correction: true,
            checks_per_epoch,
            final_rate_factor: 1.0,
            average_tail: 0.0,
        },
        round_epochs: if quick { 1 } else { round_epochs },
        max_rounds: if quick { 1 } else { 3 },
        slack_step: 0.02,
        pipeline,
        keep: Keep::BestFeasible,
        near_misses: NearMisses::OFF,
        confidence: ConfidenceSettings::default(),
        lines: Vec::new(),
    }
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
