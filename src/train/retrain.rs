//! Retraining until the floor holds: rounds of constrained training ([`super::constrained`]), each
//! followed by the certification pipeline ([`crate::certify::certify`], sound bounds) on the acceptance
//! data; if the floor is not proven, the next round continues training with a raised slack, up to a
//! round limit.
//!
//! Which weights a round hands to the check is set by [`Keep`]. With [`Keep::BestFeasible`] (primal-dual
//! runs with validation data) it is the *best feasible iterate*: among the epochs whose validation
//! certified accuracy (sound linear bounds at the full budget) reaches the round's threshold (the
//! floor, plus one slack step for each earlier round whose kept weights reached it on validation but
//! failed the acceptance check), the one with the lowest validation clean loss. The
//! last iterate of a primal-dual loop is not itself the constrained optimum; a best feasible iterate
//! is the usual answer (e.g. Cotter, Jiang & Sridharan, 2019). [`Keep::EarliestFeasible`] reads the
//! same candidates with the one-standard-error rule (the earliest epoch whose loss is within one
//! standard error of the lowest), which keeps the model as close to its parent, and to the floor, as
//! the validation data allows when robustness costs no clean loss.
//!
//! It guarantees an honest verdict: [`RetrainVerdict::Met`] only when the certify pipeline's verdict is
//! `pass` for the returned model on the acceptance data; anything else (refuted, or not proven because
//! samples stay unresolved) is [`RetrainVerdict::NotMet`]. It never reads the training loss as evidence.

use crate::certify::{certify, CertifyOptions, PipelineOptions, Report, Sources, Verdict};
use crate::data::Dataset;
use crate::model::{Model, Network};
use crate::threat::requirement::Requirement;

use super::constrained::{
    train_constrained_epochs_with_checks, ConstrainedEpoch, ConstrainedSettings, ConstrainedState,
    Constraint, Formulation, ValidationCheck,
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
    /// The best feasible iterate (primal-dual with validation data; otherwise the last epoch): among
    /// epochs whose validation certified accuracy reaches the round's threshold, the one with the
    /// lowest validation clean loss; the last epoch when none reaches it.
    BestFeasible,
    /// Like [`Keep::BestFeasible`] but read with the one-standard-error rule: the earliest feasible
    /// epoch whose validation clean loss is within one standard error of the lowest.
    EarliestFeasible,
}

/// An epoch's weights kept as a candidate for [`Keep::BestFeasible`].
#[derive(Debug, Clone)]
struct Candidate {
    epoch: f64,
    certified: f64,
    clean_loss: f64,
    loss_error: f64,
    network: Network,
}

/// Feasible epochs, chosen by the lowest validation clean loss or by the one-standard-error rule
/// (Breiman, Friedman, Olshen & Stone, 1984): the lowest loss sets a window of one standard error
/// above it, and the earliest epoch inside the window is chosen, the smallest departure from the
/// parent model that the validation data cannot tell apart from the best.
#[derive(Debug, Clone, Default)]
struct Candidates {
    kept: Vec<Candidate>,
}

impl Candidates {
    /// Windows wider than the rule's (in standard errors of the current best) whose candidates are
    /// kept; beyond it a candidate is dropped to bound memory.
    const KEEP_WITHIN: f64 = 2.0;

    fn best(&self) -> Option<&Candidate> {
        self.kept
            .iter()
            .min_by(|a, b| a.clean_loss.total_cmp(&b.clean_loss))
    }

    /// Adds a feasible epoch and drops the ones that can no longer be chosen.
    fn offer(&mut self, candidate: Candidate) {
        self.kept.push(candidate);
        if let Some(best) = self.best() {
            let limit = best.clean_loss + Self::KEEP_WITHIN * best.loss_error;
            self.kept.retain(|c| c.clean_loss <= limit);
        }
    }

    /// Drops the candidates below `threshold` (thresholds only rise) and returns the choice: the
    /// lowest loss, or with `earliest` the one-standard-error rule's.
    fn choose(&mut self, threshold: f64, earliest: bool) -> Option<&Candidate> {
        self.kept.retain(|c| c.certified >= threshold);
        let best = self.best()?;
        if !earliest {
            return Some(best);
        }
        let window = best.clean_loss + best.loss_error;
        self.kept
            .iter()
            .filter(|c| c.clean_loss <= window)
            .min_by(|a, b| a.epoch.total_cmp(&b.epoch))
    }
}

/// The validation certified accuracy a candidate must reach. It starts at the floor; a round whose
/// kept weights reached it on validation but failed the acceptance check shows that validation
/// overstates the acceptance figure, so later rounds demand one more slack step. A round that kept no
/// such weights has not shown that and leaves the threshold where it was.
#[derive(Debug, Clone, Copy)]
struct SelectionThreshold {
    floor: f64,
    step: f64,
    misses: usize,
}

