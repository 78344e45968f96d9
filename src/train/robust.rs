//! Robust training losses over the same threat model as certification (per-feature radii, clipped to
//! the input range), expressed in the trainable network's units.
//!
//! - [`RobustLoss::Interval`]: cross-entropy on worst-case logits from interval bounds (Gowal et al.,
//!   2018);
//! - [`RobustLoss::LinearInterval`]: the same with the mix of linear-relaxation and interval bounds of
//!   Zhang et al. (2020), `β` ramped from 1 to 0 while epsilon ramps up;
//! - [`RobustLoss::Adversarial`]: cross-entropy at PGD points (Madry et al., 2018), found with the
//!   attack module's margin gradients and projected steps.
//!
//! For a sample with label `y` and forbidden classes `F` (from [`crate::threat::Targets`]) every loss is
//! `log(1 + Σ_{j∈F} exp(−m_j))` with `m_j` the margin `z_y − z_j` (a bound or its value at the PGD
//! point); with every class forbidden this is ordinary cross-entropy. Each loss also reports a per-sample
//! "robust error" indicator (bound not above the certification tolerance, or the PGD point misclassified)
//! that the primal-dual loop uses as the measured constraint. These are training signals only: nothing
//! here certifies anything.

use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::attack::evaluate::{evaluate, Against, MarginSpec};
use crate::attack::step::{descent_step, random_start};
use crate::attack::SearchPrecision;
use crate::bound::CERTIFY_TOLERANCE;
use crate::engine::Engine;
use crate::model::{Model, Network, Normalization};
use crate::threat::{Budget, Region};

use super::backprop::{backward, forward};
use super::bound_gradient::{certified_cross_entropy, from_classifier_gradient};
use super::TrainError;

/// Which robust loss to train with.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum RobustLoss {
    /// Interval bound propagation (Gowal et al., 2018).
    Interval,
    /// Linear relaxation mixed with interval bounds (Zhang et al., 2020), `β` from 1 down to
    /// `final_linear_weight` over the epsilon ramp.
    LinearInterval {
        /// `β` after the ramp (0 in the original schedule).
        final_linear_weight: f64,
    },
    /// Cross-entropy at projected-gradient-descent points (Madry et al., 2018).
    Adversarial {
        /// PGD steps per sample (step size 2.5 / steps of the radius, one random start).
        steps: usize,
    },
}

impl RobustLoss {
    /// The lowercase name used in logs (`interval`, `linear_interval`, `adversarial`).
    pub fn name(&self) -> &'static str {
        match self {
            RobustLoss::Interval => "interval",
            RobustLoss::LinearInterval { .. } => "linear_interval",
            RobustLoss::Adversarial { .. } => "adversarial",
        }
    }

    /// True for the losses built on sound bounds.
    pub fn is_certified(&self) -> bool {
        !matches!(self, RobustLoss::Adversarial { .. })
    }
}

/// A robust loss over a batch.
#[derive(Debug, Clone)]
pub struct RobustBatch {
    /// `(1/B) Σ_s weight_s · loss_s`.
    pub loss: f64,
    /// Per-sample loss (without weights).
    pub sample_losses: Vec<f64>,
    /// Per sample: 1 when the sample counts as a robust error under this loss's measure, else 0.
    pub errors: Vec<bool>,
    /// Gradient of [`RobustBatch::loss`].
    pub gradient: Network,
}

/// The regions of samples, in a trainable network's units.
#[derive(Debug, Clone)]
pub struct RegionMap {
    normalization: Option<Normalization>,
    lower: Vec<f64>,
    upper: Vec<f64>,
}

impl RegionMap {
    /// For `model`'s input range, with `normalization` the fixed leading normalize layer (if any).
    pub fn new(model: &Model, normalization: Option<&Normalization>) -> RegionMap {
        RegionMap {
            normalization: normalization.cloned(),
            lower: model.input.lower.clone(),
            upper: model.input.upper.clone(),
        }
    }

    /// The region of `budget` around the raw sample `center`, mapped through the normalisation:
    /// `(x − mean)/std` is increasing per feature, so the box maps onto the box and the radii scale by
    /// `1/std` (the ball maps onto the ball of the scaled radii).
    pub fn region(&self, center: &[f64], budget: &Budget) -> Region {
        let raw = budget.region(center, &self.lower, &self.upper);
        match &self.normalization {
            None => raw,
            Some(n) => {
                let map = |v: &[f64]| -> Vec<f64> {
                    v.iter()
                        .enumerate()
                        .map(|(i, x)| (x - n.mean[i]) / n.std[i])
                        .collect()
                };
                Region {
                    center: map(&raw.center),
                    norm: raw.norm,
                    radii: raw
                        .radii
                        .iter()
                        .enumerate()
                        .map(|(i, r)| r / n.std[i])
                        .collect(),
                    outer_lower: map(&raw.outer_lower),
                    outer_upper: map(&raw.outer_upper),
                    inner_lower: map(&raw.inner_lower),
                    inner_upper: map(&raw.inner_upper),
                }
            }
        }
    }
}

