//! The certification pipeline: per-sample verdicts, the requirement's verdict and the report.
//!
//! [`certify`] is the one call other parts of ballast (and other programs) use: a model, a data set and a
//! [`Requirement`] in, a complete [`Report`] out. [`certify_run`] adds what the command line needs:
//! a journal to resume from, a cancel flag (signals) and a progress [`Observer`]. The pieces:
//! [`pipeline`] (the stages per sample), [`statistics`] (Clopper–Pearson), [`report`] (the document and
//! the verdict rule), [`journal`] (resume), [`merge`] (shard reports into one), [`progress`] (the
//! terminal progress bar). Soundness rules are those of the stages: nothing is certified without a
//! sound bound or proof, every counterexample is re-validated, and an exhausted search is `unresolved`.

pub mod compare;
pub mod decision;
pub mod floor_epsilon;
pub mod input_record;
pub mod journal;
pub mod lines;
pub mod merge;
pub mod perturbation;
pub mod pipeline;
pub mod progress;
mod radius;
pub mod report;
pub mod sample_record;
mod search_stage;
mod stages;
pub mod statistics;

use std::path::Path;
use std::sync::atomic::AtomicBool;
use std::sync::Mutex;
use std::time::Instant;

pub use pipeline::{Observer, PipelineOptions, Silent};
pub use report::{Report, SampleRecord, Shard, Stage, Status, Summary, Verdict};

use crate::data::Dataset;
use crate::model::Model;
use crate::threat::requirement::Requirement;
use report::{DataInfo, ModelInfo, RequirementRecord, Settings, ToolInfo, REPORT_FORMAT};

/// Why a certification run could not be completed (bad input, I/O, a mismatched journal or shard);
/// per-sample outcomes are never errors.
#[derive(Debug, thiserror::Error)]
pub enum CertifyError {
    /// A bounding method rejected its input (a bug or an inconsistent model).
    #[error("sample {index}: bound computation failed: {message}")]
    Bound {
        /// The sample (row index).
        index: usize,
        /// What went wrong.
        message: String,
    },
    /// The attack rejected its input.
    #[error("sample {index}: attack failed: {message}")]
    Attack {
        /// The sample.
        index: usize,
        /// What went wrong.
        message: String,
    },
    /// The search rejected its input.
    #[error("sample {index}: search failed: {message}")]
    Search {
        /// The sample.
        index: usize,
        /// What went wrong.
        message: String,
    },
    /// The journal could not be read or written.
    #[error("journal: {0}")]
    Journal(String),
    /// Inputs that must agree do not (journal of another run, shards of different runs).
    #[error("{0}")]
    Mismatch(String),
    /// The data and model do not fit the requirement (e.g. sizes).
    #[error("{0}")]
    Invalid(String),
    /// An output file could not be written.
    #[error("{path}: {message}")]
    Output {
        /// The file.
        path: String,
        /// What the system said.
        message: String,
    },
}

/// Where the model and data came from, recorded in the report with their digests.
#[derive(Debug, Clone, PartialEq)]
pub struct Sources {
    /// The model file as given.
    pub model_path: String,
    /// SHA-256 of the model file.
    pub model_sha256: String,
    /// The data file as given.
    pub data_path: String,
    /// SHA-256 of the data file.
    pub data_sha256: String,
    /// What the input-range policy did while reading the data file (absent: not recorded).
    pub data_range: Option<crate::data::RangeCounts>,
}

impl Sources {
    /// Digests of the two files.
    pub fn from_files(model: &Path, data: &Path) -> std::io::Result<Sources> {
        Ok(Sources {
            model_path: model.display().to_string(),
            model_sha256: crate::digest::sha256_file(model)?,
            data_path: data.display().to_string(),
            data_sha256: crate::digest::sha256_file(data)?,
            data_range: None,
        })
    }

    /// Digests of a model and data set held in memory: the model's JSON text, and the labels and
    /// features as little-endian bytes (sample by sample).
    pub fn in_memory(model: &Model, data: &Dataset) -> Sources {
        let mut bytes = Vec::with_capacity(data.features.len() * 8 + data.len() * 8);
        for i in 0..data.len() {
            bytes.extend_from_slice(&(data.labels[i] as u64).to_le_bytes());
            for v in data.sample(i) {
                bytes.extend_from_slice(&v.to_le_bytes());
            }
        }
        Sources {
            model_path: "(in memory)".into(),
            model_sha256: crate::digest::sha256_bytes(model.to_json_string().as_bytes()),
            data_path: "(in memory)".into(),
            data_sha256: crate::digest::sha256_bytes(&bytes),
            data_range: None,
        }
    }
}

