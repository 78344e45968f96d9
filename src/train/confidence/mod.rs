//! Retraining for a floor that a reviewer judges by a confidence bound on an acceptance set retraining
//! never sees.
//!
//! The reviewer's rule ([`ReviewerRule`]): `K` of `m` acceptance samples certified passes when the
//! one-sided Clopper–Pearson lower bound `L(K)` at confidence `C` (Clopper & Pearson, 1934; the bound
//! `certify --confidence` applies) is at least the floor, i.e. when `K ≥ k*`, the least count that
//! passes. Retraining sees only its validation rows, `V` of `n` certified; [`predictive`] turns that into
//! the distribution of `K` (beta-binomial under a uniform prior), and the pass probability is
//! `π(V) = P(K ≥ k* | V)`. The [`Plan`] aims at the least validation count `v̂` with `π(v̂) ≥ q` (the
//! wanted pass probability, by default `C`); [`Plan::assess`] judges the returned model:
//!
//! * with acceptance data of its own ([`Evidence::AcceptanceData`]): the certify pipeline's verdict
//!   on it under the reviewer's rule, exactly the reviewer's check;
//! * with only the acceptance set's size ([`Evidence::Prediction`]): `π(V)` from the pipeline's count
//!   on the validation rows against `q`.
//!
//! Either way the assessment names the highest floor the model is expected to pass at `C`, the level
//! to report when the asked floor is not reached. What it guarantees: the counts `k*` and `v̂` use the
//! same bound function as the certify verdict, so they agree with it to the sample; probabilities are
//! exact sums for the stated model. What it never does: prove anything about unseen data. A
//! prediction holds only as far as the model's assumptions do (docs/retrain.md lists them).

pub mod predictive;
mod record;

use serde::Serialize;

use crate::certify::statistics::{clopper_pearson_lower, StatisticsError};
use crate::certify::{Summary, Verdict};
use crate::data::Dataset;
use crate::threat::requirement::Requirement;

pub use predictive::Predictive;
pub use record::{json, markdown, summary_line, verdict_text, PROBABILITY_MODEL};

/// Largest acceptance set the plan handles (its sums run over every count up to the size).
pub const MAX_ACCEPTANCE_SIZE: usize = 1_000_000;

/// Why a plan could not be made.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ConfidenceError {
    /// A setting is missing, out of range or inconsistent (the message names it).
    #[error("{0}")]
    Settings(String),
    /// No retrained model can be expected to pass the reviewer's check.
    #[error("floor {floor} cannot be reached at confidence {confidence} on {acceptance_size} acceptance samples with pass probability {pass_probability}, even with all {validation_size} validation samples certified; the highest floor that can is {highest_floor:.4}")]
    Unreachable {
        /// The asked floor.
        floor: f64,
        /// The reviewer's confidence.
        confidence: f64,
        /// The acceptance set's size.
        acceptance_size: usize,
        /// Validation samples.
        validation_size: usize,
        /// The wanted pass probability.
        pass_probability: f64,
        /// The highest floor reachable with these sizes.
        highest_floor: f64,
    },
    /// A bound could not be computed.
    #[error(transparent)]
    Statistics(#[from] StatisticsError),
}

/// What the reviewer's check needs besides the requirement (part of the retrainer's settings).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub struct ConfidenceSettings {
    /// Size of the reviewer's acceptance set when retraining does not get the set itself.
    pub acceptance_size: Option<usize>,
    /// Wanted probability that the reviewer's check passes; default: the confidence level.
    pub pass_probability: Option<f64>,
}

/// The reviewer's rule: the one-sided Clopper–Pearson lower bound at `confidence` on the certified
/// fraction of `acceptance_size` samples must be at least `floor`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ReviewerRule {
    /// The floor on the certified fraction.
    pub floor: f64,
    /// Confidence level of the bound.
    pub confidence: f64,
    /// Samples in the acceptance set.
    pub acceptance_size: usize,
}

impl ReviewerRule {
    /// `L(k)`: the lower bound the reviewer computes for `certified` of the acceptance samples.
    pub fn lower_bound(&self, certified: usize) -> Result<f64, StatisticsError> {
        clopper_pearson_lower(
            certified.min(self.acceptance_size),
            self.acceptance_size,
            self.confidence,
        )
    }

    /// `k*`: the least certified count that passes (`None` when even a full count does not).
    pub fn passing_count(&self) -> Result<Option<usize>, StatisticsError> {
        let m = self.acceptance_size;
        if self.lower_bound(m)? < self.floor {
            return Ok(None);
        }
        let (mut low, mut high) = (0, m);
        while low < high {
            let middle = (low + high) / 2;
            if self.lower_bound(middle)? >= self.floor {
                high = middle;
            } else {
                low = middle + 1;
            }
        }
        Ok(Some(low))
    }

