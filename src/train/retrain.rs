//! Retraining until the floor holds: rounds of constrained training ([`super::constrained`]), each
//! followed by the certification pipeline ([`crate::certify::certify`], sound bounds) on the acceptance
//! data; if the floor is not proven, the next round continues training with a raised slack, up to a
//! round limit.
//!
//! It guarantees an honest verdict: [`RetrainVerdict::Met`] only when the certify pipeline's verdict is
//! `pass` for the returned model on the acceptance data; anything else (refuted, or not proven because
//! samples stay unresolved) is [`RetrainVerdict::NotMet`]. It never reads the training loss as evidence.

use crate::certify::{certify, CertifyOptions, PipelineOptions, Report, Sources, Verdict};
use crate::data::Dataset;
use crate::model::Model;
use crate::threat::requirement::Requirement;

use super::constrained::{
    train_constrained_epochs, ConstrainedEpoch, ConstrainedSettings, ConstrainedState, Constraint,
};
use super::plain::TrainableModel;
use super::TrainError;

/// Settings of [`retrain`].
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
}

/// The final answer of a retraining run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum RetrainVerdict {
    /// The certify pipeline proved the floor on the acceptance data.
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
    /// Clean accuracy on the acceptance data.
    pub clean_accuracy: f64,
    /// Certified accuracy on the acceptance data (certify pipeline, sound).
    pub certified_accuracy: f64,
    /// Upper bound on robust accuracy from the pipeline's attacks.
    pub empirical_robust_accuracy: f64,
    /// The pipeline's verdict (`pass`, `fail`, `undecided`).
    pub verdict: Verdict,
}

/// The result of [`retrain`].
#[derive(Debug, Clone)]
pub struct RetrainResult {
    /// The retrained model (the last round's).
    pub model: Model,
    /// Every epoch of every round.
    pub epochs: Vec<ConstrainedEpoch>,
    /// One record per round.
    pub rounds: Vec<RoundRecord>,
    /// The final verdict.
    pub verdict: RetrainVerdict,
    /// The certify report of the returned model on the acceptance data.
    pub report: Report,
}

/// Retrains `initial` toward `requirement` (budget, targets and floor, which must be given): constrained
/// training on `train` (validation measurements on `validation`), then a certify check on `acceptance`
/// after each round. `observer` sees every epoch.
pub fn retrain(
    initial: &Model,
    train: &Dataset,
    validation: Option<&Dataset>,
    acceptance: &Dataset,
    requirement: &Requirement,
    settings: &RetrainSettings,
    observer: &mut dyn FnMut(&ConstrainedEpoch),
) -> Result<RetrainResult, TrainError> {
    let floor = requirement
        .floor
        .ok_or_else(|| TrainError::Settings("retraining needs a floor".into()))?;
    if settings.max_rounds == 0 {
        return Err(TrainError::Settings(
            "the round limit must be at least 1".into(),
        ));
    }
    if !(settings.slack_step.is_finite() && settings.slack_step >= 0.0) {
        return Err(TrainError::Settings(format!(
            "slack step {} must be a finite number ≥ 0",
            settings.slack_step
        )));
    }
    let mut constrained = settings.constrained.clone();
    constrained.budget = requirement.budget(requirement.epsilon(), initial.input.dim);
    constrained.targets = requirement.targets.clone();
    if let Constraint::RobustError { slack, .. } = constrained.constraint {
        constrained.constraint = Constraint::RobustError { floor, slack };
    }
    constrained.validate()?;
    let trainable = TrainableModel::new(initial);
    let mut state = ConstrainedState::new(&trainable, &constrained, initial.class_count());
    let mut epochs = Vec::new();
    let mut rounds = Vec::new();
    let options = CertifyOptions {
        pipeline: settings.pipeline.clone(),
        label_column: "label".into(),
        ..CertifyOptions::default()
    };
    for round in 1..=settings.max_rounds {
        let count = if round == 1 {
            constrained.train.epochs
        } else {
            settings.round_epochs.max(1)
        };
        if round > 1 {
            if let Constraint::RobustError { floor, slack } = constrained.constraint {
                constrained.constraint = Constraint::RobustError {
                    floor,
                    slack: slack + settings.slack_step,
                };
            }
        }
        let slack = match constrained.constraint {
            Constraint::RobustError { slack, .. } => slack,
            Constraint::RobustLossLevel { .. } => 0.0,
        };
        epochs.extend(train_constrained_epochs(
            &trainable,
            &mut state,
            train,
            validation,
            &constrained,
            count,
            observer,
        )?);
        let model = trainable.model_with(&state.network);
        let sources = Sources::in_memory(&model, acceptance);
        let report = certify(&model, acceptance, requirement, &sources, &options)
            .map_err(|e| TrainError::Data(format!("certifying the retrained model: {e}")))?;
        let summary = &report.summary;
        rounds.push(RoundRecord {
            round,
            slack,
            epochs: state.epochs_done,
            clean_accuracy: summary.clean_accuracy,
            certified_accuracy: summary.certified_accuracy,
            empirical_robust_accuracy: summary.empirical_robust_accuracy,
            verdict: summary.verdict,
        });
        let met = summary.verdict == Verdict::Pass;
        if met || round == settings.max_rounds {
            return Ok(RetrainResult {
                model,
                epochs,
                rounds,
                verdict: if met {
                    RetrainVerdict::Met
                } else {
                    RetrainVerdict::NotMet
                },
                report,
            });
        }
    }
    unreachable!("the loop returns in its last round")
}
