//! Retraining until the floor holds: rounds of constrained training ([`super::constrained`]), each
//! followed by the certification pipeline ([`crate::certify::certify`], sound bounds) on the acceptance
//! data; if the floor is not proven, the next round continues training with a raised slack, up to a
//! round limit.
//!
//! Which weights a round hands to the check is set by [`Keep`]. With [`Keep::BestFeasible`] (primal-dual
//! runs with validation data) it is the *best feasible iterate*: among the epochs whose validation
//! certified accuracy (sound linear bounds at the full budget) reaches the round's threshold (the
//! floor, plus one slack step for each earlier round whose kept weights reached it on validation but
//! failed the acceptance check; with a requirement list, every line's aimed floor, i.e. a worst line
//! margin of at least 0), the one with the lowest validation clean loss. The
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

use crate::certify::lines::{certify_with_lines, describe_line, with_line_epsilons};
use crate::certify::{CertifyOptions, Report, Verdict};
use crate::data::Dataset;
use crate::model::{Model, Network};
use crate::threat::requirement::{Requirement, RequirementLine};

use super::candidates::{Candidate, Candidates, PipelineJudgement, SelectionThreshold};
pub use super::candidates::{JudgedNearMiss, NearMisses};
use super::confidence::{Evidence, Plan};
use super::constrained::{
    train_constrained_epochs_with_checks, ConstrainedEpoch, ConstrainedState, Constraint,
    ValidationCheck,
};
use super::margin::generalisation_margin;
use super::plain::TrainableModel;
use super::terms::{terms_for_lines, ConstraintTerm};
use super::TrainError;

