//! What a retraining run is told and what it hands back: its settings ([`RetrainSettings`], with
//! [`Keep`], the rule for the weights each round returns), each round's record ([`RoundRecord`]) and
//! the result ([`RetrainResult`]) with its verdict ([`RetrainVerdict`]). Plain data; [`super::retrain`]
//! fills them.

use crate::certify::lines::LineVerdict;
use crate::certify::{PipelineOptions, Report, Verdict};
use crate::model::Model;
use crate::threat::requirement::RequirementLine;

use crate::train::confidence::{Assessment, ConfidenceSettings, Plan};
use crate::train::constrained::{ConstrainedEpoch, ConstrainedSettings, ValidationCheck};
use crate::train::terms::ConstraintTerm;

use super::{JudgedNearMiss, NearMisses};

/// Settings of [`super::retrain`].
#[derive(Debug, Clone, PartialEq)]
pub struct RetrainSettings {
    /// The constrained trainer's settings; its budget, targets and floor are replaced by the
    /// requirement's.
    pub constrained: ConstrainedSettings,
    /// Epochs of every further round.
    pub round_epochs: usize,
    /// Largest number of rounds (≥ 1).
    pub max_rounds: usize,
    /// Slack added to the robust-error constraint in each further round.
    pub slack_step: f64,
    /// The certify pipeline's options for the check after each round.
    pub pipeline: PipelineOptions,
    /// Which epoch's weights each round returns.
    pub keep: Keep,
    /// Near-miss candidates (see [`NearMisses`]).
    pub near_misses: NearMisses,
    /// The reviewer's acceptance size and the wanted pass probability (with a confidence level).
    pub confidence: ConfidenceSettings,
    /// A requirement list (empty: the requirement's single floor): one constraint per line
    /// ([`crate::train::terms::terms_for_lines`]), every round judged by the lines' conjunction as `certify` judges it.
    pub lines: Vec<RequirementLine>,
}

/// Which epoch's weights a round hands to the certify check.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Keep {
    /// The weights after the last epoch (their average over the last steps when
    /// [`ConstrainedSettings::average_tail`] is set).
    Last,
    /// The best feasible iterate (primal-dual with validation data; otherwise the last epoch): among
    /// epochs whose validation certified accuracy reaches the round's threshold, the one with the
    /// lowest validation clean loss; the last epoch when none reaches it.
    BestFeasible,
    /// Like [`Keep::BestFeasible`] but read with the one-standard-error rule: the earliest feasible
    /// epoch whose validation clean loss is within one standard error of the lowest.
    EarliestFeasible,
}

/// The final answer of a retraining run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum RetrainVerdict {
    /// The certify pipeline proved the floor on the acceptance data (with a confidence level: the
    /// reviewer's rule holds, see [`Plan::assess`]).
    Met,
    /// The floor was refuted or could not be proven within the rounds.
    NotMet,
}

/// What one round ended with.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RoundRecord {
    /// 1-based round.
    pub round: usize,
    /// The constraint slack used in the round.
    pub slack: f64,
    /// Epochs run in total at the end of the round.
    pub epochs: usize,
    /// Where in training the returned weights were taken, in epochs (see [`Keep`]; e.g. 24.25 = a
    /// quarter into epoch 25).
    pub selected_epoch: f64,
    /// Near misses judged by the certify pipeline on the validation data in this round, in order.
    pub near_misses_judged: Vec<JudgedNearMiss>,
    /// The returned weights are a near miss: below the threshold by the check's linear bounds,
    /// proven by the pipeline.
    pub near_miss: bool,
    /// Clean accuracy on the acceptance data.
    pub clean_accuracy: f64,
    /// Certified accuracy on the acceptance data (certify pipeline, sound).
    pub certified_accuracy: f64,
    /// Upper bound on robust accuracy from the pipeline's attacks.
    pub empirical_robust_accuracy: f64,
    /// The pipeline's verdict (`pass`, `fail`, `undecided`).
    pub verdict: Verdict,
    /// The returned weights against the reviewer's rule (with a confidence level).
    pub confidence: Option<Assessment>,
    /// Each line's verdict on the round's check data (a requirement list only).
    pub requirements: Vec<LineVerdict>,
}

/// The result of [`super::retrain`].
#[derive(Debug, Clone)]
pub struct RetrainResult {
    /// The retrained model (the last round's).
    pub model: Model,
    /// Every epoch of every round.
    pub epochs: Vec<ConstrainedEpoch>,
    /// Every validation check of every round, in order (empty without validation data).
    pub checks: Vec<ValidationCheck>,
    /// One record per round.
    pub rounds: Vec<RoundRecord>,
    /// The final verdict.
    pub verdict: RetrainVerdict,
    /// The certify report of the returned model on the acceptance data.
    pub report: Report,
    /// The level aimed at under the reviewer's rule (with a confidence level).
    pub plan: Option<Plan>,
    /// The constraints trained, one per multiplier, with the slacks of the last round.
    pub terms: Vec<ConstraintTerm>,
    /// The training rows each constraint is measured on in an epoch (one per term).
    pub term_rows: Vec<usize>,
    /// True when the final verdict comes from data the rounds did not see (the acceptance set,
    /// certified once after the last round); false when the rounds' own check data gave it.
    pub verdict_on_unseen_data: bool,
    /// How far above each floor training and the kept weights aimed on the validation data (one per
    /// line of a list, one for a single floor; all 0 when the acceptance data is the validation
    /// data or a confidence level sets the aim): see [`crate::train::margin::generalisation_margin`].
    pub generalisation_margins: Vec<f64>,
}
