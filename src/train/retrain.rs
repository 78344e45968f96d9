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
//! With a confidence level in the requirement, the floor above is replaced by the level
//! [`super::confidence::Plan`] aims at, and the verdict follows the reviewer's rule
//! ([`super::confidence::Plan::assess`]).

use crate::certify::{certify, CertifyOptions, PipelineOptions, Report, Sources, Verdict};
use crate::data::Dataset;
use crate::model::{Model, Network};
use crate::threat::requirement::Requirement;

use super::confidence::{Assessment, ConfidenceSettings, Plan};
use super::constrained::{
    train_constrained_epochs_with_checks, ConstrainedEpoch, ConstrainedSettings, ConstrainedState,
    Constraint, ValidationCheck,
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
    /// Near-miss candidates (see [`NearMisses`]).
    pub near_misses: NearMisses,
    /// The reviewer's acceptance size and the wanted pass probability (with a confidence level).
    pub confidence: ConfidenceSettings,
}

/// Validation checks just below the round's threshold by linear bounds that may still be kept when
/// the certify pipeline (optimised linear bounds, LP) proves the threshold on the validation data.
/// The checks use plain linear bounds, which the pipeline can raise by a few points; without this a
/// candidate whose pipeline figure reaches the floor is passed over for a later, more robust one.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct NearMisses {
    /// How far below the threshold (a fraction) a check's linear-bound figure may lie; 0 = off.
    pub margin: f64,
    /// Most certify-pipeline runs on the validation data per round to judge them.
    pub tries: usize,
}

impl NearMisses {
    /// No near-miss candidates.
    pub const OFF: NearMisses = NearMisses {
        margin: 0.0,
        tries: 0,
    };
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

/// What judging a near miss gives: the certify pipeline's report on the validation data (a bare
/// figure in the unit tests).
trait Judgement {
    /// Certified accuracy on the validation data.
    fn certified(&self) -> f64;
}

impl Judgement for Report {
    fn certified(&self) -> f64 {
        self.summary.certified_accuracy
    }
}

/// An epoch's weights kept as a candidate for [`Keep::BestFeasible`].
#[derive(Debug, Clone)]
struct Candidate<J = Report> {
    epoch: f64,
    /// Validation certified accuracy by the check's linear bounds.
    certified: f64,
    clean_loss: f64,
    loss_error: f64,
    network: Network,
    /// The certify pipeline's judgement on the validation data, once a near miss was judged.
    judged: Option<Box<J>>,
}

/// Where a candidate stands against a threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Standing {
    /// Proven to reach it (by the check's linear bounds or by the pipeline).
    Feasible,
    /// Below it by linear bounds but within the near-miss margin and not yet judged.
    Open,
    /// Cannot be chosen.
    Out,
}

impl<J: Judgement> Candidate<J> {
    /// The best proven validation figure: the pipeline's when judged, else the check's.
    fn proven(&self) -> f64 {
        match &self.judged {
            Some(judgement) => judgement.certified().max(self.certified),
            None => self.certified,
        }
    }

    fn standing(&self, threshold: f64, margin: f64) -> Standing {
        if self.proven() >= threshold {
            Standing::Feasible
        } else if self.judged.is_none() && self.certified >= threshold - margin {
            Standing::Open
        } else {
            Standing::Out
        }
    }
}

/// Feasible epochs, chosen by the lowest validation clean loss or by the one-standard-error rule
/// (Breiman, Friedman, Olshen & Stone, 1984): the lowest loss sets a window of one standard error
/// above it, and the earliest epoch inside the window is chosen, the smallest departure from the
/// parent model that the validation data cannot tell apart from the best.
#[derive(Debug, Clone)]
struct Candidates<J = Report> {
    kept: Vec<Candidate<J>>,
}

impl<J> Default for Candidates<J> {
    fn default() -> Self {
        Self { kept: Vec::new() }
    }
}

impl<J: Judgement> Candidates<J> {
    /// Windows wider than the rule's (in standard errors of the current best) whose candidates are
    /// kept; beyond it a candidate is dropped to bound memory.
    const KEEP_WITHIN: f64 = 2.0;

    /// Adds a candidate and drops the ones that can no longer be chosen: those above the window of
    /// the lowest-loss candidate that is feasible at `threshold` by its check alone (an open near miss
    /// never drops others, as the pipeline may refute it).
    fn offer(&mut self, candidate: Candidate<J>, threshold: f64) {
        self.kept.push(candidate);
        let best = self
            .kept
            .iter()
            .filter(|c| c.certified >= threshold)
            .min_by(|a, b| a.clean_loss.total_cmp(&b.clean_loss));
        if let Some(best) = best {
            let limit = best.clean_loss + Self::KEEP_WITHIN * best.loss_error;
            self.kept.retain(|c| c.clean_loss <= limit);
        }
    }