/// Everything about a run besides model, data and requirement.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct CertifyOptions {
    /// Stages, time budget, seed, radius.
    pub pipeline: PipelineOptions,
    /// Certify only this slice of the samples.
    pub shard: Option<Shard>,
    /// The label column's name (recorded).
    pub label_column: String,
    /// The command line to record in the report (for reproducing the run).
    pub command_line: Vec<String>,
}

/// Certifies `data` against `requirement` with the default observer (none), no journal and no
/// cancellation, and returns the complete report (not written anywhere).
pub fn certify(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    sources: &Sources,
    options: &CertifyOptions,
) -> Result<Report, CertifyError> {
    certify_run(
        model,
        data,
        requirement,
        sources,
        options,
        None,
        &Silent,
        &AtomicBool::new(false),
    )
}

/// A journal for [`certify_run`]: where it lives and whether to resume from it.
#[derive(Debug, Clone, PartialEq)]
pub struct JournalOptions {
    /// The journal file.
    pub path: std::path::PathBuf,
    /// Continue from the finished samples in it (after checking it belongs to this run).
    pub resume: bool,
}

/// Certifies with a journal, a progress observer and a cancel flag. When `cancel` is raised the run
/// stops before the next sample and the report is marked incomplete (`complete: false`; the samples not
/// run count as unresolved, so the verdict stays sound).
#[allow(clippy::too_many_arguments)]
pub fn certify_run(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    sources: &Sources,
    options: &CertifyOptions,
    journal: Option<&JournalOptions>,
    observer: &dyn Observer,
    cancel: &AtomicBool,
) -> Result<Report, CertifyError> {
    let start = Instant::now();
    check_inputs(model, data, requirement)?;
    if let Some(s) = options.shard {
        if s.count == 0 || s.index == 0 || s.index > s.count {
            return Err(CertifyError::Invalid(format!(
                "--shard {}/{}: expected K/N with 1 ≤ K ≤ N",
                s.index, s.count
            )));
        }
    }
    let mut report = empty_report(model, data, requirement, sources, options);
    let indices: Vec<usize> = (0..data.len())
        .filter(|i| options.shard.map(|s| s.contains(*i)).unwrap_or(true))
        .collect();
    report.data.samples = indices.len();
    let fingerprint = fingerprint(&report);
    let mut done: Vec<SampleRecord> = Vec::new();
    if let Some(j) = journal {
        if j.resume {
            done = journal::Journal::read(&j.path, &fingerprint)?;
            if let Some(r) = done.iter().find(|r| !indices.contains(&r.index)) {
                return Err(CertifyError::Mismatch(format!(
                    "{}: sample {} is not part of this run",
                    j.path.display(),
                    r.index
                )));
            }
        }
    }
    let finished: std::collections::HashSet<usize> = done.iter().map(|r| r.index).collect();
    let pending: Vec<usize> = indices
        .iter()
        .copied()
        .filter(|i| !finished.contains(i))
        .collect();
    let mut writer = match journal {
        Some(j) => Some(journal::Journal::create(&j.path, &fingerprint, &done)?),
        None => None,
    };
    observer.begin(indices.len(), pending.len());
    for r in &done {
        observer.sample_done(r);
    }
    let sink = Mutex::new(|record: &SampleRecord| -> std::io::Result<()> {
        match writer.as_mut() {
            Some(w) => w.append(record),
            None => Ok(()),
        }
    });
    let result = pipeline::run(
        model,
        data,
        requirement,
        &options.pipeline,
        &pending,
        observer,
        cancel,
        &sink,
    );
    observer.end();
    let new = result?;
    done.extend(new);
    done.sort_by_key(|r| r.index);
    report.complete = done.len() == indices.len();
    report.samples = done;
    report.seconds = start.elapsed().as_secs_f64();
    report.recompute();
    report.counterexample_movement = perturbation::movement(&report, data);
    Ok(report)
}

fn check_inputs(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
) -> Result<(), CertifyError> {
    let dim = model.input.dim;
    if data.features.nrows() != dim {
        return Err(CertifyError::Invalid(format!(
            "the data has {} features per sample, the model expects {dim}",
            data.features.nrows()
        )));
    }
    if data.is_empty() {
        return Err(CertifyError::Invalid("the data set has no samples".into()));
    }
    if let Some(t) = &requirement.tolerances {
        if t.values.len() != dim {
            return Err(CertifyError::Invalid(format!(
                "the requirement gives {} tolerances, the model has {dim} features",
                t.values.len()
            )));
        }
    }
    let classes = model.class_count();
    if let Some(i) = data.labels.iter().position(|l| *l >= classes) {
        return Err(CertifyError::Invalid(format!(
            "sample {i}: label {} is not a class of the model ({classes} classes)",
            data.labels[i]
        )));
    }
    Ok(())
}

