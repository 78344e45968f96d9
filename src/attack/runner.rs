//! The attack runner: owns the schedule of starts and runs, the step-size schedule, seeds, the time
//! limit and the stop on the first validated counterexample, for one sample ([`attack_sample`]) or many
//! stepped together as one batch ([`attack_batch`], executed by `attack::lockstep`).
//!
//! Schedule per sample (each PGD run is `steps` gradient steps of [`super::step::descent_step`] on the
//! margin loss of Carlini & Wagner, 2017):
//! 1. the clean point itself (already in a forbidden class → a counterexample at distance 0);
//! 2. the FGSM point (Goodfellow et al., 2015), when `fgsm_first`;
//! 3. one untargeted PGD run (Madry et al., 2018) from each caller-given extra start;
//! 4. `restarts` untargeted PGD runs: the first from the centre, the others from random points;
//! 5. when `targeted` and more than one class is forbidden: one PGD run from the centre against each
//!    forbidden class, most dangerous (largest clean logit) first.
//!
//! Within a run the step starts at `step_fraction` of the radius and is halved, returning to the best
//! point of the run, after `patience` steps without progress. Everything is deterministic for a given
//! `sample_seed` (ChaCha8). Guarantee: a [`AttackOutcome::Found`] always holds a point that
//! [`super::validate`] accepted; a search that ends without one says [`AttackOutcome::NotFound`] and why it
//! stopped — it never claims the sample is robust.

use std::time::Instant;

use super::counterexample::Counterexample;
use super::lockstep::{attack_lockstep, Sample};
use super::AttackError;
use crate::model::Network;
use crate::threat::Region;

/// How hard and how to search.
#[derive(Debug, Clone, PartialEq)]
pub struct AttackSettings {
    /// Gradient steps per PGD run.
    pub steps: usize,
    /// Untargeted PGD runs (the first from the centre, the others from random starts).
    pub restarts: usize,
    /// First step size as a fraction of the ball's radius (in the region's metric), in (0, 1].
    pub step_fraction: f64,
    /// Steps without progress after which the step size is halved (≥ 1).
    pub patience: usize,
    /// Seed from which every sample's own seed is derived ([`sample_seed`]).
    pub seed: u64,
    /// Stop searching (and report [`StopReason::DeadlineReached`]) at this instant.
    pub deadline: Option<Instant>,
    /// Try the FGSM point before the PGD runs.
    pub fgsm_first: bool,
    /// After the untargeted runs, run PGD against each forbidden class in turn.
    pub targeted: bool,
    /// Stop at the first validated counterexample (off only to time full budgets).
    pub stop_at_first: bool,
    /// The floating-point format the search evaluates points and gradients in.
    pub precision: SearchPrecision,
}

/// The floating-point format of the search's forward and gradient passes. Whatever it is, a
/// counterexample is only ever accepted by [`super::validate`]'s plain f64 forward pass, and the
/// reported best margin is recomputed by that pass too.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum SearchPrecision {
    /// f64 throughout.
    #[default]
    Double,
    /// f32 forward and gradient passes (about twice the matrix-product throughput); any point whose
    /// f32 margin is within rounding of a forbidden class winning is checked in f64.
    Single,
}

impl Default for AttackSettings {
    /// 100 steps, 5 restarts, first step a quarter of the radius, halved after 10 steps without
    /// progress, FGSM first, targeted runs, stop at the first counterexample, no time limit, seed 0,
    /// f64 search.
    fn default() -> Self {
        AttackSettings {
            steps: 100,
            restarts: 5,
            step_fraction: 0.25,
            patience: 10,
            seed: 0,
            deadline: None,
            fgsm_first: true,
            targeted: true,
            stop_at_first: true,
            precision: SearchPrecision::Double,
        }
    }
}

impl AttackSettings {
    /// Checks the settings (`step_fraction` in (0, 1], `patience` ≥ 1).
    pub fn check(&self) -> Result<(), AttackError> {
        if !(self.step_fraction > 0.0 && self.step_fraction <= 1.0) {
            return Err(AttackError::Settings(format!(
                "step fraction {} is not allowed, expected a number in (0, 1]",
                self.step_fraction
            )));
        }
        if self.patience == 0 {
            return Err(AttackError::Settings(
                "patience must be at least 1 step".into(),
            ));
        }
        Ok(())
    }
}

/// Why a search ended without a counterexample.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StopReason {
    /// Every planned run finished.
    BudgetSpent,
    /// The deadline passed first.
    DeadlineReached,
}

