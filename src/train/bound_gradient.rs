//! The certified training loss and its exact gradient: cross-entropy on worst-case logits built from
//! sound margin lower bounds, by interval bound propagation (Gowal et al., 2018) or a mix of interval
//! and linear-relaxation bounds (Zhang et al., 2020: interval bounds for the hidden layers,
//! a backward linear relaxation for the margins, `β · linear + (1 − β) · interval`).
//!
//! For a sample with label `y`, forbidden classes `j` and margin lower bounds `b_j ≤ z_y − z_j` over the
//! region, the loss is `log(1 + Σ_j exp(−b_j))`, i.e. cross-entropy of the logit vector `(0, −b_j …)` at
//! the label's position; it is small only when every `b_j` is large. The forward interval values come
//! from [`crate::bound::interval::batch_margin_lower_bounds`] (so training and certification use the
//! same interval propagation). The backward linear pass is recomputed here because its gradient needs
//! every intermediate coefficient matrix, which `bound/` does not expose; it uses the same relaxation
//! (upper line `s (z − l)`, `s = u / (u − l)`, adaptive lower slope `α ∈ {0, 1}`) and minimises over the
//! region's bounding box. The gradient is hand-derived reverse-mode differentiation through both
//! passes, including the dependence of `s` on the interval bounds `l`, `u`; at the measure-zero set of
//! kinks (a bound exactly 0, a weight exactly 0) one-sided derivatives are taken.
//!
//! These bounds steer training only. Whether a model is certified is decided afterwards by `bound/`
//! and `certify/`; nothing here reports a sample as certified.

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;

use crate::bound::interval::batch_margin_lower_bounds;
use crate::model::{Affine, Dense, Network};
use crate::threat::Region;

use super::backprop::zeros_like;
use super::TrainError;

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
    let hidden = classifier.layers.len() - 1;
    // The relaxation below reads the layers in dense form; the gradient is pulled back to each
    // layer's own parameters at the end (`Affine::pull_back`).
    let dense: Vec<Dense> = classifier.layers.iter().map(Affine::to_dense).collect();
    let dense_zero = || -> Vec<Dense> {
        dense
            .iter()
            .map(|d| Dense {
                weights: DMatrix::zeros(d.output_dim(), d.input_dim()),
                bias: DVector::zeros(d.output_dim()),
            })
            .collect()
    };
    let scale = 1.0 / samples.max(1) as f64;
    let results: Vec<(f64, f64, Vec<Dense>)> = (0..samples)
        .into_par_iter()
        .map(|s| {
            let lower: Vec<DVector<f64>> = (0..hidden)
                .map(|k| interval.lower[k].column(s).into_owned())
                .collect();
            let upper: Vec<DVector<f64>> = (0..hidden)
                .map(|k| interval.upper[k].column(s).into_owned())
                .collect();
            let mut gradient = dense_zero();
            let sample = SampleBounds {
                network: &dense,
                lower: &lower,
                upper: &upper,
                input_lower: &regions[s].outer_lower,
                input_upper: &regions[s].outer_upper,
                label: labels[s],
                targets: &targets[s],
                interval_margins: &interval.margins[s],
            };
            let (loss, worst) =
                sample.loss_and_gradient(linear_weight, weights[s] * scale, &mut gradient);
            (loss, worst, gradient)
        })
        .collect();
    let mut sum = dense_zero();
    let mut loss = 0.0;
    let mut sample_losses = Vec::with_capacity(samples);
    let mut worst_margins = Vec::with_capacity(samples);
    for (s, (l, w, g)) in results.into_iter().enumerate() {
        for (t, a) in sum.iter_mut().zip(&g) {
            t.weights += &a.weights;
            t.bias += &a.bias;
        }
        loss += weights[s] * scale * l;
        sample_losses.push(l);
        worst_margins.push(w);
    }
    let mut total = zeros_like(&classifier);
    for (k, layer) in classifier.layers.iter().enumerate() {
        layer.pull_back(&sum[k], &mut total.layers[k]);
    }
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

/// How a hidden unit is relaxed, from its interval bounds.
#[derive(Debug, Clone, Copy)]
enum Relaxed {
    Zero,
    Identity,
    /// `α z ≤ h ≤ s (z − l)`.
    Unstable {
        alpha: f64,
        slope: f64,
        lower: f64,
        upper: f64,
    },
}

fn relax(l: f64, u: f64) -> Relaxed {
    if u <= 0.0 {
        Relaxed::Zero
    } else if l >= 0.0 {
        Relaxed::Identity
    } else {
        Relaxed::Unstable {
            alpha: if u >= -l { 1.0 } else { 0.0 },
            slope: u / (u - l),
            lower: l,
            upper: u,
        }
    }
}