    /// The rule's choice among the candidates whose standing passes `admit`: the lowest loss, or
    /// with `earliest` the one-standard-error rule's. Returns an index into `kept`.
    fn rule(&self, earliest: bool, admit: impl Fn(&Candidate<J>) -> bool) -> Option<usize> {
        let admitted = || self.kept.iter().enumerate().filter(|(_, c)| admit(c));
        let (best_index, best) =
            admitted().min_by(|a, b| a.1.clean_loss.total_cmp(&b.1.clean_loss))?;
        if !earliest {
            return Some(best_index);
        }
        let window = best.clean_loss + best.loss_error;
        admitted()
            .filter(|(_, c)| c.clean_loss <= window)
            .min_by(|a, b| a.1.epoch.total_cmp(&b.1.epoch))
            .map(|(i, _)| i)
    }

    /// Drops the candidates that cannot reach `threshold` (thresholds only rise) and returns the
    /// rule's choice among the feasible ones, judging open near misses (`margin` below the
    /// threshold) with `judge` on the way, at most `tries` times: while the rule would pick an open
    /// candidate, it is judged, and the choice is made again. `judge` returns the certify
    /// pipeline's judgement on the validation data. Returns the index and the judgements made.
    fn choose<E>(
        &mut self,
        threshold: f64,
        near_misses: NearMisses,
        earliest: bool,
        judge: &mut dyn FnMut(&Network) -> Result<J, E>,
    ) -> Result<(Option<usize>, Vec<JudgedNearMiss>), E> {
        let margin = near_misses.margin;
        self.kept
            .retain(|c| c.standing(threshold, margin) != Standing::Out);
        let mut judged = Vec::new();
        loop {
            let open_allowed = judged.len() < near_misses.tries;
            let pick = self.rule(earliest, |c| match c.standing(threshold, margin) {
                Standing::Feasible => true,
                Standing::Open => open_allowed,
                Standing::Out => false,
            });
            let Some(index) = pick else {
                return Ok((None, judged));
            };
            if self.kept[index].standing(threshold, margin) == Standing::Feasible {
                return Ok((Some(index), judged));
            }
            let candidate = &mut self.kept[index];
            let judgement = judge(&candidate.network)?;
            judged.push(JudgedNearMiss {
                epoch: candidate.epoch,
                linear_certified: candidate.certified,
                pipeline_certified: judgement.certified(),
            });
            candidate.judged = Some(Box::new(judgement));
            if self.kept[index].standing(threshold, margin) == Standing::Out {
                self.kept.remove(index);
            }
        }
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
}

/// A near miss judged by the certify pipeline (see [`NearMisses`]).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct JudgedNearMiss {
    /// The check's position in epochs.
    pub epoch: f64,
    /// Validation certified accuracy by the check's linear bounds.
    pub linear_certified: f64,
    /// Validation certified accuracy by the certify pipeline.
    pub pipeline_certified: f64,
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
    /// The level aimed at under the reviewer's rule (with a confidence level).
    pub plan: Option<Plan>,
}