mod record;
pub use record::{Keep, RetrainResult, RetrainSettings, RetrainVerdict, RoundRecord};

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
    let lines = &settings.lines;
    let floor = match requirement.floor {
        Some(floor) if lines.is_empty() => floor,
        None if !lines.is_empty() => 0.0,
        Some(_) => {
            return Err(TrainError::Settings(
                "a requirement list holds its floors in its lines, not at the top level".into(),
            ))
        }
        None => return Err(TrainError::Settings("retraining needs a floor".into())),
    };
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
    let plan = match lines.is_empty() {
        true => Plan::for_run(requirement, &settings.confidence, validation, acceptance)
            .map_err(|e| TrainError::Settings(e.to_string()))?,
        false => None,
    };
    // A verdict on a separate acceptance set is a second sample: each floor is aimed at one
    // standard error of the difference above it on the validation data (not with a confidence
    // level, whose plan already sizes the aim to the reviewer's set).
    let separate = validation.is_some_and(|v| v != acceptance) && plan.is_none();
    let margin_for = |floor: f64, class: Option<usize>| match (separate, validation) {
        (true, Some(v)) => {
            let rows = |d: &Dataset| {
                d.labels
                    .iter()
                    .filter(|l| class.is_none_or(|c| **l == c))
                    .count()
            };
            generalisation_margin(floor, rows(v), rows(acceptance))
        }
        _ => 0.0,
    };
    let margins: Vec<f64> = match lines.is_empty() {
        true => vec![margin_for(floor, None)],
        false => lines
            .iter()
            .map(|line| match line {
                RequirementLine::Certified(c) => margin_for(c.floor, c.class),
                RequirementLine::CleanAccuracy { minimum } => margin_for(*minimum, None),
            })
            .collect(),
    };
    // The level training and the choice of weights aim at: the floor plus its margin, or the
    // reviewer's aimed level. A list's candidates are judged by the worst line's margin over its
    // own aimed level (`ValidationCheck::worst_margin`, the terms' floors already raised by their
    // margins), so its threshold is 0.
    let aim = match (plan, lines.is_empty()) {
        (Some(p), _) => p.aimed_level,
        (None, true) => (floor + margins[0]).min(1.0),
        (None, false) => 0.0,
    };
    let checked = match (plan, lines.is_empty()) {
        (Some(p), _) => p.check_requirement(requirement),
        (None, true) => requirement.clone(),
        (None, false) => with_line_epsilons(requirement, lines),
    };
    let mut constrained = settings.constrained.clone();
    constrained.budget = requirement.budget(requirement.epsilon(), initial.input.dim);
    constrained.targets = requirement.targets.clone();
    if let Constraint::RobustError { slack, .. } = constrained.constraint {
        constrained.constraint = Constraint::RobustError { floor: aim, slack };
        if !lines.is_empty() {
            let class_name = |c: usize| initial.class_name(c);
            constrained.terms =
                terms_for_lines(requirement, lines, initial.input.dim, slack, &|l| {
                    describe_line(l, &class_name)
                })
                .iter()
                .zip(&margins)
                .map(|(term, margin)| term.with_floor_raised(*margin))
                .collect();
        }
    }
    if !lines.is_empty() && constrained.terms.is_empty() {
        return Err(TrainError::Settings(
            "a requirement list is trained with robust-error constraints (the floors of its lines)"
                .into(),
        ));
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
    // A check's figure against the threshold: certified accuracy, or the worst line's margin.
    let figure = |check: &ValidationCheck| check.worst_margin.unwrap_or(check.certified_accuracy);
    let options = CertifyOptions {
        pipeline: settings.pipeline.clone(),
        label_column: "label".into(),
        ..CertifyOptions::default()
    };
    let certify_on =
        |model: &Model, data: &Dataset| certify_with_lines(model, data, &checked, lines, &options);
    // Rounds are steered and stopped by the validation data; the acceptance data is certified once,
    // after the last round, unless it is the validation data itself.
    let round_data = validation.unwrap_or(acceptance);
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
            // With a list, only the lines that failed the last check demand more.
            let last: &RoundRecord = rounds.last().expect("an earlier round");
            for (term, line) in constrained.terms.iter_mut().zip(&last.requirements) {
                if line.verdict != Verdict::Pass {
                    *term = term.with_slack(term_slack(term) + settings.slack_step);
                }
            }
        }
        let slack = match constrained.constraint {
            _ if !constrained.terms.is_empty() => {
                constrained.terms.iter().map(term_slack).fold(0.0, f64::max)
            }
            Constraint::RobustError { slack, .. } | Constraint::CleanError { slack, .. } => slack,
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
                if selecting && figure(check) >= threshold - near_misses.margin {
                    candidates.offer(
                        Candidate {
                            epoch: check.epoch_position,
                            certified: figure(check),
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
                let mut judge = |network: &Network| {
                    let report = certify_on(&trainable.model_with(network), validation)?;
                    let figure = match lines.is_empty() {
                        true => report.summary.certified_accuracy,
                        false => worst_line_margin(&report, &constrained.terms),
                    };
                    Ok::<_, crate::certify::CertifyError>(PipelineJudgement { report, figure })
                };
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
        // A judged candidate's validation report is the round's check.
        let reusable = chosen.and_then(|c| c.judged.as_deref()).map(|j| &j.report);
        let report = match reusable {
            Some(report) => report.clone(),
            None => certify_on(&model, round_data)
                .map_err(|e| TrainError::Data(format!("certifying the retrained model: {e}")))?,
        };
        let summary = &report.summary;
        // The reviewer's rule on acceptance data is assessed once, on the acceptance data after the
        // last round; a prediction from the validation data is assessed every round.
        let assessment = plan
            .filter(|p| p.evidence == Evidence::Prediction)
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
            requirements: report.requirements.clone(),
        });
        let met = assessment.map_or(summary.verdict == Verdict::Pass, |a| a.met);
        let last_round = rounds.len() - 1;
        selection.record_round(feasible_on_validation, met);
        // A relaxation that stays open says the constraints cannot all hold under these settings:
        // further rounds would only demand more of the same.
        let relaxed = constrained.relax.is_some() && state.slacks.iter().any(|u| *u > RELAXED);
        if met || relaxed || round == settings.max_rounds {
            let unseen = round_data != acceptance;
            let (report, met) = if unseen {
                let report = certify_on(&model, acceptance).map_err(|e| {
                    TrainError::Data(format!("certifying the retrained model: {e}"))
                })?;
                let met = match plan {
                    Some(p) => {
                        let assessment = p
                            .assess(&report.summary, requirement)
                            .map_err(|e| TrainError::Data(format!("the reviewer's rule: {e}")))?;
                        rounds[last_round].confidence = Some(assessment);
                        assessment.met
                    }
                    None => report.summary.verdict == Verdict::Pass,
                };
                (report, met)
            } else {
                (report, met)
            };
            let terms = constrained.terms_named(initial.class_count(), &|c| initial.class_name(c));
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
                verdict_on_unseen_data: unseen,
                generalisation_margins: margins,
                term_rows: terms
                    .iter()
                    .map(|t| train.labels.iter().filter(|l| t.applies_to(**l)).count())
                    .collect(),
                terms,
            });
        }
    }
    unreachable!("the loop returns in its last round")
}

/// A relaxation slack above this (in the constraint's measure, e.g. 0.1% of error rate) counts as
/// open at the end of a round.
pub const RELAXED: f64 = 1e-3;

/// The smallest margin of a list's lines in the certify pipeline's `report` over the floors its
/// `terms` aim at (one term per line, in order): the pipeline's counterpart of
/// `ValidationCheck::worst_margin`.
fn worst_line_margin(report: &Report, terms: &[ConstraintTerm]) -> f64 {
    report
        .requirements
        .iter()
        .zip(terms)
        .filter_map(|(line, term)| term.floor().map(|aim| line.measured - aim))
        .fold(f64::INFINITY, f64::min)
}

/// The slack of a floor term (0 for a loss level).
fn term_slack(term: &ConstraintTerm) -> f64 {
    match term.constraint {
        Constraint::RobustError { slack, .. } | Constraint::CleanError { slack, .. } => slack,
        Constraint::RobustLossLevel { .. } => 0.0,
    }
}