/// One sample's interval values and what the loss needs.
struct SampleBounds<'a> {
    network: &'a [Dense],
    lower: &'a [DVector<f64>],
    upper: &'a [DVector<f64>],
    input_lower: &'a [f64],
    input_upper: &'a [f64],
    label: usize,
    targets: &'a [usize],
    interval_margins: &'a [f64],
}

impl SampleBounds<'_> {
    /// Adds `factor · ∂loss/∂θ` into `gradient` (classifier form) and returns `(loss, worst margin)`.
    fn loss_and_gradient(&self, beta: f64, factor: f64, gradient: &mut [Dense]) -> (f64, f64) {
        let m = self.targets.len();
        if m == 0 {
            return (0.0, f64::INFINITY);
        }
        let net = self.network;
        let hidden = net.len() - 1;
        let beta = if hidden == 0 { 0.0 } else { beta };
        let y = self.label;
        // Boxes: index 0 = input, index k + 1 = after hidden layer k.
        let mut centre = Vec::with_capacity(hidden + 1);
        let mut radius = Vec::with_capacity(hidden + 1);
        let lo = DVector::from_column_slice(self.input_lower);
        let hi = DVector::from_column_slice(self.input_upper);
        centre.push((&lo + &hi) * 0.5);
        radius.push((&hi - &lo) * 0.5);
        for k in 0..hidden {
            let hl = self.lower[k].map(|v| v.max(0.0));
            let hu = self.upper[k].map(|v| v.max(0.0));
            centre.push((&hu + &hl) * 0.5);
            radius.push((&hu - &hl) * 0.5);
        }
        let last = &net[hidden];
        // Spec rows e_y − e_j folded into the last layer.
        let spec_weights = DMatrix::from_fn(m, last.input_dim(), |t, c| {
            last.weights[(y, c)] - last.weights[(self.targets[t], c)]
        });
        let spec_bias = DVector::from_fn(m, |t, _| last.bias[y] - last.bias[self.targets[t]]);

        // Linear relaxation pass (forward), keeping what the backward pass needs.
        let mut relaxations: Vec<Vec<Relaxed>> = vec![Vec::new(); hidden];
        let mut lambda_in: Vec<DMatrix<f64>> = vec![DMatrix::zeros(0, 0); hidden];
        let mut lambda_relaxed: Vec<DMatrix<f64>> = vec![DMatrix::zeros(0, 0); hidden];
        let mut linear_margins = DVector::zeros(m);
        let mut lambda_input = DMatrix::zeros(0, 0);
        if beta > 0.0 {
            let mut lambda = spec_weights.clone();
            let mut constant = spec_bias.clone();
            for k in (0..hidden).rev() {
                let units: Vec<Relaxed> = (0..self.lower[k].len())
                    .map(|i| relax(self.lower[k][i], self.upper[k][i]))
                    .collect();
                let mut relaxed = lambda.clone();
                for (i, unit) in units.iter().enumerate() {
                    for r in 0..m {
                        let v = lambda[(r, i)];
                        relaxed[(r, i)] = match *unit {
                            Relaxed::Zero => 0.0,
                            Relaxed::Identity => v,
                            Relaxed::Unstable {
                                alpha,
                                slope,
                                lower,
                                ..
                            } => {
                                if v >= 0.0 {
                                    alpha * v
                                } else {
                                    constant[r] += v * (-slope * lower);
                                    slope * v
                                }
                            }
                        };
                    }
                }
                let layer = &net[k];
                let next = &relaxed * &layer.weights;
                constant += &relaxed * &layer.bias;
                relaxations[k] = units;
                lambda_in[k] = lambda;
                lambda_relaxed[k] = relaxed;
                lambda = next;
            }
            let magnitude = lambda.abs();
            linear_margins = constant + &lambda * &centre[0] - magnitude * &radius[0];
            lambda_input = lambda;
        }

        // Mixed bound and the loss log(1 + Σ exp(−b_t)).
        let bounds: Vec<f64> = (0..m)
            .map(|t| beta * linear_margins[t] + (1.0 - beta) * self.interval_margins[t])
            .collect();
        let worst = bounds.iter().copied().fold(f64::INFINITY, f64::min);
        let shift = bounds.iter().map(|b| -b).fold(0.0f64, f64::max);
        let sum: f64 = (-shift).exp() + bounds.iter().map(|b| (-b - shift).exp()).sum::<f64>();
        let loss = shift + sum.ln();
        let d_bound: Vec<f64> = bounds
            .iter()
            .map(|b| -factor * (-b - shift).exp() / sum)
            .collect();

        let mut d_lower: Vec<DVector<f64>> =
            self.lower.iter().map(|v| DVector::zeros(v.len())).collect();
        let mut d_upper: Vec<DVector<f64>> = d_lower.clone();
        let width = last.input_dim();
        let mut d_centre = DVector::zeros(width);
        let mut d_radius = DVector::zeros(width);

        // Interval margin backward: b_t = a_t · c − |a_t| · r + bias_t.
        let interval_factor = 1.0 - beta;
        if interval_factor > 0.0 {
            let last_gradient = &mut gradient[hidden];
            for t in 0..m {
                let d = interval_factor * d_bound[t];
                let j = self.targets[t];
                for c in 0..width {
                    let a = spec_weights[(t, c)];
                    let g = centre[hidden][c] - sign(a) * radius[hidden][c];
                    last_gradient.weights[(y, c)] += d * g;
                    last_gradient.weights[(j, c)] -= d * g;
                    d_centre[c] += d * a;
                    d_radius[c] -= d * a.abs();
                }
                last_gradient.bias[y] += d;
                last_gradient.bias[j] -= d;
            }
        }

        // Linear relaxation backward.
        if beta > 0.0 {
            let d_linear = DVector::from_fn(m, |t, _| beta * d_bound[t]);
            let mut d_lambda = DMatrix::from_fn(m, lambda_input.ncols(), |r, c| {
                d_linear[r] * (centre[0][c] - sign(lambda_input[(r, c)]) * radius[0][c])
            });
            let d_constant = d_linear;
            for k in 0..hidden {
                let layer = &net[k];
                let relaxed = &lambda_relaxed[k];
                let d_relaxed =
                    &d_lambda * layer.weights.transpose() + &d_constant * layer.bias.transpose();
                gradient[k].weights += relaxed.transpose() * &d_lambda;
                gradient[k].bias += relaxed.transpose() * &d_constant;
                let input = &lambda_in[k];
                let mut d_input = DMatrix::zeros(m, input.ncols());
                for (i, unit) in relaxations[k].iter().enumerate() {
                    match *unit {
                        Relaxed::Zero => {}
                        Relaxed::Identity => {
                            for r in 0..m {
                                d_input[(r, i)] = d_relaxed[(r, i)];
                            }
                        }
                        Relaxed::Unstable {
                            alpha,
                            slope,
                            lower,
                            upper,
                        } => {
                            let mut d_slope = 0.0;
                            let mut d_product = 0.0; // product = slope · lower
                            for r in 0..m {
                                let v = input[(r, i)];
                                if v >= 0.0 {
                                    d_input[(r, i)] = alpha * d_relaxed[(r, i)];
                                } else {
                                    d_input[(r, i)] =
                                        slope * d_relaxed[(r, i)] - d_constant[r] * slope * lower;
                                    d_slope += d_relaxed[(r, i)] * v;
                                    d_product -= d_constant[r] * v;
                                }
                            }
                            let gap = upper - lower;
                            let ds_du = -lower / (gap * gap);
                            let ds_dl = upper / (gap * gap);
                            let dp_dl = slope + lower * ds_dl;
                            let dp_du = lower * ds_du;
                            d_lower[k][i] += d_slope * ds_dl + d_product * dp_dl;
                            d_upper[k][i] += d_slope * ds_du + d_product * dp_du;
                        }
                    }
                }
                d_lambda = d_input;
            }
            // The start of the pass: Λ = C W_last, constant = C b_last.
            let last_gradient = &mut gradient[hidden];
            for t in 0..m {
                let j = self.targets[t];
                for c in 0..width {
                    last_gradient.weights[(y, c)] += d_lambda[(t, c)];
                    last_gradient.weights[(j, c)] -= d_lambda[(t, c)];
                }
                last_gradient.bias[y] += d_constant[t];
                last_gradient.bias[j] -= d_constant[t];
            }
        }

        // Interval propagation backward through the hidden layers.
        for k in (0..hidden).rev() {
            let d_high = (&d_centre + &d_radius) * 0.5;
            let d_low = (&d_centre - &d_radius) * 0.5;
            let n = self.lower[k].len();
            let mut d_mid = DVector::zeros(n);
            let mut d_spread = DVector::zeros(n);
            for i in 0..n {
                let dl = d_lower[k][i]
                    + if self.lower[k][i] > 0.0 {
                        d_low[i]
                    } else {
                        0.0
                    };
                let du = d_upper[k][i]
                    + if self.upper[k][i] > 0.0 {
                        d_high[i]
                    } else {
                        0.0
                    };
                d_mid[i] = dl + du;
                d_spread[i] = du - dl;
            }
            let layer = &net[k];
            let g = &mut gradient[k];
            for c in 0..layer.input_dim() {
                for i in 0..n {
                    g.weights[(i, c)] += d_mid[i] * centre[k][c]
                        + d_spread[i] * radius[k][c] * sign(layer.weights[(i, c)]);
                }
            }
            g.bias += &d_mid;
            if k > 0 {
                d_centre = layer.weights.transpose() * &d_mid;
                d_radius = layer.weights.abs().transpose() * &d_spread;
            }
        }
        (loss, worst)
    }
}