/// Retrains `initial` toward `requirement` (budget, targets and floor, which must be given): constrained
/// training on `train` (validation measurements on `validation`), then a certify check on `acceptance`
/// after each round. `observer` sees every epoch. With a confidence level in the requirement, training
/// and the kept weights aim at [`Plan::aimed_level`] instead of the floor.
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
    let near_misses = settings.near_misses;
    if !(near_misses.margin.is_finite() && (0.0..1.0).contains(&near_misses.margin)) {
        return Err(TrainError::Settings(format!(
            "near-miss margin {} must lie in [0, 1)",
            near_misses.margin
        )));
    }
    let plan = Plan::for_run(requirement, &settings.confidence, validation, acceptance)
        .map_err(|e| TrainError::Settings(e.to_string()))?;
    // The level training and the choice of weights aim at: the floor, or the reviewer's aimed level.
    let aim = plan.map_or(floor, |p| p.aimed_level);
    let checked = plan.map_or_else(|| requirement.clone(), |p| p.check_requirement(requirement));
    let mut constrained = settings.constrained.clone();
    constrained.budget = requirement.budget(requirement.epsilon(), initial.input.dim);
    constrained.targets = requirement.targets.clone();
    if let Constraint::RobustError { slack, .. } = constrained.constraint {
        constrained.constraint = Constraint::RobustError { floor: aim, slack };
    }
    constrained.validate()?;
    let trainable = TrainableModel::new(initial);
    let mut state = ConstrainedState::new(&trainable, &constrained, initial.class_count());
    let mut epochs = Vec::new();
    let mut rounds = Vec::new();
    let selecting = settings.keep != Keep::Last
        && validation.is_some()
        && constrained.measure_certified
        && constrained.formulation.is_primal_dual();
    let mut candidates = Candidates::default();
    let mut selection = SelectionThreshold::new(aim, settings.slack_step);
    let mut checks = Vec::new();
    let options = CertifyOptions {
        pipeline: settings.pipeline.clone(),
        label_column: "label".into(),
        ..CertifyOptions::default()
    };
    let certify_on = |model: &Model, data: &Dataset| {
        certify(
            model,
            data,
            &checked,
            &Sources::in_memory(model, data),
            &options,
        )
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
                if selecting && check.certified_accuracy >= threshold - near_misses.margin {
                    candidates.offer(
                        Candidate {
                            epoch: check.epoch_position,
                            certified: check.certified_accuracy,
                            clean_loss: check.clean_loss,
                            loss_error: check.clean_loss_error,
                            network: network.clone(),
                            judged: None,
                        },
                        threshold,
                    );
                }
            },
        )?);
        let earliest = settings.keep == Keep::EarliestFeasible;
        let (chosen, judged) = match validation {
            Some(validation) => {
                let mut judge =
                    |network: &Network| certify_on(&trainable.model_with(network), validation);
                candidates
                    .choose(threshold, near_misses, earliest, &mut judge)
                    .map_err(|e| TrainError::Data(format!("judging a near miss: {e}")))?
            }
            None => (None, Vec::new()),
        };
        let chosen = chosen.map(|i| &candidates.kept[i]);
        let feasible_on_validation = chosen.is_some();
        // Without a chosen candidate: the iterate average when one runs, else the last weights.
        let averaged = state.average.as_ref().and_then(|a| a.network());
        let (network, selected_epoch) = match chosen {
            Some(best) => (&best.network, best.epoch),
            None => (
                averaged.as_ref().unwrap_or(&state.network),
                state.epochs_done as f64,
            ),
        };
        let near_miss = chosen.is_some_and(|c| c.certified < threshold);
        let model = trainable.model_with(network);
        // A judged candidate's validation report is the acceptance verdict when both are the same data.
        let reusable = chosen
            .and_then(|c| c.judged.as_deref())
            .filter(|_| validation == Some(acceptance));
        let report = match reusable {
            Some(report) => report.clone(),
            None => certify_on(&model, acceptance)
                .map_err(|e| TrainError::Data(format!("certifying the retrained model: {e}")))?,
        };
        let summary = &report.summary;
        let assessment = plan
            .map(|p| p.assess(summary, requirement))
            .transpose()
            .map_err(|e| TrainError::Data(format!("the reviewer's rule: {e}")))?;
        rounds.push(RoundRecord {
            round,
            slack,
            epochs: state.epochs_done,
            selected_epoch,
            near_misses_judged: judged,
            near_miss,
            clean_accuracy: summary.clean_accuracy,
            certified_accuracy: summary.certified_accuracy,
            empirical_robust_accuracy: summary.empirical_robust_accuracy,
            verdict: summary.verdict,
            confidence: assessment,
        });
        let met = assessment.map_or(summary.verdict == Verdict::Pass, |a| a.met);
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
                plan,
            });
        }
    }
    unreachable!("the loop returns in its last round")
}

#[cfg(test)]
mod tests {
    use super::*;

    impl Judgement for f64 {
        fn certified(&self) -> f64 {
            *self
        }
    }

    fn candidate(epoch: f64, certified: f64, clean_loss: f64, loss_error: f64) -> Candidate<f64> {
        Candidate {
            epoch,
            certified,
            clean_loss,
            loss_error,
            network: Network {
                layers: Vec::new(),
                fold_error: Vec::new(),
            },
            judged: None,
        }
    }

    /// The chosen epoch and the judgements used, with a judge that answers `figures` in turn.
    fn choose(
        candidates: &mut Candidates<f64>,
        threshold: f64,
        near_misses: NearMisses,
        earliest: bool,
        figures: &[f64],
    ) -> (Option<f64>, usize) {
        let mut answers = figures.iter().copied();
        let mut judge = |_: &Network| answers.next().ok_or("judged more often than expected");
        let (index, judged) = candidates
            .choose(threshold, near_misses, earliest, &mut judge)
            .expect("the judge has answers");
        (index.map(|i| candidates.kept[i].epoch), judged.len())
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
        let off = NearMisses::OFF;
        candidates.offer(candidate(3.0, 0.61, 0.50, 0.02), 0.6); // far above the best: dropped
        candidates.offer(candidate(4.0, 0.62, 0.215, 0.02), 0.6); // within one error of the best
        candidates.offer(candidate(5.0, 0.70, 0.20, 0.02), 0.6); // the best loss
        candidates.offer(candidate(6.0, 0.72, 0.23, 0.02), 0.6); // within two errors: kept, not chosen
        let epochs: Vec<f64> = candidates.kept.iter().map(|c| c.epoch).collect();
        assert_eq!(epochs, vec![4.0, 5.0, 6.0]);
        assert_eq!(choose(&mut candidates, 0.6, off, true, &[]), (Some(4.0), 0));
        assert_eq!(
            choose(&mut candidates, 0.6, off, false, &[]),
            (Some(5.0), 0)
        );
        // A higher threshold drops epoch 4 for good; 5 is then the earliest in the window.
        assert_eq!(
            choose(&mut candidates, 0.65, off, true, &[]),
            (Some(5.0), 0)
        );
        assert_eq!(choose(&mut candidates, 0.6, off, true, &[]), (Some(5.0), 0));
        assert_eq!(
            choose(&mut candidates, 0.71, off, false, &[]),
            (Some(6.0), 0)
        );
        assert_eq!(choose(&mut candidates, 0.8, off, true, &[]), (None, 0));
    }

