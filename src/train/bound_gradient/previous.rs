//! The certified loss as training computed it before it ran on the engine (its own backward linear
//! relaxation and reverse-mode pass), kept only to check the engine-based loss against it.

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;

use crate::bound::interval::{batch_margin_lower_bounds, BatchIntervalBounds};
use crate::model::{Affine, Network};
use crate::threat::Region;

use super::{from_classifier_gradient, CertifiedBatch};
use crate::train::backprop::{add_scaled, zeros_like};
use crate::train::TrainError;

mod relaxation;

const BLOCK: usize = 16;

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

#[cfg(test)]
mod tests {
    use nalgebra::{DMatrix, DVector};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    use crate::model::{Affine, Conv, ConvShape, Network, Sparse};
    use crate::threat::{Budget, Norm, Region};
    use crate::train::he_network;

    /// A network with a 1-D convolution (2 channels × 6 → 3 channels × 6) chained with a fixed
    /// sparse scale, then dense layers.
    fn conv_network(seed: u64) -> Network {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let shape = ConvShape {
            in_channels: 2,
            in_height: 1,
            in_width: 6,
            out_channels: 3,
            kernel_height: 1,
            kernel_width: 3,
            stride: (1, 1),
            padding: (0, 1, 0, 1),
            dilation: (1, 1),
        };
        let kernel = DMatrix::from_fn(3, shape.patch_len(), |_, _| rng.gen_range(-0.8..0.8));
        let bias = DVector::from_fn(3, |_, _| rng.gen_range(-0.2..0.2));
        let conv = Conv::new(shape, kernel, bias);
        let scale = DVector::from_fn(18, |_, _| rng.gen_range(0.5..1.5));
        let shift = DVector::from_fn(18, |_, _| rng.gen_range(-0.1..0.1));
        let chain = Affine::Chain(vec![
            Affine::Conv(conv),
            Affine::Sparse(Sparse::diagonal(&scale, shift)),
        ]);
        let mut layers = vec![chain];
        layers.extend(he_network(18, &[7], 3, seed + 1).layers);
        Network::new(layers)
    }

    fn regions(dim: usize, norm: Norm, count: usize, seed: u64) -> Vec<Region> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let budget = Budget::uniform(norm, 0.15, dim);
        (0..count)
            .map(|_| {
                let c: Vec<f64> = (0..dim).map(|_| rng.gen_range(-0.8..0.8)).collect();
                budget.region(&c, &vec![-1.0; dim], &vec![1.0; dim])
            })
            .collect()
    }

    fn close(a: f64, b: f64, relative: f64) -> bool {
        (a - b).abs() <= relative * a.abs().max(b.abs()) + 1e-300
    }

    // The engine-based loss must be the loss training computed before (same relaxation, same boxes):
    // values to 1e-12 relative (they differ only by the rounding allowance the engine subtracts from
    // the linear bounds and its nudged intercepts), gradients to 1e-9 relative to their size.
    #[test]
    fn engine_loss_equals_the_previous_formula_on_random_networks() {
        let mut cases: Vec<(Network, usize)> = (1..=4)
            .map(|depth| {
                let hidden: Vec<usize> = (1..depth).map(|k| 4 + 2 * k).collect();
                (he_network(5, &hidden, 4, 40 + depth as u64), 5)
            })
            .collect();
        cases.push((conv_network(50), 12));
        for (c, (network, dim)) in cases.iter().enumerate() {
            let classes = network.output_dim();
            for norm in [Norm::Linf, Norm::L2] {
                let regions = regions(*dim, norm, 21, 60 + c as u64);
                let labels: Vec<usize> = (0..21).map(|s| s % classes).collect();
                let targets: Vec<Vec<usize>> = labels
                    .iter()
                    .map(|&y| (0..classes).filter(|j| *j != y).collect())
                    .collect();
                let weights: Vec<f64> = (0..21).map(|s| 0.5 + 0.1 * s as f64).collect();
                for beta in [0.0, 0.5, 1.0] {
                    let args = (&regions, &labels, &targets, &weights);
                    let new = super::super::certified_cross_entropy(
                        network, args.0, args.1, args.2, args.3, beta,
                    )
                    .expect("bounds");
                    let old = super::certified_cross_entropy(
                        network, args.0, args.1, args.2, args.3, beta,
                    )
                    .expect("bounds");
                    assert!(
                        close(new.loss, old.loss, 1e-12),
                        "{} vs {}",
                        new.loss,
                        old.loss
                    );
                    for (a, b) in new.sample_losses.iter().zip(&old.sample_losses) {
                        assert!(close(*a, *b, 1e-12), "case {c} β {beta}: {a} vs {b}");
                    }
                    let flat = |n: &Network| -> Vec<f64> {
                        n.layers
                            .iter()
                            .flat_map(|l| l.parameters().concat())
                            .collect()
                    };
                    let (g_new, g_old) = (flat(&new.gradient), flat(&old.gradient));
                    let size = g_old.iter().map(|v| v.abs()).fold(0.0, f64::max);
                    assert!(size > 1e-6);
                    for (a, b) in g_new.iter().zip(&g_old) {
                        assert!(
                            (a - b).abs() <= 1e-9 * size,
                            "case {c} β {beta}: {a} vs {b}"
                        );
                    }
                }
            }
        }
    }
}