/// Evaluates `loss` on a batch: `regions[s]` (network units), `labels[s]`, `targets[s]` (forbidden
/// classes), `weights[s]` (per-sample factor), `linear_weight` = `β` for the mixed loss, `seed` for PGD.
#[allow(clippy::too_many_arguments)]
pub fn robust_loss(
    loss: RobustLoss,
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
    weights: &[f64],
    linear_weight: f64,
    seed: u64,
) -> Result<RobustBatch, TrainError> {
    match loss {
        RobustLoss::Interval | RobustLoss::LinearInterval { .. } => {
            let beta = if loss == RobustLoss::Interval {
                0.0
            } else {
                linear_weight
            };
            let batch = certified_cross_entropy(network, regions, labels, targets, weights, beta)?;
            Ok(RobustBatch {
                loss: batch.loss,
                errors: batch
                    .worst_margins
                    .iter()
                    .map(|m| *m <= CERTIFY_TOLERANCE)
                    .collect(),
                sample_losses: batch.sample_losses,
                gradient: batch.gradient,
            })
        }
        RobustLoss::Adversarial { steps } => {
            adversarial_cross_entropy(network, regions, labels, targets, weights, steps, seed)
        }
    }
}

/// PGD on the worst forbidden margin from one random start per sample, all samples stepped together
/// through the engine's batched passes: `steps` sign (L-inf) or normalised (L2) steps of size
/// `2.5 / steps` of the radius, projected into the region after each step. Sample `s` draws its start
/// from ChaCha8 seeded with `seeds[s]`; a sample with no forbidden class stays at its centre.
///
/// # Panics
/// If `regions`, `labels`, `targets` and `seeds` differ in length.
pub fn pgd_points(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
    steps: usize,
    seeds: &[u64],
) -> Vec<Vec<f64>> {
    let samples = regions.len();
    assert!(labels.len() == samples && targets.len() == samples && seeds.len() == samples);
    let engine = Engine::new(&network.as_classifier());
    let mut points: Vec<Vec<f64>> = regions.iter().map(|r| r.center.clone()).collect();
    let moving: Vec<usize> = (0..samples).filter(|&s| !targets[s].is_empty()).collect();
    for &s in &moving {
        let mut rng = ChaCha8Rng::seed_from_u64(seeds[s]);
        random_start(&regions[s], &mut rng, &mut points[s]);
    }
    let specs: Vec<MarginSpec<'_>> = moving
        .iter()
        .map(|&s| MarginSpec {
            label: labels[s],
            against: Against::Strongest(&targets[s]),
        })
        .collect();
    let step = 2.5 / steps.max(1) as f64;
    let dim = network.input_dim();
    for _ in 0..steps {
        if moving.is_empty() {
            break;
        }
        let mut batch = DMatrix::zeros(dim, moving.len());
        for (j, &s) in moving.iter().enumerate() {
            batch.column_mut(j).copy_from_slice(&points[s]);
        }
        let gradients = evaluate(&engine, &batch, &specs, true, SearchPrecision::Double).gradients;
        for (j, &s) in moving.iter().enumerate() {
            let g = gradients.column(j);
            descent_step(&regions[s], &mut points[s], g.as_slice(), step);
        }
    }
    points
}

/// Restricted cross-entropy `log(1 + Σ_{j∈F} exp(−(z_y − z_j)))` of classifier logits, with its
/// gradient with respect to them.
pub fn restricted_cross_entropy(
    logits: &[f64],
    label: usize,
    targets: &[usize],
) -> (f64, Vec<f64>) {
    let mut gradient = vec![0.0; logits.len()];
    if targets.is_empty() {
        return (0.0, gradient);
    }
    let margins: Vec<f64> = targets.iter().map(|&j| logits[label] - logits[j]).collect();
    let shift = margins.iter().map(|m| -m).fold(0.0f64, f64::max);
    let sum: f64 = (-shift).exp() + margins.iter().map(|m| (-m - shift).exp()).sum::<f64>();
    for (t, &j) in targets.iter().enumerate() {
        let p = (-margins[t] - shift).exp() / sum;
        gradient[j] += p;
        gradient[label] -= p;
    }
    (shift + sum.ln(), gradient)
}

fn adversarial_cross_entropy(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
    weights: &[f64],
    steps: usize,
    seed: u64,
) -> Result<RobustBatch, TrainError> {
    let samples = regions.len();
    if weights.len() != samples || labels.len() != samples || targets.len() != samples {
        return Err(TrainError::Data(
            "regions, labels, targets and weights differ in length".into(),
        ));
    }
    let dim = network.input_dim();
    let seeds: Vec<u64> = (0..samples)
        .map(|s| seed ^ (s as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15))
        .collect();
    let points = pgd_points(network, regions, labels, targets, steps, &seeds);
    let mut batch = DMatrix::zeros(dim, samples);
    for (s, p) in points.iter().enumerate() {
        batch.column_mut(s).copy_from_slice(p);
    }
    let classifier = network.as_classifier();
    let cache = forward(&classifier, &batch);
    let logits = cache.logits();
    let mut d_logits = DMatrix::zeros(logits.nrows(), samples);
    let mut loss = 0.0;
    let mut sample_losses = Vec::with_capacity(samples);
    let mut errors = Vec::with_capacity(samples);
    let scale = 1.0 / samples.max(1) as f64;
    for s in 0..samples {
        let z = logits.column(s);
        let (value, g) = restricted_cross_entropy(z.as_slice(), labels[s], &targets[s]);
        for (r, gr) in g.iter().enumerate() {
            d_logits[(r, s)] = weights[s] * scale * gr;
        }
        loss += weights[s] * scale * value;
        sample_losses.push(value);
        errors.push(targets[s].iter().any(|&j| z[labels[s]] - z[j] <= 0.0));
    }
    let gradient = from_classifier_gradient(network, backward(&classifier, &cache, &d_logits));
    Ok(RobustBatch {
        loss,
        sample_losses,
        errors,
        gradient,
    })
}