    #[test]
    fn a_near_miss_is_kept_only_when_the_pipeline_proves_the_threshold() {
        let near = NearMisses {
            margin: 0.03,
            tries: 3,
        };
        let build = || {
            let mut candidates = Candidates::default();
            candidates.offer(candidate(2.0, 0.55, 0.19, 0.02), 0.6); // beyond the margin: never kept
            candidates.offer(candidate(3.0, 0.585, 0.20, 0.02), 0.6); // a near miss, the lowest loss
            candidates.offer(candidate(4.0, 0.61, 0.26, 0.02), 0.6); // feasible by its check
            candidates
        };
        let epochs = |c: &Candidates<f64>| c.kept.iter().map(|c| c.epoch).collect::<Vec<_>>();
        // An open near miss never drops others: epoch 4 lies beyond two errors of epoch 3's loss.
        assert_eq!(epochs(&build()), vec![2.0, 3.0, 4.0]);
        // Proven by the pipeline: kept, after one judgement.
        let mut proven = build();
        assert_eq!(
            choose(&mut proven, 0.6, near, false, &[0.603]),
            (Some(3.0), 1)
        );
        assert_eq!(epochs(&proven), vec![3.0, 4.0]);
        // Proven once, it is not judged again; a higher threshold than its figure drops it.
        assert_eq!(choose(&mut proven, 0.6, near, true, &[]), (Some(3.0), 0));
        assert_eq!(choose(&mut proven, 0.605, near, true, &[]), (Some(4.0), 0));
        assert_eq!(epochs(&proven), vec![4.0]);
        // Refuted by the pipeline: dropped, and the feasible epoch 4 is kept.
        let mut refuted = build();
        assert_eq!(
            choose(&mut refuted, 0.6, near, false, &[0.59]),
            (Some(4.0), 1)
        );
        assert_eq!(epochs(&refuted), vec![4.0]);
        // Without tries (or without a margin) a near miss is not judged.
        let no_tries = NearMisses { tries: 0, ..near };
        assert_eq!(
            choose(&mut build(), 0.6, no_tries, false, &[]),
            (Some(4.0), 0)
        );
        assert_eq!(
            choose(&mut build(), 0.6, NearMisses::OFF, false, &[]),
            (Some(4.0), 0)
        );
    }

    #[test]
    fn near_misses_are_judged_in_the_rules_order_up_to_the_tries() {
        let near = NearMisses {
            margin: 0.05,
            tries: 2,
        };
        let build = || {
            let mut candidates = Candidates::default();
            candidates.offer(candidate(3.0, 0.58, 0.20, 0.02), 0.6);
            candidates.offer(candidate(4.0, 0.57, 0.21, 0.02), 0.6);
            candidates.offer(candidate(5.0, 0.59, 0.22, 0.02), 0.6);
            candidates.offer(candidate(6.0, 0.62, 0.23, 0.02), 0.6);
            candidates
        };
        // Lowest loss first: 3 and 4 refuted, the tries are spent, 5 stays unjudged, 6 is kept.
        assert_eq!(
            choose(&mut build(), 0.6, near, false, &[0.59, 0.595]),
            (Some(6.0), 2)
        );
        // The second try proves epoch 4.
        assert_eq!(
            choose(&mut build(), 0.6, near, false, &[0.59, 0.61]),
            (Some(4.0), 2)
        );
        // One-standard-error rule: the window is 0.20 + 0.02; epoch 3 is the earliest in it.
        assert_eq!(
            choose(&mut build(), 0.6, near, true, &[0.6]),
            (Some(3.0), 1)
        );
        // Once 3 is refuted the lowest loss is 4's (window 0.23): 4 is judged next, then kept.
        assert_eq!(
            choose(&mut build(), 0.6, near, true, &[0.58, 0.6]),
            (Some(4.0), 2)
        );
    }
}