    /// The highest floor the reviewer's check is expected to pass at this confidence, with
    /// probability `q`, given `certified` of `seen` samples: `L(k)` for the largest count `k`
    /// reached with probability `q`.
    pub fn highest_floor(
        &self,
        certified: usize,
        seen: usize,
        q: f64,
    ) -> Result<f64, StatisticsError> {
        let reached = Predictive::new(certified, seen, self.acceptance_size).reached_with(q);
        self.lower_bound(reached)
    }
}

/// Which data decides retraining's verdict under the reviewer's rule.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Evidence {
    /// Acceptance data apart from the validation data: the certify pipeline's verdict on it.
    AcceptanceData,
    /// Only the acceptance set's size is known: the pass probability predicted from the validation
    /// data.
    Prediction,
}

/// The level retraining aims at on its validation data.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Plan {
    /// The reviewer's rule.
    pub rule: ReviewerRule,
    /// Samples in the validation data.
    pub validation_size: usize,
    /// Wanted probability `q` that the reviewer's check passes.
    pub pass_probability: f64,
    /// `k*`: the least acceptance count that passes.
    pub passing_count: usize,
    /// `v̂`: the least validation count whose predicted pass probability reaches `q`.
    pub aimed_count: usize,
    /// `v̂ / n`: the level training and the choice of weights aim at (instead of the bare floor).
    pub aimed_level: f64,
    /// `π(v̂)`.
    pub pass_probability_at_aim: f64,
    /// The mean of the reviewer's lower bound `L(K)` when the validation count is `v̂`.
    pub expected_lower_bound: f64,
    /// What decides the verdict.
    pub evidence: Evidence,
}

impl Plan {
    /// The plan for `rule` with `validation_size` validation samples and pass probability `q`.
    pub fn new(
        rule: ReviewerRule,
        validation_size: usize,
        q: f64,
        evidence: Evidence,
    ) -> Result<Plan, ConfidenceError> {
        let m = rule.acceptance_size;
        if !(1..=MAX_ACCEPTANCE_SIZE).contains(&m) {
            return Err(ConfidenceError::Settings(format!(
                "acceptance size {m} is not allowed, expected 1 to {MAX_ACCEPTANCE_SIZE} samples"
            )));
        }
        if validation_size == 0 {
            return Err(ConfidenceError::Settings(
                "the confidence rule needs validation data".into(),
            ));
        }
        if !(q > 0.0 && q < 1.0) {
            return Err(ConfidenceError::Settings(format!(
                "pass probability {q} is not allowed, expected a level strictly between 0 and 1"
            )));
        }
        let n = validation_size;
        let pass = |v: usize, k: usize| Predictive::new(v, n, m).at_least(k);
        let reachable = match rule.passing_count()? {
            Some(k) if pass(n, k) >= q => Some(k),
            _ => None,
        };
        let Some(passing_count) = reachable else {
            return Err(ConfidenceError::Unreachable {
                floor: rule.floor,
                confidence: rule.confidence,
                acceptance_size: m,
                validation_size: n,
                pass_probability: q,
                highest_floor: rule.highest_floor(n, n, q)?,
            });
        };
        // π(v) rises with v (the posterior rises in v): binary search for the least v with π(v) ≥ q.
        let (mut low, mut high) = (0, n);
        while low < high {
            let middle = (low + high) / 2;
            if pass(middle, passing_count) >= q {
                high = middle;
            } else {
                low = middle + 1;
            }
        }
        let predictive = Predictive::new(low, n, m);
        Ok(Plan {
            rule,
            validation_size: n,
            pass_probability: q,
            passing_count,
            aimed_count: low,
            aimed_level: low as f64 / n as f64,
            pass_probability_at_aim: predictive.at_least(passing_count),
            expected_lower_bound: predictive.mean_of(|k| rule.lower_bound(k))?,
            evidence,
        })
    }

