//! The certified training loss and its exact gradient: cross-entropy on worst-case logits built from
//! sound margin lower bounds, by interval bound propagation (Gowal et al., 2018) or a mix of interval
//! and linear-relaxation bounds (Zhang et al., 2020: interval bounds for the hidden layers,
//! a backward linear relaxation for the margins, `β · linear + (1 − β) · interval`).
//!
//! For a sample with label `y`, forbidden classes `j` and margin lower bounds `b_j ≤ z_y − z_j` over the
//! region, the loss is `log(1 + Σ_j exp(−b_j))`, i.e. cross-entropy of the logit vector `(0, −b_j …)` at
//! the label's position; it is small only when every `b_j` is large.
//!
//! Every bound comes from the bound engine ([`crate::engine`]), the same code certification runs: the
//! hidden layers' interval bounds ([`intermediate::compute`]), the interval margin over the last
//! hidden layer's box ([`backward::over_last_box`]) and the backward linear relaxation with the
//! adaptive lower slopes ([`backward::run`]), each with its rounding allowance, minimised over each
//! region's bounding box (an L2 region is read as its box, as its interval bounds already are). The
//! gradient is the engine's reverse-mode pass ([`Adjoint`]) through both passes, including the
//! dependence of the upper slope `u / (u − l)` on the interval bounds, on every layer's own
//! operations (a convolution is never written out as a dense matrix); it leaves out the rounding
//! allowance, which moves a bound by a relative amount near the unit roundoff.
//!
//! A batch runs in blocks of a fixed number of samples, one column per (sample, forbidden class)
//! pair; the blocks' gradients are summed in order, so the result does not depend on the number of
//! threads.
//!
//! These bounds steer training only. Whether a model is certified is decided afterwards by `bound/`
//! and `certify/`; nothing here reports a sample as certified.

use rayon::prelude::*;

use crate::bound::batch::{margin_objectives, Request};
use crate::bound::validate_batch;
use crate::engine::adjoint::Adjoint;
use crate::engine::backward::{self, Choices, Keep};
use crate::engine::intermediate::{self, Tightness};
use crate::engine::{Domains, Engine};
use crate::model::{Affine, Network};
use crate::threat::{Norm, Region};

use super::backprop::{add_scaled, zeros_like};
use super::TrainError;

/// Samples per block (fixed, so sums do not depend on the thread count).
const BLOCK: usize = 16;

/// The certified loss over a batch.
#[derive(Debug, Clone)]
pub struct CertifiedBatch {
    /// `(1/B) Σ_s weight_s · loss_s` over the batch of `B` samples.
    pub loss: f64,
    /// `loss_s` per sample (without weights).
    pub sample_losses: Vec<f64>,
    /// Per sample, the smallest margin lower bound used by the loss (`+∞` without forbidden classes).
    pub worst_margins: Vec<f64>,
    /// Gradient of [`CertifiedBatch::loss`] with respect to the network's weights and biases.
    pub gradient: Network,
}

/// Cross-entropy on worst-case logits from margin lower bounds, with its gradient.
///
/// `network` is the trainable network (a 1-logit network is read as its two-logit classifier form),
/// `regions` are in the network's input units (after any normalisation), `targets[s]` are the classes
/// sample `s` must not move into, `weights[s]` scale each sample's term, and `linear_weight` is `β` in
/// `[0, 1]` (0 = interval bounds only).
pub fn certified_cross_entropy(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
    weights: &[f64],
    linear_weight: f64,
) -> Result<CertifiedBatch, TrainError> {
    if !(0.0..=1.0).contains(&linear_weight) {
        return Err(TrainError::Settings(format!(
            "linear bound weight {linear_weight} must lie in [0, 1]"
        )));
    }
    let samples = regions.len();
    if weights.len() != samples {
        return Err(TrainError::Data(format!(
            "{} sample weights for {samples} samples",
            weights.len()
        )));
    }
    let classifier = network.as_classifier();
    validate_batch(&classifier, regions, labels, targets)
        .map_err(|e| TrainError::Data(format!("interval bounds: {e}")))?;
    let beta = if classifier.layers.len() == 1 {
        0.0
    } else {
        linear_weight
    };
    let engine = Engine::new(&classifier);
    let boxes: Vec<Option<Region>> = regions.iter().map(bounding_box).collect();
    let scale = 1.0 / samples.max(1) as f64;
    let starts: Vec<usize> = (0..samples).step_by(BLOCK).collect();
    let blocks: Vec<BlockResult> = starts
        .par_iter()
        .map(|&start| {
            let end = (start + BLOCK).min(samples);
            let requests: Vec<Request> = (start..end)
                .map(|s| Request {
                    region: boxes[s].as_ref().unwrap_or(&regions[s]),
                    label: labels[s],
                    targets: &targets[s],
                    splits: None,
                })
                .collect();
            let factors: Vec<f64> = weights[start..end].iter().map(|w| w * scale).collect();
            block_loss(&engine, &classifier, &requests, beta, &factors)
        })
        .collect();
    let mut total = zeros_like(&classifier);
    let mut sample_losses = Vec::with_capacity(samples);
    let mut worst_margins = Vec::with_capacity(samples);
    for block in blocks {
        add_scaled(&mut total, &block.gradient, 1.0);
        sample_losses.extend(block.losses);
        worst_margins.extend(block.worst);
    }
    let loss = (0..samples)
        .map(|s| weights[s] * scale * sample_losses[s])
        .sum();
    Ok(CertifiedBatch {
        loss,
        sample_losses,
        worst_margins,
        gradient: from_classifier_gradient(network, total),
    })
}