/// What the attack found for one sample.
#[derive(Debug, Clone, PartialEq)]
pub enum AttackOutcome {
    /// A validated counterexample.
    Found(Counterexample),
    /// No counterexample was found (which proves nothing about robustness).
    NotFound {
        /// Forbidden margin (`logit[label] − best forbidden logit`, by a plain forward pass) at the point
        /// with the smallest margin the search saw; +∞ when no class is forbidden.
        best_margin: f64,
        /// The point where it was seen (inside the region).
        best_input: Vec<f64>,
        /// Why the search ended.
        stop: StopReason,
    },
}

impl AttackOutcome {
    /// The counterexample, if one was found.
    pub fn counterexample(&self) -> Option<&Counterexample> {
        match self {
            AttackOutcome::Found(c) => Some(c),
            AttackOutcome::NotFound { .. } => None,
        }
    }
}

/// One sample to attack in a batch.
#[derive(Debug, Clone, PartialEq)]
pub struct AttackProblem {
    /// The sample's index in its data set (its seed is derived from it).
    pub index: usize,
    /// Ball ∩ input range around the sample.
    pub region: Region,
    /// The sample's class.
    pub label: usize,
    /// Classes the answer must not move into (e.g. from [`crate::threat::Targets::forbidden_for`]).
    pub forbidden: Vec<usize>,
    /// Extra starting points (projected into the region before use).
    pub extra_starts: Vec<Vec<f64>>,
}

/// The seed of sample `index` under the run seed `seed` (SplitMix64 mixing, so neighbouring indices
/// get unrelated streams).
pub fn sample_seed(seed: u64, index: usize) -> u64 {
    split_mix(seed ^ split_mix(index as u64 ^ 0x5851_f42d_4c95_7f2d))
}

fn split_mix(value: u64) -> u64 {
    let mut z = value.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

fn check_problem(
    network: &Network,
    region: &Region,
    label: usize,
    forbidden: &[usize],
    extra_starts: &[Vec<f64>],
) -> Result<(), AttackError> {
    let dim = network.input_dim();
    let classes = network.output_dim();
    if region.dim() != dim || region.radii.len() != dim {
        return Err(AttackError::Dimension {
            what: "region".into(),
            found: region.dim(),
            expected: dim,
        });
    }
    if let Some(start) = extra_starts.iter().find(|s| s.len() != dim) {
        return Err(AttackError::Dimension {
            what: "extra starting point".into(),
            found: start.len(),
            expected: dim,
        });
    }
    if label >= classes {
        return Err(AttackError::Class {
            class: label,
            classes,
        });
    }
    if let Some(&class) = forbidden.iter().find(|&&j| j >= classes) {
        return Err(AttackError::Class { class, classes });
    }
    Ok(())
}

/// Attacks one sample of class `label` inside `region`, counting only moves into `forbidden` classes.
/// `network` must have at least two logits (use [`crate::model::Model::classifier`]).
pub fn attack_sample(
    network: &Network,
    region: &Region,
    label: usize,
    forbidden: &[usize],
    settings: &AttackSettings,
    sample_seed: u64,
    extra_starts: &[Vec<f64>],
) -> Result<AttackOutcome, AttackError> {
    settings.check()?;
    check_problem(network, region, label, forbidden, extra_starts)?;
    let sample = Sample {
        region,
        label,
        forbidden,
        extra_starts,
        seed: sample_seed,
    };
    let mut outcomes = attack_lockstep(network, &[sample], settings);
    Ok(outcomes.pop().expect("one outcome per sample"))
}

/// Attacks every problem together, in lockstep (`attack::lockstep`): each phase of the schedule steps
/// all still-open samples as one batch of matrix products (parallel over column blocks). Sample `p`
/// uses `sample_seed(settings.seed, p.index)` and its result is the one [`attack_sample`] gives it
/// alone, whatever the order, the batch or the thread count.
pub fn attack_batch(
    network: &Network,
    problems: &[AttackProblem],
    settings: &AttackSettings,
) -> Result<Vec<AttackOutcome>, AttackError> {
    settings.check()?;
    for p in problems {
        check_problem(network, &p.region, p.label, &p.forbidden, &p.extra_starts)?;
    }
    let samples: Vec<Sample<'_>> = problems
        .iter()
        .map(|p| Sample {
            region: &p.region,
            label: p.label,
            forbidden: &p.forbidden,
            extra_starts: &p.extra_starts,
            seed: sample_seed(settings.seed, p.index),
        })
        .collect();
    Ok(attack_lockstep(network, &samples, settings))
}
