//! Retraining until the floor holds: rounds of constrained training ([`super::constrained`]), each
//! followed by the certification pipeline ([`crate::certify::certify`], sound bounds) on the acceptance
//! data; if the floor is not proven, the next round continues training with a raised slack, up to a
//! round limit.
//!
//! Which weights a round hands to the check is set by [`Keep`]. With [`Keep::BestFeasible`] (primal-dual
//! runs with validation data) it is the *best feasible iterate*: among the epochs whose validation
//! certified accuracy (sound linear bounds at the full budget) reaches the round's threshold (the
//! floor, plus the slack added by later rounds), the one with the lowest validation clean loss. The
//! last iterate of a primal-dual loop is not itself the constrained optimum; the best feasible iterate
//! is the usual answer (e.g. Cotter, Jiang & Sridharan, 2019): the model with the lowest validation
//! clean loss that still meets the floor, which is what the constrained problem asks for.
//!
//! It guarantees an honest verdict: [`RetrainVerdict::Met`] only when the certify pipeline's verdict is
//! `pass` for the returned model on the acceptance data; anything else (refuted, or not proven because
//! samples stay unresolved) is [`RetrainVerdict::NotMet`]. It never reads the training loss as evidence.

use crate::certify::{certify, CertifyOptions, PipelineOptions, Report, Sources, Verdict};
use crate::data::Dataset;
use crate::model::{Model, Network};
use crate::threat::requirement::Requirement;

use super::constrained::{
    train_constrained_epochs, ConstrainedEpoch, ConstrainedSettings, ConstrainedState, Constraint,
    Formulation,
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
    /// Which epoch's weights each round returns.
    pub keep: Keep,
}

/// Which epoch's weights a round hands to the certify check.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Keep {
    /// The weights after the last epoch.
    Last,
    /// The best feasible iterate (primal-dual with validation data; otherwise the last epoch): the
    /// lowest validation clean loss among epochs whose validation certified accuracy reaches the
    /// round's threshold; the last epoch when none does.
    BestFeasible,
}

/// An epoch's weights kept as a candidate for [`Keep::BestFeasible`].
#[derive(Debug, Clone)]
struct Candidate {
    epoch: usize,
    certified: f64,
    clean_loss: f64,
    network: Network,
}

/// The candidates no other candidate beats on both validation figures (higher certified accuracy
/// and lower clean loss): the only ones any threshold can select.
#[derive(Debug, Clone, Default)]
struct Frontier {
    candidates: Vec<Candidate>,
}

impl Frontier {
    fn offer(&mut self, candidate: Candidate) {
        let dominated = |a: &Candidate, b: &Candidate| {
            b.certified >= a.certified && b.clean_loss <= a.clean_loss
        };
        if self.candidates.iter().any(|c| dominated(&candidate, c)) {
            return;
        }
        self.candidates.retain(|c| !dominated(c, &candidate));
        self.candidates.push(candidate);
    }

    fn best_at(&self, threshold: f64) -> Option<&Candidate> {
        self.candidates
            .iter()
            .filter(|c| c.certified >= threshold)
            .min_by(|a, b| a.clean_loss.total_cmp(&b.clean_loss))
    }
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
    /// The epoch whose weights the round returned (see [`Keep`]).
    pub selected_epoch: usize,
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
    let selecting = settings.keep == Keep::BestFeasible
        && validation.is_some()
        && constrained.measure_certified
        && matches!(constrained.formulation, Formulation::PrimalDual { .. });
    let mut frontier = Frontier::default();
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
        for _ in 0..count {
            let record = train_constrained_epochs(
                &trainable,
                &mut state,
                train,
                validation,
                &constrained,
                1,
                observer,
            )?
            .pop()
            .expect("one epoch was run");
            if let (true, Some(certified), Some(clean_loss)) = (
                selecting,
                record.validation_certified_accuracy,
                record.validation_clean_loss,
            ) {
                frontier.offer(Candidate {
                    epoch: record.epoch,
                    certified,
                    clean_loss,
                    network: state.network.clone(),
                });
            }
            epochs.push(record);
        }
        // Later rounds demand the slack they added on validation too, so they can select anew.
        let threshold = floor + (round - 1) as f64 * settings.slack_step;
        let (network, selected_epoch) = match frontier.best_at(threshold) {
            Some(best) => (&best.network, best.epoch),
            None => (&state.network, state.epochs_done),
        };
        let model = trainable.model_with(network);
        let sources = Sources::in_memory(&model, acceptance);
        let report = certify(&model, acceptance, requirement, &sources, &options)
            .map_err(|e| TrainError::Data(format!("certifying the retrained model: {e}")))?;
        let summary = &report.summary;
        rounds.push(RoundRecord {
            round,
            slack,
            epochs: state.epochs_done,
            selected_epoch,
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

#[cfg(test)]
mod tests {
    use super::*;

    fn candidate(epoch: usize, certified: f64, clean_loss: f64) -> Candidate {
        Candidate {
            epoch,
            certified,
            clean_loss,
            network: Network { layers: Vec::new() },
        }
    }

    #[test]
    fn frontier_keeps_only_undominated_candidates_and_picks_the_lowest_loss_above_a_threshold() {
        let mut frontier = Frontier::default();
        frontier.offer(candidate(1, 0.60, 0.30));
        frontier.offer(candidate(2, 0.70, 0.40));
        frontier.offer(candidate(3, 0.65, 0.50)); // beaten by epoch 2 on both figures
        frontier.offer(candidate(4, 0.62, 0.20)); // beats epoch 1
        let mut epochs: Vec<usize> = frontier.candidates.iter().map(|c| c.epoch).collect();
        epochs.sort_unstable();
        assert_eq!(epochs, vec![2, 4]);
        assert_eq!(frontier.best_at(0.6).map(|c| c.epoch), Some(4));
        assert_eq!(frontier.best_at(0.63).map(|c| c.epoch), Some(2));
        assert!(frontier.best_at(0.71).is_none());
    }
}
