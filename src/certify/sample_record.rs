//! One sample's record in a report: its status and the stage that decided it at each budget, its
//! margin bound, counterexample and timings.
//!
//! Guarantee: plain data, serialised as documented in docs/report-format.md; nothing here runs a model.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

/// The outcome for one sample at one budget.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Status {
    /// A sound proof that no point of the region changes the answer into a forbidden class.
    Certified,
    /// A validated perturbed input inside the region that changes the answer (it is saved).
    Counterexample,
    /// Wrong already without perturbation.
    Misclassified,
    /// Neither proven nor refuted within the budget.
    Unresolved,
}

impl Status {
    /// The lowercase name used in reports.
    pub fn name(&self) -> &'static str {
        match self {
            Status::Certified => "certified",
            Status::Counterexample => "counterexample",
            Status::Misclassified => "misclassified",
            Status::Unresolved => "unresolved",
        }
    }
}

/// The pipeline stage that decided a sample (for unresolved samples: the last stage tried).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Stage {
    /// The clean forward pass (misclassified samples, or samples with no forbidden class).
    Clean,
    /// A decision carried over soundly from another epsilon of the sweep.
    Reused,
    /// The quick attack.
    Attack,
    /// Interval bound propagation.
    Interval,
    /// Linear relaxation.
    Linear,
    /// Linear relaxation with optimised slopes.
    OptimisedLinear,
    /// The LP relaxation stage of earlier versions (read from their reports; no longer run).
    Lp,
    /// Branch and bound.
    Search,
}

impl Stage {
    /// The lowercase name used in reports.
    pub fn name(&self) -> &'static str {
        match self {
            Stage::Clean => "clean",
            Stage::Reused => "reused",
            Stage::Attack => "attack",
            Stage::Interval => "interval",
            Stage::Linear => "linear",
            Stage::OptimisedLinear => "optimised_linear",
            Stage::Lp => "lp",
            Stage::Search => "search",
        }
    }
}

/// A saved counterexample: the perturbed input and what the model says there.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CounterexampleRecord {
    /// The class the model predicts at the perturbed input.
    pub new_class: usize,
    /// Plain distance from the sample in the requirement's norm (raw units).
    pub distance: f64,
    /// The perturbed input, in model input order (raw units).
    pub features: Vec<f64>,
}

/// The outcome for one sample at one epsilon of a sweep.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EpsilonOutcome {
    /// The epsilon (scale) this outcome is for.
    pub epsilon: f64,
    /// The outcome.
    pub status: Status,
    /// The deciding stage.
    pub stage: Stage,
    /// Best sound lower bound on the smallest forbidden margin found (absent when none was computed).
    pub margin_lower: Option<f64>,
    /// The counterexample, for status `counterexample`.
    pub counterexample: Option<CounterexampleRecord>,
}

/// One sample's result (at the requirement's epsilon, the largest of a sweep).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SampleRecord {
    /// Row index in the data file (0-based, header excluded).
    pub index: usize,
    /// True class index.
    pub label: usize,
    /// Predicted class index without perturbation.
    pub predicted: usize,
    /// The outcome at the requirement's epsilon.
    pub status: Status,
    /// Best sound lower bound on the smallest forbidden margin (logit of the label minus a forbidden
    /// logit) over the region; absent when no bound was computed (misclassified, nothing forbidden).
    pub margin_lower: Option<f64>,
    /// The deciding stage.
    pub stage: Stage,
    /// Wall-clock seconds spent on this sample (all epsilons, radius included).
    pub seconds: f64,
    /// The counterexample, for status `counterexample`.
    pub counterexample: Option<CounterexampleRecord>,
    /// Largest epsilon (scale) proven by the sound bounds (with `--radius`); a lower bound on the true
    /// robust radius.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub radius: Option<f64>,
    /// Seconds per stage.
    #[serde(default)]
    pub stage_seconds: BTreeMap<Stage, f64>,
    /// One outcome per epsilon when a sweep ran (ascending epsilon; the last equals the top-level fields).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub sweep: Vec<EpsilonOutcome>,
}

impl SampleRecord {
    /// The outcome at sweep position `k` (the top-level result when no sweep ran).
    pub fn outcome(&self, k: usize) -> EpsilonOutcome {
        match self.sweep.get(k) {
            Some(o) => o.clone(),
            None => EpsilonOutcome {
                epsilon: f64::NAN,
                status: self.status,
                stage: self.stage,
                margin_lower: self.margin_lower,
                counterexample: self.counterexample.clone(),
            },
        }
    }

    /// The status at sweep position `k`.
    pub fn status_at(&self, k: usize) -> Status {
        self.sweep.get(k).map(|o| o.status).unwrap_or(self.status)
    }
}