impl SelectionThreshold {
    fn new(floor: f64, step: f64) -> Self {
        Self {
            floor,
            step,
            misses: 0,
        }
    }

    fn value(&self) -> f64 {
        self.floor + self.misses as f64 * self.step
    }

    /// Accounts for a finished round: whether its kept weights were feasible on validation and
    /// whether the acceptance check passed.
    fn record_round(&mut self, feasible_on_validation: bool, met: bool) {
        if feasible_on_validation && !met {
            self.misses += 1;
        }
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
    /// Where in training the returned weights were taken, in epochs (see [`Keep`]; e.g. 24.25 = a
    /// quarter into epoch 25).
    pub selected_epoch: f64,
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
    /// Every validation check of every round, in order (empty without validation data).
    pub checks: Vec<ValidationCheck>,
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
    let selecting = settings.keep != Keep::Last
        && validation.is_some()
        && constrained.measure_certified
        && matches!(constrained.formulation, Formulation::PrimalDual { .. });
    let mut candidates = Candidates::default();
    let mut selection = SelectionThreshold::new(floor, settings.slack_step);
    let mut checks = Vec::new();
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
        let threshold = selection.value();
        epochs.extend(train_constrained_epochs_with_checks(
            &trainable,
            &mut state,
            train,
            validation,
            &constrained,
            count,
            observer,
            &mut |check: &ValidationCheck, network: &Network| {
                checks.push(*check);
                if selecting && check.certified_accuracy >= threshold {
                    candidates.offer(Candidate {
                        epoch: check.epoch_position,
                        certified: check.certified_accuracy,
                        clean_loss: check.clean_loss,
                        loss_error: check.clean_loss_error,
                        network: network.clone(),
                    });
                }
            },
        )?);
        let earliest = settings.keep == Keep::EarliestFeasible;
        let chosen = candidates.choose(threshold, earliest);
        let feasible_on_validation = chosen.is_some();
        let (network, selected_epoch) = match chosen {
            Some(best) => (&best.network, best.epoch),
            None => (&state.network, state.epochs_done as f64),
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
        selection.record_round(feasible_on_validation, met);
        if met || round == settings.max_rounds {
            return Ok(RetrainResult {
                model,
                epochs,
                checks,
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

    fn candidate(epoch: f64, certified: f64, clean_loss: f64, loss_error: f64) -> Candidate {
        Candidate {
            epoch,
            certified,
            clean_loss,
            loss_error,
            network: Network { layers: Vec::new() },
        }
    }

    #[test]
    fn the_threshold_rises_only_after_a_validation_pass_that_failed_acceptance() {
        let mut threshold = SelectionThreshold::new(0.8, 0.03);
        assert_eq!(threshold.value(), 0.8);
        threshold.record_round(false, false); // nothing feasible: training fell short
        assert_eq!(threshold.value(), 0.8);
        threshold.record_round(true, false); // validation passed, acceptance did not
        assert!((threshold.value() - 0.83).abs() < 1e-12);
        threshold.record_round(true, true);
        assert!((threshold.value() - 0.83).abs() < 1e-12);
    }

    #[test]
    fn feasible_epochs_by_lowest_loss_or_by_the_one_standard_error_rule() {
        let mut candidates = Candidates::default();
        candidates.offer(candidate(3.0, 0.61, 0.50, 0.02)); // far above the best: dropped
        candidates.offer(candidate(4.0, 0.62, 0.215, 0.02)); // within one error of the best
        candidates.offer(candidate(5.0, 0.70, 0.20, 0.02)); // the best loss
        candidates.offer(candidate(6.0, 0.72, 0.23, 0.02)); // within two errors: kept, not chosen
        let epochs: Vec<f64> = candidates.kept.iter().map(|c| c.epoch).collect();
        assert_eq!(epochs, vec![4.0, 5.0, 6.0]);
        assert_eq!(candidates.choose(0.6, true).map(|c| c.epoch), Some(4.0));
        assert_eq!(candidates.choose(0.6, false).map(|c| c.epoch), Some(5.0));
        // A higher threshold drops epoch 4 for good; 5 is then the earliest in the window.
        assert_eq!(candidates.choose(0.65, true).map(|c| c.epoch), Some(5.0));
        assert_eq!(candidates.choose(0.6, true).map(|c| c.epoch), Some(5.0));
        assert_eq!(candidates.choose(0.71, false).map(|c| c.epoch), Some(6.0));
        assert!(candidates.choose(0.8, true).is_none());
    }
}
