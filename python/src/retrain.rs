//! `ballast._native.retrain`: constrained (primal-dual) retraining toward a certified floor on arrays,
//! with the settings and defaults of `ballast retrain`, and its result.
//!
//! Without validation arrays, 20 % of the training rows are held out as `ballast retrain` does (same
//! seed, same rows); without acceptance arrays the validation data serves as acceptance data. The
//! returned model carries the retraining record in its provenance, as the command line's does (data
//! named by digests of the arrays). Ctrl-C stops the run at the end of the epoch in progress and
//! raises `KeyboardInterrupt`; no model is returned.

use numpy::{PyReadonlyArray1, PyReadonlyArray2};
use pyo3::prelude::*;

use ballast::certify::{PipelineOptions, Sources};
use ballast::train::confidence::ConfidenceSettings;
use ballast::train::constrained::{ConstrainedEpoch, ConstrainedSettings, Constraint, Formulation};
use ballast::train::lineage::{DataSource, RetrainData};
use ballast::train::plain::split_validation;
use ballast::train::provenance::{retrain_provenance, ProvenanceInputs};
use ballast::train::retrain::{
    retrain as run_retrain, Keep, NearMisses, RetrainResult, RetrainSettings, RetrainVerdict,
};
use ballast::train::robust::RobustLoss;
use ballast::train::{new_mlp, OptimizerKind, TrainSettings};

use crate::arrays;
use crate::certify::PyReport;
use crate::errors::{input, OrPy};
use crate::interrupt::{run_detached, stop_if_cancelled};
use crate::model::PyModel;
use crate::requirement::PyRequirement;

/// What a retraining run returned.
#[pyclass(name = "RetrainResult", module = "ballast._native", frozen)]
pub struct PyRetrainResult {
    result: RetrainResult,
    /// X_acceptance, y_acceptance were given.
    acceptance_given: bool,
}

/// The training settings, named as `ballast retrain`'s flags (with `_` for `-`), with its defaults.
#[derive(Debug, Clone, FromPyObject)]
#[pyo3(from_item_all)]
pub struct Settings {
    epochs: usize,
    round_epochs: Option<usize>,
    max_rounds: usize,
    ramp_epochs: Option<usize>,
    learning_rate: f64,
    final_rate: f64,
    batch_size: usize,
    seed: u64,
    loss: String,
    constraint: String,
    level: Option<f64>,
    slack: f64,
    slack_step: f64,
    penalty: Option<f64>,
    per_class: bool,
    dual_step: f64,
    keep: String,
    checks_per_epoch: usize,
    near_miss: f64,
    near_miss_tries: usize,
    average_tail: f64,
    hidden: Option<Vec<usize>>,
    acceptance_size: Option<usize>,
    pass_probability: Option<f64>,
}

fn check(ok: bool, message: impl FnOnce() -> String) -> PyResult<()> {
    if ok {
        Ok(())
    } else {
        Err(input(message()))
    }
}