    /// The plan of a retraining run, or `None` when the requirement has no confidence level. With
    /// acceptance data apart from `validation` the acceptance set's size is its length (a stated
    /// size must agree); otherwise `settings.acceptance_size` must give it.
    pub fn for_run(
        requirement: &Requirement,
        settings: &ConfidenceSettings,
        validation: Option<&Dataset>,
        acceptance: &Dataset,
    ) -> Result<Option<Plan>, ConfidenceError> {
        let Some(confidence) = requirement.confidence else {
            if settings.acceptance_size.is_some() || settings.pass_probability.is_some() {
                return Err(ConfidenceError::Settings("an acceptance size or pass probability is only used with a confidence level in the requirement".into()));
            }
            return Ok(None);
        };
        let floor = requirement
            .floor
            .ok_or_else(|| ConfidenceError::Settings("the confidence rule needs a floor".into()))?;
        let Some(validation) = validation else {
            return Err(ConfidenceError::Settings(
                "the confidence rule needs validation data".into(),
            ));
        };
        let (acceptance_size, evidence) = if validation == acceptance {
            let size = settings.acceptance_size.ok_or_else(|| {
                ConfidenceError::Settings("the confidence rule needs the reviewer's acceptance set or its size; the validation data cannot stand in for it".into())
            })?;
            (size, Evidence::Prediction)
        } else {
            match settings.acceptance_size {
                Some(size) if size != acceptance.len() => {
                    return Err(ConfidenceError::Settings(format!(
                        "the stated acceptance size {size} differs from the acceptance data's {} samples",
                        acceptance.len()
                    )))
                }
                _ => (acceptance.len(), Evidence::AcceptanceData),
            }
        };
        let rule = ReviewerRule {
            floor,
            confidence,
            acceptance_size,
        };
        let q = settings.pass_probability.unwrap_or(confidence);
        Plan::new(rule, validation.len(), q, evidence).map(Some)
    }

    /// The requirement the certify pipeline checks after each round: the reviewer's on acceptance
    /// data of its own; counts only (no floor, confidence or clean minimum) on the validation data,
    /// whose verdict [`Plan::assess`] makes.
    pub fn check_requirement(&self, requirement: &Requirement) -> Requirement {
        match self.evidence {
            Evidence::AcceptanceData => requirement.clone(),
            Evidence::Prediction => Requirement {
                floor: None,
                confidence: None,
                min_clean_accuracy: None,
                ..requirement.clone()
            },
        }
    }

    /// Judges the returned model from the pipeline's summary on the checked data (see
    /// [`Plan::check_requirement`]).
    pub fn assess(
        &self,
        summary: &Summary,
        requirement: &Requirement,
    ) -> Result<Assessment, StatisticsError> {
        let rule = self.rule;
        let certified = summary.certified;
        let samples = summary.samples;
        Ok(match self.evidence {
            Evidence::AcceptanceData => {
                let lower_bound = rule.lower_bound(certified)?;
                Assessment {
                    evidence: self.evidence,
                    certified,
                    samples,
                    lower_bound: Some(lower_bound),
                    pass_probability: None,
                    expected_lower_bound: None,
                    highest_floor: lower_bound,
                    met: summary.verdict == Verdict::Pass,
                }
            }
            Evidence::Prediction => {
                let predictive = Predictive::new(certified, samples, rule.acceptance_size);
                let pass_probability = predictive.at_least(self.passing_count);
                let clean = requirement
                    .min_clean_accuracy
                    .is_none_or(|minimum| summary.clean_accuracy >= minimum);
                Assessment {
                    evidence: self.evidence,
                    certified,
                    samples,
                    lower_bound: None,
                    pass_probability: Some(pass_probability),
                    expected_lower_bound: Some(predictive.mean_of(|k| rule.lower_bound(k))?),
                    highest_floor: rule.highest_floor(certified, samples, self.pass_probability)?,
                    met: clean && pass_probability >= self.pass_probability,
                }
            }
        })
    }
}

/// How the returned model stands against the reviewer's rule.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Assessment {
    /// What decided it.
    pub evidence: Evidence,
    /// Samples certified by the certify pipeline on the checked data.
    pub certified: usize,
    /// Samples in the checked data.
    pub samples: usize,
    /// The reviewer's lower bound on the acceptance data (with acceptance data of its own).
    pub lower_bound: Option<f64>,
    /// Predicted probability that the reviewer's check passes (prediction only).
    pub pass_probability: Option<f64>,
    /// Mean of the reviewer's lower bound under the prediction (prediction only).
    pub expected_lower_bound: Option<f64>,
    /// The highest floor the model is expected to pass at the confidence level: the acceptance
    /// data's lower bound, or the bound at the count reached with the wanted pass probability.
    pub highest_floor: f64,
    /// The reviewer's check passed (acceptance data) or is expected to pass with at least the wanted
    /// probability (prediction; with a clean-accuracy minimum, the validation data's clean accuracy
    /// must reach it too).
    pub met: bool,
}
