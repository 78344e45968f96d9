//! The candidates for a round's kept weights: the training states at the validation checks, chosen
//! by the lowest validation clean loss or by the one-standard-error rule among those that reach the
//! round's threshold (`Candidates`), near misses judged by the certify pipeline ([`NearMisses`]), and
//! the threshold that rises after a validation pass that failed the round's check
//! (`SelectionThreshold`). Nothing here trains or certifies; the pipeline's judgement comes in as a
//! closure.

use crate::certify::Report;
use crate::model::Network;

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

/// What judging a near miss gives: the certify pipeline's report on the validation data (a bare
/// figure in the unit tests).
pub(super) trait Judgement {
    /// The figure compared with the threshold: certified accuracy on the validation data, or with a
    /// requirement list the worst line's margin over its aimed floor.
    fn certified(&self) -> f64;
}

/// The certify pipeline's report on the validation data with the figure it gives against the
/// round's threshold (see [`Judgement::certified`]).
#[derive(Debug, Clone)]
pub(super) struct PipelineJudgement {
    pub(super) report: Report,
    pub(super) figure: f64,
}

impl Judgement for PipelineJudgement {
    fn certified(&self) -> f64 {
        self.figure
    }
}

/// An epoch's weights kept as a candidate for [`Keep::BestFeasible`].
#[derive(Debug, Clone)]
pub(super) struct Candidate<J = PipelineJudgement> {
    pub(super) epoch: f64,
    /// Validation certified accuracy by the check's linear bounds.
    pub(super) certified: f64,
    pub(super) clean_loss: f64,
    pub(super) loss_error: f64,
    pub(super) network: Network,
    /// The certify pipeline's judgement on the validation data, once a near miss was judged.
    pub(super) judged: Option<Box<J>>,
}

/// Where a candidate stands against a threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Standing {
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
pub(super) struct Candidates<J = PipelineJudgement> {
    pub(super) kept: Vec<Candidate<J>>,
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
    pub(super) fn offer(&mut self, candidate: Candidate<J>, threshold: f64) {
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
    pub(super) fn choose<E>(
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
pub(super) struct SelectionThreshold {
    floor: f64,
    step: f64,
    misses: usize,
}

impl SelectionThreshold {
    pub(super) fn new(floor: f64, step: f64) -> Self {
        Self {
            floor,
            step,
            misses: 0,
        }
    }

    pub(super) fn value(&self) -> f64 {
        self.floor + self.misses as f64 * self.step
    }

    /// Accounts for a finished round: whether its kept weights were feasible on validation and
    /// whether the acceptance check passed.
    pub(super) fn record_round(&mut self, feasible_on_validation: bool, met: bool) {
        if feasible_on_validation && !met {
            self.misses += 1;
        }
    }
}

/// A near miss judged by the certify pipeline (see [`NearMisses`]).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct JudgedNearMiss {
    /// The check's position in epochs.
    pub epoch: f64,
    /// Validation certified accuracy by the check's linear bounds (with a requirement list: the
    /// worst line's margin over its aimed floor, negative below it).
    pub linear_certified: f64,
    /// Validation certified accuracy by the certify pipeline (with a list: the worst line's margin).
    pub pipeline_certified: f64,
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
