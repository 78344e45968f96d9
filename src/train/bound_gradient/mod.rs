//! The certified training loss and its exact gradient: cross-entropy on worst-case logits built from
//! sound margin lower bounds, by interval bound propagation (Gowal et al., 2018) or a mix of interval
//! and linear-relaxation bounds (Zhang et al., 2020: interval bounds for the hidden layers,
//! a backward linear relaxation for the margins, `β · linear + (1 − β) · interval`).
//!
//! For a sample with label `y`, forbidden classes `j` and margin lower bounds `b_j ≤ z_y − z_j` over the
//! region, the loss is `log(1 + Σ_j exp(−b_j))`, i.e. cross-entropy of the logit vector `(0, −b_j …)` at
//! the label's position; it is small only when every `b_j` is large. The forward interval values come
//! from [`crate::bound::interval::batch_margin_lower_bounds`] (so training and certification use the
//! same interval propagation: a chain of maps is bounded part by part, its radius through the parts'
//! magnitude maps in turn). The backward linear pass is recomputed here (`relaxation.rs`) because its
//! gradient needs every intermediate coefficient matrix, which `bound/` does not expose; it uses the
//! same relaxation (upper line `s (z − l)`, `s = u / (u − l)`, adaptive lower slope `α ∈ {0, 1}`) and
//! minimises over the region's bounding box. The gradient is hand-derived reverse-mode differentiation through both
//! passes, including the dependence of `s` on the interval bounds `l`, `u`; at the measure-zero set of
//! kinks (a bound exactly 0, a weight exactly 0) one-sided derivatives are taken.
//!
//! Every pass runs on the layers' own structured operations ([`Affine::apply_linear`],
//! [`Affine::transpose_apply`], [`Affine::bias_dot`], [`Affine::backward`] with and without
//! `magnitude`) over a block of samples at once, one column per (sample, forbidden class) pair: a
//! convolution is never written out as a dense matrix. Blocks have a fixed size and their gradients are
//! summed in order, so the result does not depend on the number of threads.
//!
//! These bounds steer training only. Whether a model is certified is decided afterwards by `bound/`
//! and `certify/`; nothing here reports a sample as certified.

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;

use crate::bound::interval::{batch_margin_lower_bounds, BatchIntervalBounds};
use crate::model::{Affine, Network};
use crate::threat::Region;

use super::backprop::{add_scaled, zeros_like};
use super::TrainError;

mod relaxation;

