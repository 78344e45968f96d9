//! The figures of an interrupted run over the samples that finished. The report's summary counts the
//! samples not run as unresolved (so its verdict never rests on them); the sheet states, beside that
//! verdict, what the finished samples alone show, and says so. Nothing here changes a verdict.

use crate::certify::report::Status;
use crate::certify::Report;

/// Counts and fractions over the finished samples of a report.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Finished {
    /// Samples that finished.
    pub finished: usize,
    /// Samples the run was meant to decide (finished + not run).
    pub planned: usize,
    /// Finished samples right without perturbation, as a fraction of the finished.
    pub clean_accuracy: f64,
    /// Certified / finished.
    pub certified_accuracy: f64,
    /// 1 − (misclassified + counterexample) / finished.
    pub empirical_robust_accuracy: f64,
    /// Finished samples left unresolved by the search (not counting samples not run).
    pub unresolved: usize,
}

impl Finished {
    /// The finished-sample figures of `report`, or `None` for a complete report.
    pub fn of(report: &Report) -> Option<Finished> {
        if report.complete {
            return None;
        }
        let finished = report.samples.len();
        let count = |st: Status| report.samples.iter().filter(|s| s.status == st).count();
        let fraction = |k: usize| {
            if finished == 0 {
                0.0
            } else {
                k as f64 / finished as f64
            }
        };
        let misclassified = count(Status::Misclassified);
        Some(Finished {
            finished,
            planned: finished + report.summary.not_run,
            clean_accuracy: fraction(finished - misclassified),
            certified_accuracy: fraction(count(Status::Certified)),
            empirical_robust_accuracy: fraction(
                finished - misclassified - count(Status::Counterexample),
            ),
            unresolved: count(Status::Unresolved),
        })
    }
}
