//! The rule that turns per-sample counts into the requirement's verdict, and the report's summary.
//!
//! Guarantee: the summary is a pure function of the per-sample statuses and the requirement
//! ([`summarize`]), so a merged set of shard reports gives exactly the summary of one run over all
//! samples. Timings and the date are kept out of it (they vary between identical runs).

use serde::{Deserialize, Serialize};

use crate::threat::requirement::Requirement;

use super::sample_record::Status;
use super::statistics::clopper_pearson_lower;

/// The requirement's verdict.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// Proven: exit 0.
    Pass,
    /// Refuted: exit 1.
    Fail,
    /// Unresolved samples leave it open: exit 3.
    Undecided,
    /// No floor and no minimum clean accuracy was given: nothing to decide (exit 0).
    None,
}

impl Verdict {
    /// The lowercase name used in reports.
    pub fn name(&self) -> &'static str {
        match self {
            Verdict::Pass => "pass",
            Verdict::Fail => "fail",
            Verdict::Undecided => "undecided",
            Verdict::None => "none",
        }
    }
}

/// Which rule decided the verdict.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DecidedBy {
    /// The certified (and empirical) fraction of the samples against the floor.
    SampleFraction,
    /// The one-sided Clopper–Pearson lower bound against the floor.
    ConfidenceBound,
    /// Clean accuracy below its minimum.
    CleanAccuracy,
    /// Nothing to decide.
    NoRule,
    /// The conjunction of the lines of a requirement list (`requirements`).
    RequirementList,
}

/// The fixed summary figures plus counts.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    /// Samples in the acceptance set (this shard's slice for a shard report).
    pub samples: usize,
    /// Fraction predicted correctly without perturbation (in an incomplete report, samples not run
    /// count as correct here, as in the empirical figure: an upper bound).
    pub clean_accuracy: f64,
    /// certified / samples: a lower bound on robust accuracy.
    pub certified_accuracy: f64,
    /// 1 − (misclassified + counterexample) / samples: an upper bound on robust accuracy.
    pub empirical_robust_accuracy: f64,
    /// Samples neither proven nor refuted (including samples not run in an interrupted run).
    pub unresolved: usize,
    /// The requirement's verdict.
    pub verdict: Verdict,
    /// Samples certified.
    pub certified: usize,
    /// Samples with a validated counterexample.
    pub counterexample: usize,
    /// Samples wrong without perturbation.
    pub misclassified: usize,
    /// Samples not run (interrupted); counted in `unresolved` too.
    pub not_run: usize,
    /// The one-sided Clopper–Pearson lower bound on the certified fraction (with a confidence level).
    pub certified_lower_bound: Option<f64>,
    /// The rule that decided the verdict.
    pub decided_by: DecidedBy,
    /// True when certified_accuracy equals empirical_robust_accuracy (nothing unresolved).
    pub exact: bool,
}

/// The verdict inputs: counts out of `samples`, plus the clean-correct count.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Counts {
    /// All samples (including not run).
    pub samples: usize,
    /// Correct without perturbation.
    pub correct: usize,
    /// Certified.
    pub certified: usize,
    /// Counterexample.
    pub counterexample: usize,
    /// Misclassified.
    pub misclassified: usize,
    /// Unresolved (run but undecided).
    pub unresolved: usize,
    /// Not run.
    pub not_run: usize,
}

impl Counts {
    /// Counts the statuses; `not_run` samples of the `samples` total have no status.
    pub fn from_statuses(statuses: impl Iterator<Item = Status>, samples: usize) -> Counts {
        let mut c = Counts {
            samples,
            correct: 0,
            certified: 0,
            counterexample: 0,
            misclassified: 0,
            unresolved: 0,
            not_run: 0,
        };
        let mut seen = 0;
        for s in statuses {
            seen += 1;
            match s {
                Status::Certified => c.certified += 1,
                Status::Counterexample => c.counterexample += 1,
                Status::Misclassified => c.misclassified += 1,
                Status::Unresolved => c.unresolved += 1,
            }
        }
        c.not_run = samples.saturating_sub(seen);
        c.correct = seen - c.misclassified;
        c
    }
}

/// The verdict rule (design §4/§5).
///
/// With confidence level `c`, let `L(k) = ` the one-sided Clopper–Pearson lower bound for `k` of `n`;
/// without one, `L(k) = k / n`. Open samples (unresolved or not run) number `u`.
/// * **pass** iff `L(certified) ≥ floor` and clean accuracy ≥ its minimum (when given);
/// * **fail** iff clean accuracy < its minimum, or `L(certified + u) < floor` (even if every open sample
///   were certified the floor could not be proven; without a confidence level this is exactly
///   empirical robust accuracy < floor);
/// * **undecided** otherwise, which needs `u > 0`: the open samples straddle the floor.
///
/// Clean accuracy counts not-run samples as wrong for the pass test and as right for the fail test.
pub fn decide(counts: &Counts, requirement: &Requirement) -> (Verdict, DecidedBy, Option<f64>) {
    let n = counts.samples.max(1);
    let open = counts.unresolved + counts.not_run;
    let bound = |k: usize| -> f64 {
        match requirement.confidence {
            Some(c) => clopper_pearson_lower(k.min(n), n, c).unwrap_or(0.0),
            None => k as f64 / n as f64,
        }
    };
    let lower_bound = requirement.confidence.map(|_| bound(counts.certified));
    let rule = if requirement.confidence.is_some() {
        DecidedBy::ConfidenceBound
    } else {
        DecidedBy::SampleFraction
    };
    if let Some(minimum) = requirement.min_clean_accuracy {
        let best_clean = (counts.correct + counts.not_run) as f64 / n as f64;
        if best_clean < minimum {
            return (Verdict::Fail, DecidedBy::CleanAccuracy, lower_bound);
        }
    }
    let clean_proven = match requirement.min_clean_accuracy {
        None => true,
        Some(minimum) => counts.correct as f64 / n as f64 >= minimum,
    };
    let Some(floor) = requirement.floor else {
        return match requirement.min_clean_accuracy {
            None => (Verdict::None, DecidedBy::NoRule, lower_bound),
            Some(_) if clean_proven => (Verdict::Pass, DecidedBy::CleanAccuracy, lower_bound),
            Some(_) => (Verdict::Undecided, DecidedBy::CleanAccuracy, lower_bound),
        };
    };
    if bound(counts.certified + open) < floor {
        return (Verdict::Fail, rule, lower_bound);
    }
    if bound(counts.certified) >= floor && clean_proven {
        return (Verdict::Pass, rule, lower_bound);
    }
    (Verdict::Undecided, rule, lower_bound)
}

/// The summary of `counts` under `requirement`.
pub fn summarize(counts: &Counts, requirement: &Requirement) -> Summary {
    let n = counts.samples.max(1) as f64;
    let (verdict, decided_by, certified_lower_bound) = decide(counts, requirement);
    let unresolved = counts.unresolved + counts.not_run;
    Summary {
        samples: counts.samples,
        clean_accuracy: 1.0 - counts.misclassified as f64 / n,
        certified_accuracy: counts.certified as f64 / n,
        empirical_robust_accuracy: 1.0 - (counts.misclassified + counts.counterexample) as f64 / n,
        unresolved,
        verdict,
        certified: counts.certified,
        counterexample: counts.counterexample,
        misclassified: counts.misclassified,
        not_run: counts.not_run,
        certified_lower_bound,
        decided_by,
        exact: unresolved == 0,
    }
}