/// Samples per block of the structured passes (fixed, so sums do not depend on the thread count).
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
    let interval = batch_margin_lower_bounds(&classifier, regions, labels, targets)
        .map_err(|e| TrainError::Data(format!("interval bounds: {e}")))?;
    let beta = if classifier.layers.len() == 1 {
        0.0
    } else {
        linear_weight
    };
    let scale = 1.0 / samples.max(1) as f64;
    let starts: Vec<usize> = (0..samples).step_by(BLOCK).collect();
    let blocks: Vec<BlockResult> = starts
        .par_iter()
        .map(|&start| {
            let end = (start + BLOCK).min(samples);
            let block = Block::new(
                &classifier,
                &interval,
                &regions[start..end],
                start,
                &labels[start..end],
                &targets[start..end],
            );
            let factors: Vec<f64> = weights[start..end].iter().map(|w| w * scale).collect();
            block.loss_and_gradient(beta, &factors)
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

/// Sign with 0 at 0 (a subgradient of |x|).
fn sign(x: f64) -> f64 {
    if x > 0.0 {
        1.0
    } else if x < 0.0 {
        -1.0
    } else {
        0.0
    }
}

/// Adds to `gradient` the parameter gradient of `Σ_p outer_pᵀ (L x_p + s_p β)`, with `L` the linear
/// part of `layer` and `β = layer(0)` its whole bias (for a chain, every part's bias carried through
/// the later parts): `Σ_p outer_pᵀ layer(x_p)` plus `(Σ_p (s_p − 1) outer_p)ᵀ layer(0)`, each the
/// layer's own reverse-mode step.
fn scaled_backward(
    layer: &Affine,
    xs: &DMatrix<f64>,
    outer: &DMatrix<f64>,
    scales: &DVector<f64>,
    gradient: &mut Affine,
) {
    layer.backward(xs, outer, gradient, false);
    let correction = outer * scales.map(|s| s - 1.0);
    if correction.iter().any(|v| *v != 0.0) {
        let zero = DMatrix::zeros(layer.input_dim(), 1);
        let correction = DMatrix::from_column_slice(correction.len(), 1, correction.as_slice());
        layer.backward(&zero, &correction, gradient, false);
    }
}

/// One block's losses, worst margins and gradient (classifier form, weighted by the sample factors).
struct BlockResult {
    losses: Vec<f64>,
    worst: Vec<f64>,
    gradient: Network,
}

/// A block of samples: the network, the interval bounds of its hidden layers (one column per
/// sample), its boxes and its (sample, forbidden class) pairs.
struct Block<'a> {
    network: &'a Network,
    /// `lower[k]`, `upper[k]`: pre-activation bounds of hidden layer `k`.
    lower: Vec<DMatrix<f64>>,
    upper: Vec<DMatrix<f64>>,
    /// Box centres and radii: index 0 the input box, `k + 1` the ReLU outputs of hidden layer `k`.
    centre: Vec<DMatrix<f64>>,
    radius: Vec<DMatrix<f64>>,
    /// The sample of each pair.
    owner: Vec<usize>,
    /// Per sample, its range of pairs.
    pairs: Vec<std::ops::Range<usize>>,
    /// `e_label − e_target` per pair (classes × pairs).
    spec: DMatrix<f64>,
    /// Interval margin bound per pair.
    interval_margins: Vec<f64>,
}

impl<'a> Block<'a> {
    fn new(
        network: &'a Network,
        interval: &BatchIntervalBounds,
        regions: &[Region],
        first: usize,
        labels: &[usize],
        targets: &[Vec<usize>],
    ) -> Block<'a> {
        let count = regions.len();
        let hidden = network.layers.len() - 1;
        let columns = |m: &DMatrix<f64>| m.columns(first, count).into_owned();
        let lower: Vec<DMatrix<f64>> = interval.lower[..hidden].iter().map(columns).collect();
        let upper: Vec<DMatrix<f64>> = interval.upper[..hidden].iter().map(columns).collect();
        let dim = network.input_dim();
        let input_lower = DMatrix::from_fn(dim, count, |i, s| regions[s].outer_lower[i]);
        let input_upper = DMatrix::from_fn(dim, count, |i, s| regions[s].outer_upper[i]);
        let mut centre = vec![(&input_lower + &input_upper) * 0.5];
        let mut radius = vec![(&input_upper - &input_lower) * 0.5];
        for k in 0..hidden {
            let hl = lower[k].map(|v| v.max(0.0));
            let hu = upper[k].map(|v| v.max(0.0));
            centre.push((&hu + &hl) * 0.5);
            radius.push((&hu - &hl) * 0.5);
        }
        let total: usize = targets.iter().map(Vec::len).sum();
        let mut spec = DMatrix::zeros(network.output_dim(), total);
        let mut owner = Vec::with_capacity(total);
        let mut pairs = Vec::with_capacity(count);
        let mut interval_margins = Vec::with_capacity(total);
        for s in 0..count {
            let start = owner.len();
            for (t, &j) in targets[s].iter().enumerate() {
                spec[(labels[s], owner.len())] = 1.0;
                spec[(j, owner.len())] = -1.0;
                owner.push(s);
                interval_margins.push(interval.margins[first + s][t]);
            }
            pairs.push(start..owner.len());
        }
        Block {
            network,
            lower,
            upper,
            centre,
            radius,
            owner,
            pairs,
            spec,
            interval_margins,
        }
    }

    /// The block's losses and the gradient of `Σ_s factors[s] · loss_s`.
    fn loss_and_gradient(&self, beta: f64, factors: &[f64]) -> BlockResult {
        let layers = &self.network.layers;
        let hidden = layers.len() - 1;
        let last = &layers[hidden];
        let mut gradient = zeros_like(self.network);
        let count = self.pairs.len();
        if self.owner.is_empty() {
            return BlockResult {
                losses: vec![0.0; count],
                worst: vec![f64::INFINITY; count],
                gradient,
            };
        }
        // The spec pulled back through the last layer: the start of the linear pass and the
        // coefficients of the interval margin over the last box.
        let start = last.transpose_apply(&self.spec);
        let linear = (beta > 0.0).then(|| self.linear_pass(&start));

        // Mixed bound and the loss log(1 + Σ exp(−b_t)) per sample.
        let mut d_bound = vec![0.0; self.owner.len()];
        let mut losses = Vec::with_capacity(count);
        let mut worst = Vec::with_capacity(count);
        for (s, range) in self.pairs.iter().enumerate() {
            let bounds: Vec<f64> = range
                .clone()
                .map(|p| {
                    let lin = linear.as_ref().map_or(0.0, |l| l.margins[p]);
                    beta * lin + (1.0 - beta) * self.interval_margins[p]
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
            for (p, b) in range.clone().zip(&bounds) {
                d_bound[p] = -factors[s] * (-b - shift).exp() / sum;
            }
        }

        let hidden_rows = |k: usize| DMatrix::zeros(self.lower[k].nrows(), count);
        let mut d_lower: Vec<DMatrix<f64>> = (0..hidden).map(hidden_rows).collect();
        let mut d_upper: Vec<DMatrix<f64>> = (0..hidden).map(hidden_rows).collect();
        let mut d_centre = DMatrix::zeros(last.input_dim(), count);
        let mut d_radius = DMatrix::zeros(last.input_dim(), count);

        // Interval margin backward: b_p = spec_pᵀ last(c) − |Lᵀ spec_p|ᵀ r over the last box.
        if beta < 1.0 {
            let d: Vec<f64> = d_bound.iter().map(|v| (1.0 - beta) * v).collect();
            let mut outer = DMatrix::zeros(self.spec.nrows(), count);
            let mut signed = DMatrix::zeros(start.nrows(), self.owner.len());
            let mut weighted = self.spec.clone();
            for (p, &s) in self.owner.iter().enumerate() {
                outer.column_mut(s).axpy(d[p], &self.spec.column(p), 1.0);
                weighted.column_mut(p).scale_mut(-d[p]);
                for i in 0..start.nrows() {
                    let g = start[(i, p)];
                    signed[(i, p)] = sign(g) * self.radius[hidden][(i, s)];
                    d_radius[(i, s)] -= d[p] * g.abs();
                }
            }
            let g = &mut gradient.layers[hidden];
            d_centre += last.backward(&self.centre[hidden], &outer, g, false);
            let no_bias = DVector::zeros(self.owner.len());
            scaled_backward(last, &signed, &weighted, &no_bias, g);
        }

        // Linear relaxation backward.
        if let Some(pass) = &linear {
            let d_linear = DVector::from_fn(self.owner.len(), |p, _| beta * d_bound[p]);
            let mut d_lambda = DMatrix::from_fn(pass.input.nrows(), self.owner.len(), |i, p| {
                let s = self.owner[p];
                d_linear[p]
                    * (self.centre[0][(i, s)] - sign(pass.input[(i, p)]) * self.radius[0][(i, s)])
            });
            for k in 0..hidden {
                let layer = &layers[k];
                // Λ_in = Lᵀ R and constant += βᵀ R: R receives L dΛ + β d_constant.
                let d_relaxed = layer.apply_linear(&d_lambda)
                    + layer.apply_batch(&DMatrix::zeros(layer.input_dim(), 1))
                        * d_linear.transpose();
                scaled_backward(
                    layer,
                    &d_lambda,
                    &pass.relaxed[k],
                    &d_linear,
                    &mut gradient.layers[k],
                );
                d_lambda = self.relaxation_backward(
                    k,
                    &pass.lambda[k],
                    &d_relaxed,
                    &d_linear,
                    &mut d_lower[k],
                    &mut d_upper[k],
                );
            }
            scaled_backward(
                last,
                &d_lambda,
                &self.spec,
                &d_linear,
                &mut gradient.layers[hidden],
            );
        }

        // Interval propagation backward through the hidden layers: l = layer(c) − |layer|(r),
        // u = layer(c) + |layer|(r), with |layer| a chain's magnitude maps in turn.
        for k in (0..hidden).rev() {
            let mut d_mid = DMatrix::zeros(self.lower[k].nrows(), count);
            let mut d_spread = d_mid.clone();
            for s in 0..count {
                for i in 0..d_mid.nrows() {
                    let (d_high, d_low) = (
                        (d_centre[(i, s)] + d_radius[(i, s)]) * 0.5,
                        (d_centre[(i, s)] - d_radius[(i, s)]) * 0.5,
                    );
                    let dl = d_lower[k][(i, s)]
                        + if self.lower[k][(i, s)] > 0.0 {
                            d_low
                        } else {
                            0.0
                        };
                    let du = d_upper[k][(i, s)]
                        + if self.upper[k][(i, s)] > 0.0 {
                            d_high
                        } else {
                            0.0
                        };
                    d_mid[(i, s)] = dl + du;
                    d_spread[(i, s)] = du - dl;
                }
            }
            let layer = &layers[k];
            let g = &mut gradient.layers[k];
            let d_c = layer.backward(&self.centre[k], &d_mid, g, false);
            let d_r = layer.backward(&self.radius[k], &d_spread, g, true);
            if k > 0 {
                d_centre = d_c;
                d_radius = d_r;
            }
        }
        BlockResult {
            losses,
            worst,
            gradient,
        }
    }
}