impl Settings {
    /// The checked settings (messages as the command line's, naming the keyword).
    fn retrain_settings(&self, floor: f64) -> PyResult<RetrainSettings> {
        check(self.epochs > 0, || "epochs: must be at least 1".into())?;
        check(self.max_rounds > 0, || {
            "max_rounds: must be at least 1".into()
        })?;
        check(self.batch_size > 0, || {
            "batch_size: must be at least 1".into()
        })?;
        check(
            self.learning_rate.is_finite() && self.learning_rate > 0.0,
            || {
                format!(
                    "learning_rate: {} is not allowed, expected a number > 0",
                    self.learning_rate
                )
            },
        )?;
        check(
            self.slack.is_finite()
                && self.slack >= 0.0
                && self.slack_step.is_finite()
                && self.slack_step >= 0.0,
            || "slack / slack_step: expected finite numbers ≥ 0".into(),
        )?;
        check(self.final_rate > 0.0 && self.final_rate <= 1.0, || {
            format!(
                "final_rate: {} is not allowed, expected a number in (0, 1]",
                self.final_rate
            )
        })?;
        check(
            self.near_miss.is_finite() && (0.0..1.0).contains(&self.near_miss),
            || {
                format!(
                    "near_miss: {} is not allowed, expected a fraction in [0, 1)",
                    self.near_miss
                )
            },
        )?;
        check(self.checks_per_epoch > 0, || {
            "checks_per_epoch: 0 is not allowed, expected a whole number ≥ 1".into()
        })?;
        check(self.dual_step.is_finite() && self.dual_step > 0.0, || {
            format!(
                "dual_step: {} is not allowed, expected a number > 0",
                self.dual_step
            )
        })?;
        check((0.0..=1.0).contains(&self.average_tail), || {
            format!(
                "average_tail: {} is not allowed, expected a fraction in [0, 1]",
                self.average_tail
            )
        })?;
        if let Some(w) = self.penalty {
            check(w.is_finite() && w >= 0.0, || {
                format!("penalty: {w} is not allowed, expected a weight ≥ 0")
            })?;
        }
        if self.acceptance_size == Some(0) {
            return Err(input(
                "acceptance_size: 0 is not allowed, expected a whole number ≥ 1",
            ));
        }
        if let Some(q) = self.pass_probability {
            check(q > 0.0 && q < 1.0, || {
                format!("pass_probability: {q} is not allowed, expected a level strictly between 0 and 1 (e.g. 0.95)")
            })?;
        }
        if let Some(h) = &self.hidden {
            check(h.iter().all(|n| *n > 0), || {
                "hidden: layer sizes must be ≥ 1 (an empty list: softmax regression)".into()
            })?;
        }
        let loss = match self.loss.as_str() {
            "certified" => RobustLoss::LinearInterval {
                final_linear_weight: 0.0,
            },
            "interval" => RobustLoss::Interval,
            "adversarial" => RobustLoss::Adversarial { steps: 7 },
            other => {
                return Err(input(format!(
                    "loss: \"{other}\" is not allowed, expected certified, interval or adversarial"
                )))
            }
        };
        let constraint = match self.constraint.as_str() {
            "error" => Constraint::RobustError {
                floor,
                slack: self.slack,
            },
            "loss" => match self.level {
                Some(level) if level.is_finite() && level >= 0.0 => {
                    Constraint::RobustLossLevel { level }
                }
                Some(level) => {
                    return Err(input(format!(
                        "level: {level} is not allowed, expected a number ≥ 0"
                    )))
                }
                None => {
                    return Err(input(
                        "constraint=\"loss\" needs level (the allowed mean robust loss)",
                    ))
                }
            },
            other => {
                return Err(input(format!(
                    "constraint: \"{other}\" is not allowed, expected error or loss"
                )))
            }
        };
        let keep = match self.keep.as_str() {
            "best-feasible" | "best_feasible" => Keep::BestFeasible,
            "earliest-feasible" | "earliest_feasible" => Keep::EarliestFeasible,
            "last" => Keep::Last,
            other => {
                return Err(input(format!(
                    "keep: \"{other}\" is not allowed, expected best-feasible, earliest-feasible or last"
                )))
            }
        };
        let formulation = match self.penalty {
            Some(weight) => Formulation::Penalty { weight },
            None => Formulation::PrimalDual {
                dual_step: self.dual_step,
                initial_multiplier: 0.0,
                per_class: self.per_class,
            },
        };
        Ok(RetrainSettings {
            lines: Vec::new(),
            constrained: ConstrainedSettings {
                train: TrainSettings {
                    epochs: self.epochs,
                    batch_size: self.batch_size,
                    optimizer: OptimizerKind::adam(self.learning_rate),
                    weight_decay: 0.0,
                    seed: self.seed,
                    validation_fraction: 0.0,
                    patience: None,
                },
                // Replaced by the requirement's in `retrain`.
                budget: ballast::threat::Budget::uniform(ballast::threat::Norm::Linf, 0.0, 0),
                targets: ballast::threat::Targets::Any,
                loss,
                constraint,
                terms: Vec::new(),
                relax: None,
                formulation,
                ramp_epochs: self.ramp_epochs.unwrap_or((self.epochs * 2) / 5),
                measure_certified: true,
                gap_correction: true,
                checks_per_epoch: self.checks_per_epoch,
                final_rate_factor: self.final_rate,
                average_tail: self.average_tail,
            },
            round_epochs: self.round_epochs.unwrap_or((self.epochs / 2).max(1)),
            max_rounds: self.max_rounds,
            slack_step: self.slack_step,
            pipeline: PipelineOptions {
                seed: self.seed,
                ..PipelineOptions::default()
            },
            keep,
            near_misses: NearMisses {
                margin: self.near_miss,
                tries: self.near_miss_tries,
            },
            confidence: ConfidenceSettings {
                acceptance_size: self.acceptance_size,
                pass_probability: self.pass_probability,
            },
        })
    }
}

/// Optional labelled arrays (validation or acceptance).
type Pair<'py> = Option<(PyReadonlyArray2<'py, f64>, PyReadonlyArray1<'py, i64>)>;

/// Retrains `model` on `X`, `y` toward `requirement`'s floor.
#[pyfunction]
#[pyo3(signature = (model, x, y, requirement, settings, *, validation = None, acceptance = None,
    out_of_range = "error"))]