fn empty_report(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    sources: &Sources,
    options: &CertifyOptions,
) -> Report {
    let class_name = |c: usize| model.class_name(c);
    Report {
        format: REPORT_FORMAT.into(),
        tool: ToolInfo {
            name: "ballast".into(),
            version: env!("CARGO_PKG_VERSION").into(),
        },
        date: report::utc_now(),
        complete: false,
        model: ModelInfo {
            path: sources.model_path.clone(),
            sha256: sources.model_sha256.clone(),
            name: model.name.clone(),
            classes: (0..model.class_count())
                .map(|c| model.class_name(c))
                .collect(),
            features: (0..model.input.dim)
                .map(|i| model.feature_name(i))
                .collect(),
            parameters: model.parameter_count(),
            arithmetic: Some(model.arithmetic.name().to_string()),
            lineage: crate::model::lineage::Lineage::of(model),
            input: Some(input_record::InputRecord::of(model)),
        },
        data: DataInfo {
            path: sources.data_path.clone(),
            sha256: sources.data_sha256.clone(),
            samples: data.len(),
            rows: data.len(),
            out_of_range: sources.data_range.clone(),
        },
        requirement: RequirementRecord::new(requirement, &class_name),
        settings: Settings {
            budget_seconds: options.pipeline.budget_seconds,
            seed: options.pipeline.seed,
            radius: options.pipeline.radius,
            stages: options.pipeline.stages(),
            shard: options.shard,
            label_column: if options.label_column.is_empty() {
                "label".into()
            } else {
                options.label_column.clone()
            },
        },
        command_line: options.command_line.clone(),
        summary: report::summarize(
            &report::Counts::from_statuses(std::iter::empty(), data.len()),
            requirement,
        ),
        per_class: Vec::new(),
        stages: Vec::new(),
        sweep: Vec::new(),
        floor_epsilons: None,
        counterexample_movement: None,
        seconds: 0.0,
        counterexamples: None,
        requirements: Vec::new(),
        samples: Vec::new(),
    }
}

/// What must agree between a journal and the run resuming it: the tool's version (results of another
/// version are never reused), digests, requirement and settings.
pub fn fingerprint(report: &Report) -> serde_json::Value {
    serde_json::json!({
        "tool_version": report.tool.version,
        "model_sha256": report.model.sha256,
        "data_sha256": report.data.sha256,
        "data_rows": report.data.rows,
        "data_out_of_range": report.data.out_of_range,
        "requirement": report.requirement,
        "settings": report.settings,
    })
}

/// Writes every counterexample of `report` (all epsilons of a sweep) as CSV:
/// `sample,epsilon,label,new_class,distance,<feature names…>`, atomically.
pub fn write_counterexamples(report: &Report, path: &Path) -> Result<usize, CertifyError> {
    let output = |e: String| CertifyError::Output {
        path: path.display().to_string(),
        message: e,
    };
    let mut writer = csv::Writer::from_writer(Vec::new());
    let mut header = vec![
        "sample".to_string(),
        "epsilon".into(),
        "label".into(),
        "new_class".into(),
        "distance".into(),
    ];
    header.extend(report.model.features.iter().cloned());
    writer
        .write_record(&header)
        .map_err(|e| output(e.to_string()))?;
    let class = |c: usize| {
        report
            .model
            .classes
            .get(c)
            .cloned()
            .unwrap_or_else(|| c.to_string())
    };
    let mut rows = 0;
    for s in &report.samples {
        let outcomes: Vec<(f64, &report::CounterexampleRecord)> = if s.sweep.is_empty() {
            s.counterexample
                .iter()
                .map(|c| (report.requirement.epsilon, c))
                .collect()
        } else {
            s.sweep
                .iter()
                .filter_map(|o| o.counterexample.as_ref().map(|c| (o.epsilon, c)))
                .collect()
        };
        for (epsilon, c) in outcomes {
            let mut row = vec![
                s.index.to_string(),
                format!("{epsilon}"),
                class(s.label),
                class(c.new_class),
                format!("{}", c.distance),
            ];
            row.extend(c.features.iter().map(|v| format!("{v}")));
            writer
                .write_record(&row)
                .map_err(|e| output(e.to_string()))?;
            rows += 1;
        }
    }
    let bytes = writer.into_inner().map_err(|e| output(e.to_string()))?;
    crate::atomic::write_file(path, &bytes).map_err(|e| output(e.to_string()))?;
    Ok(rows)
}