/// Maps a gradient for [`Network::as_classifier`] back to `network` (for a 1-logit network only row 1
/// of the last layer is a parameter; row 0 is the fixed zero logit).
pub fn from_classifier_gradient(network: &Network, mut gradient: Network) -> Network {
    if network.output_dim() == 1 {
        let last = gradient.layers.last_mut().expect("non-empty");
        match last {
            Affine::Dense(d) => {
                d.weights = d.weights.rows(1, 1).into_owned();
                d.bias = d.bias.rows(1, 1).into_owned();
            }
            // Any other kind was widened by a fixed map appended to it (Network::as_classifier).
            Affine::Chain(parts) => *last = parts[0].clone(),
            _ => unreachable!("as_classifier keeps dense or chains the last layer"),
        }
    }
    gradient
}

/// The bounding box of an L2 region as an L-inf region with the same outer and inner boxes (`None`
/// for an L-inf region: it is its box).
fn bounding_box(region: &Region) -> Option<Region> {
    (region.norm == Norm::L2).then(|| Region {
        norm: Norm::Linf,
        ..region.clone()
    })
}

/// One block's losses, worst margins and gradient (classifier form, weighted by the sample factors).
struct BlockResult {
    losses: Vec<f64>,
    worst: Vec<f64>,
    gradient: Network,
}

/// The losses of a block of samples (`requests`, boxes) and the gradient of
/// `Σ_s factors[s] · loss_s`, on the engine of the classifier-form `network`.
fn block_loss(
    engine: &Engine,
    network: &Network,
    requests: &[Request],
    beta: f64,
    factors: &[f64],
) -> BlockResult {
    let count = requests.len();
    let objectives = margin_objectives(engine, requests);
    if objectives.domain.is_empty() {
        return BlockResult {
            losses: vec![0.0; count],
            worst: vec![f64::INFINITY; count],
            gradient: zeros_like(network),
        };
    }
    let regions = requests.iter().map(|r| r.region).collect();
    let domains = Domains::new(regions, &vec![None; count], &engine.hidden_sizes());
    let hidden = intermediate::compute(engine, &domains, Tightness::Interval, None);
    let interval = backward::over_last_box(engine, &hidden, &domains, &objectives);
    let linear = (beta > 0.0).then(|| {
        let (choices, keep) = (Choices::default(), Keep::Everything);
        backward::run(engine, &hidden, &domains, objectives.clone(), choices, keep)
    });

    // Mixed bound and the loss log(1 + Σ exp(−b_t)) per sample.
    let mut d_bound = vec![0.0; objectives.domain.len()];
    let mut losses = Vec::with_capacity(count);
    let mut worst = Vec::with_capacity(count);
    let mut first = 0;
    for (s, request) in requests.iter().enumerate() {
        let range = first..first + request.targets.len();
        first = range.end;
        let bounds: Vec<f64> = range
            .clone()
            .map(|p| {
                let lin = linear.as_ref().map_or(0.0, |l| l.lower[p]);
                beta * lin + (1.0 - beta) * interval[p]
            })
            .collect();
        if bounds.is_empty() {
            losses.push(0.0);
            worst.push(f64::INFINITY);
            continue;
        }
        let shift = bounds.iter().map(|b| -b).fold(0.0f64, f64::max);
        let sum: f64 = (-shift).exp() + bounds.iter().map(|b| (-b - shift).exp()).sum::<f64>();
        losses.push(shift + sum.ln());
        worst.push(bounds.iter().copied().fold(f64::INFINITY, f64::min));
        for (p, b) in range.zip(&bounds) {
            d_bound[p] = -factors[s] * (-b - shift).exp() / sum;
        }
    }

    let mut adjoint = Adjoint::new(network, &hidden);
    if beta < 1.0 {
        let d: Vec<f64> = d_bound.iter().map(|v| (1.0 - beta) * v).collect();
        adjoint.over_last_box(engine, &hidden, &domains, &objectives, &d);
    }
    if let Some(pass) = &linear {
        let d: Vec<f64> = d_bound.iter().map(|v| beta * v).collect();
        adjoint.backward(engine, &hidden, &objectives, pass, &d);
    }
    BlockResult {
        losses,
        worst,
        gradient: Network::new(adjoint.through_intervals(engine, &hidden, &domains)),
    }
}