#[allow(clippy::too_many_arguments)]
pub fn retrain(
    py: Python<'_>,
    model: &PyModel,
    x: PyReadonlyArray2<'_, f64>,
    y: PyReadonlyArray1<'_, i64>,
    requirement: &PyRequirement,
    settings: Settings,
    validation: Pair<'_>,
    acceptance: Pair<'_>,
    out_of_range: &str,
) -> PyResult<(PyModel, PyRetrainResult)> {
    let Some(floor) = requirement.requirement.floor else {
        return Err(input(
            "floor: retraining needs a floor (give floor or a requirement file with floor)",
        ));
    };
    let retrain_settings = settings.retrain_settings(floor)?;
    let requirement = &requirement.requirement;
    if requirement.confidence.is_none()
        && (settings.acceptance_size.is_some() || settings.pass_probability.is_some())
    {
        return Err(input("acceptance_size / pass_probability: only used with confidence (or confidence in the requirement file)"));
    }
    if settings.acceptance_size.is_some() && acceptance.is_some() {
        return Err(input(
            "acceptance_size: not allowed with X_acceptance, whose size is the acceptance set's",
        ));
    }
    if requirement.confidence.is_some()
        && acceptance.is_none()
        && settings.acceptance_size.is_none()
    {
        return Err(input("confidence: the reviewer's check needs the acceptance set: give X_acceptance and y_acceptance, or acceptance_size when the set stays with the reviewer (the validation data cannot stand in for it)"));
    }
    let policy = arrays::policy(out_of_range)?;
    let parent = &model.model;
    let train_all = arrays::dataset(("X", "y"), &x, &y, parent, policy)?;
    let (train, validation) = match &validation {
        Some((xv, yv)) => (
            train_all,
            arrays::dataset(("X_val", "y_val"), xv, yv, parent, policy)?,
        ),
        None => match split_validation(&train_all, 0.2, settings.seed) {
            (t, Some(v)) => (t, v),
            (_, None) => {
                return Err(input(
                    "X: too few rows to hold out validation data; give X_val and y_val",
                ))
            }
        },
    };
    let acceptance_given = acceptance.is_some();
    let acceptance = match &acceptance {
        Some((xa, ya)) => {
            arrays::dataset(("X_acceptance", "y_acceptance"), xa, ya, parent, policy)?
        }
        None => validation.clone(),
    };
    let initial = match &settings.hidden {
        Some(h) => {
            let mut m = new_mlp(
                &parent.input,
                parent.class_count(),
                h,
                &train,
                settings.seed,
            )
            .or_py()?;
            m.name = parent.name.clone();
            m.classes = parent.classes.clone();
            m
        }
        None => parent.clone(),
    };
    let result = run_detached(py, |cancel| {
        let mut observe = |_: &ConstrainedEpoch| stop_if_cancelled(cancel);
        run_retrain(
            &initial,
            &train,
            Some(&validation),
            &acceptance,
            requirement,
            &retrain_settings,
            &mut observe,
        )
    })?
    .or_py()?;

    // The retraining record, as the command line writes it (data named by digests of the arrays).
    let parent_sources = crate::certify::sources(model, &train);
    let digest = |d: &ballast::data::Dataset, what: &str| DataSource {
        source: format!("{what} (arrays)"),
        sha256: Some(Sources::in_memory(parent, d).data_sha256),
        rows: d.len(),
    };
    let data = RetrainData {
        train: digest(&train, "X, y"),
        validation: digest(&validation, "validation"),
        acceptance: acceptance_given.then(|| digest(&acceptance, "X_acceptance, y_acceptance")),
    };
    let inputs = ProvenanceInputs {
        parent,
        parent_path: &parent_sources.model_path,
        parent_sha256: &parent_sources.model_sha256,
        hidden: settings.hidden.as_deref(),
        requirement,
        floor,
        data: &data,
    };
    let mut retrained = result.model.clone();
    retrained.provenance = Some(retrain_provenance(&inputs, &retrain_settings, &result));
    let mut result = result;
    result.model = retrained.clone();
    Ok((
        PyModel::in_memory(retrained),
        PyRetrainResult {
            result,
            acceptance_given,
        },
    ))
}

#[pymethods]
impl PyRetrainResult {
    /// `met` (the certify pipeline proved the floor on the acceptance data) or `not_met`.
    #[getter]
    fn verdict(&self) -> &'static str {
        match self.result.verdict {
            RetrainVerdict::Met => "met",
            RetrainVerdict::NotMet => "not_met",
        }
    }

    /// The command line's exit code (0 met, 1 not met).
    #[getter]
    fn exit_code(&self) -> u8 {
        match self.result.verdict {
            RetrainVerdict::Met => 0,
            RetrainVerdict::NotMet => 1,
        }
    }

    /// Cautions about the verdict, as `ballast retrain` prints them (e.g. a verdict on the validation
    /// data, which also steered the rounds, when no acceptance set was given).
    #[getter]
    fn cautions(&self) -> Vec<String> {
        ballast::train::lineage::cautions(
            &self.result,
            self.acceptance_given
                .then_some("X_acceptance, y_acceptance"),
            None,
        )
    }

    /// Every epoch of every round as JSON (numbers that are not finite are null).
    fn epochs_json(&self) -> String {
        serde_json::to_string(&self.result.epochs).expect("epochs serialise")
    }

    /// One record per round as JSON.
    fn rounds_json(&self) -> String {
        serde_json::to_string(&self.result.rounds).expect("rounds serialise")
    }

    /// The certify report of the returned model on the acceptance data.
    #[getter]
    fn report(&self) -> PyReport {
        PyReport {
            report: self.result.report.clone(),
        }
    }
}
