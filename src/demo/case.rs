//! One model's part of the demo: certify the bundled model against its requirement, retrain it
//! toward the floor with the constrained (primal-dual) retrainer, save the retrained model, certify
//! it again, and write both reports and sheets.
//!
//! Every verdict comes from the certify pipeline ([`crate::certify::certify`]: sound bounds,
//! validated counterexamples, search within a time budget); the retrainer's own figures are only
//! recorded. Nothing here prints; progress lines go to the caller's observer.

use std::path::{Path, PathBuf};

use crate::certify::{
    certify, write_counterexamples, CertifyOptions, PipelineOptions, Report, Sources, Summary,
};
use crate::data::Dataset;
use crate::model::Model;
use crate::threat::requirement::Requirement;
use crate::train::lineage::{lineage, DataSource, RetrainData};
use crate::train::plain::split_validation;
use crate::train::retrain::{retrain, RetrainSettings, RetrainVerdict};

use super::bundle::MODEL_FOLDER;
use super::DemoError;

/// File name of a report inside its folder.
pub const REPORT_FILE: &str = "report.json";

/// What one case works on and where its files go.
pub struct Case<'a> {
    /// The bundled model and its file.
    pub model: &'a Model,
    /// The bundled model's file.
    pub model_path: &'a Path,
    /// All training rows (20% are held out as validation rows, as `ballast retrain` does).
    pub train: &'a Dataset,
    /// The training file (for the lineage record).
    pub train_path: &'a Path,
    /// The acceptance rows certified before and after.
    pub acceptance: &'a Dataset,
    /// The acceptance file (for the reports).
    pub acceptance_path: &'a Path,
    /// The requirement both certifications judge.
    pub requirement: &'a Requirement,
    /// The certify pipeline settings.
    pub pipeline: &'a PipelineOptions,
    /// The retrainer settings.
    pub retrain: RetrainSettings,
    /// Name of the retrained model (also its file name, with `.json`, in the models folder).
    pub retrained_name: &'a str,
    /// Folders of the reports and sheets before and after retraining.
    pub folders: (PathBuf, PathBuf),
    /// When only the first rows of the acceptance file are used (`--quick`), how many.
    pub first_rows_only: Option<usize>,
    /// The command line, recorded in the reports.
    pub command_line: &'a [String],
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

/// What one case did.
#[derive(Debug, Clone)]
pub struct CaseOutcome {
    /// The bundled model against the requirement.
    pub before: CertifiedModel,
    /// The retrainer's own verdict on its final round.
    pub retrain_verdict: RetrainVerdict,
    /// Rounds the retrainer ran.
    pub retrain_rounds: usize,
    /// Epochs the retrainer ran in all.
    pub retrain_epochs: usize,
    /// The retrained model against the requirement.
    pub after: CertifiedModel,
}

/// Runs `case` with the output folder `out` (the retrained model goes to `out/models/`).
pub fn run_case(
    case: &Case,
    out: &Path,
    split_seed: u64,
    progress: &mut dyn FnMut(&str),
) -> Result<CaseOutcome, DemoError> {
    let name = case.model.name.clone().unwrap_or_else(|| "model".into());
    let before = certify_model(case, case.model, case.model_path, &case.folders.0)?;
    progress(&format!("{name}: {}", describe(&before.summary)));

    progress(&format!(
        "retraining {name} toward the floor (constrained primal-dual trainer)"
    ));
    // As `ballast retrain` does by default: 20% of the training rows steer and select (validation).
    let (train, validation) = split_validation(case.train, 0.2, split_seed);
    let result = retrain(
        case.model,
        &train,
        validation.as_ref(),
        case.acceptance,
        case.requirement,
        &case.retrain,
        &mut |_| {},
    )?;
    let mut retrained = result.model.clone();
    retrained.name = Some(case.retrained_name.to_owned());
    let digest = |path: &Path| crate::digest::sha256_file(path).ok();
    let data_source = |path: &Path, rows| DataSource {
        source: path.display().to_string(),
        sha256: digest(path),
        rows,
    };
    let lineage = lineage(
        &case.model_path.display().to_string(),
        &digest(case.model_path).unwrap_or_default(),
        &case.retrain,
        &result,
        &RetrainData {
            train: data_source(case.train_path, train.len()),
            validation: DataSource {
                source: format!("20% of {} held out", case.train_path.display()),
                ..data_source(case.train_path, validation.as_ref().map_or(0, Dataset::len))
            },
            acceptance: Some(data_source(case.acceptance_path, case.acceptance.len())),
        },
    );
    let mut provenance = retrained
        .provenance
        .take()
        .unwrap_or(serde_json::Value::Null);
    let source = case
        .model_path
        .file_name()
        .map(|f| f.to_string_lossy().into_owned())
        .unwrap_or_default();
    let retraining = serde_json::json!({
        "retrained_from": format!("{MODEL_FOLDER}/{source}"),
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
    let retrained_path = out
        .join(MODEL_FOLDER)
        .join(format!("{}.json", case.retrained_name));
    retrained.save(&retrained_path)?;
    progress(&format!(
        "wrote {} ({} rounds, {} epochs)",
        retrained_path.display(),
        result.rounds.len(),
        result.epochs.len()
    ));
    let after = certify_model(case, &retrained, &retrained_path, &case.folders.1)?;
    progress(&format!(
        "{}: {}",
        case.retrained_name,
        describe(&after.summary)
    ));
    Ok(CaseOutcome {
        before,
        retrain_verdict: result.verdict,
        retrain_rounds: result.rounds.len(),
        retrain_epochs: result.epochs.len(),
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

fn certify_model(
    case: &Case,
    model: &Model,
    model_path: &Path,
    folder: &Path,
) -> Result<CertifiedModel, DemoError> {
    std::fs::create_dir_all(folder).map_err(|cause| DemoError::Io {
        path: folder.display().to_string(),
        cause,
    })?;
    let mut sources =
        Sources::from_files(model_path, case.acceptance_path).map_err(|cause| DemoError::Io {
            path: model_path.display().to_string(),
            cause,
        })?;
    if let Some(rows) = case.first_rows_only {
        sources.data_path = format!(
            "{} (first {rows} rows, --quick)",
            case.acceptance_path.display()
        );
    }
    let options = CertifyOptions {
        pipeline: case.pipeline.clone(),
        label_column: "label".into(),
        command_line: case.command_line.to_vec(),
        ..CertifyOptions::default()
    };
    let mut report: Report = certify(model, case.acceptance, case.requirement, &sources, &options)?;
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
