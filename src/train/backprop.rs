//! Exact backpropagation through a canonical [`Network`] for a batch (one column per sample), and the
//! softmax cross-entropy loss on its logits.
//!
//! Gradients are kept in a [`Network`] of the same shape as the parameters (`weights` and `bias` of
//! each affine map hold ∂loss/∂weights and ∂loss/∂bias). The derivative of ReLU at exactly 0 is taken
//! as 0 (a valid subgradient). Nothing here changes parameters; see [`super::optimizer`] for that.

use nalgebra::DMatrix;

use crate::model::{Affine, Network};

/// A network of the same shape as `network`, all zeros (used to accumulate gradients).
pub fn zeros_like(network: &Network) -> Network {
    Network::new(network.layers.iter().map(Affine::zeros_like).collect())
}

/// `target += factor · addend`, parameter by parameter (shapes must agree).
pub fn add_scaled(target: &mut Network, addend: &Network, factor: f64) {
    for (t, a) in target.layers.iter_mut().zip(&addend.layers) {
        for (t, a) in t.parameters_mut().into_iter().zip(a.parameters()) {
            for (x, y) in t.iter_mut().zip(a) {
                *x += factor * y;
            }
        }
    }
}

/// The values a forward pass keeps for the backward pass.
#[derive(Debug, Clone)]
pub struct ForwardCache {
    /// `inputs[k]` is what `layers[k]` was applied to (the batch itself for `k = 0`).
    pub inputs: Vec<DMatrix<f64>>,
    /// `pre_activations[k]` is the output of `layers[k]` before any ReLU; the last one is the logits.
    pub pre_activations: Vec<DMatrix<f64>>,
}

impl ForwardCache {
    /// The network's outputs (logits), one column per sample.
    pub fn logits(&self) -> &DMatrix<f64> {
        self.pre_activations
            .last()
            .expect("a network has at least one layer")
    }
}

/// Forward pass over a batch, keeping every layer's input and pre-activation.
pub fn forward(network: &Network, batch: &DMatrix<f64>) -> ForwardCache {
    let count = network.layers.len();
    let mut inputs = Vec::with_capacity(count);
    let mut pre_activations = Vec::with_capacity(count);
    let mut h = batch.clone();
    for (k, layer) in network.layers.iter().enumerate() {
        let z = layer.apply_batch(&h);
        inputs.push(h);
        h = if k + 1 < count {
            z.map(|v| v.max(0.0))
        } else {
            DMatrix::zeros(0, 0)
        };
        pre_activations.push(z);
    }
    ForwardCache {
        inputs,
        pre_activations,
    }
}

/// Backward pass: given ∂loss/∂logits (`output_gradient`, one column per sample), the gradient of the
/// loss with respect to every weight and bias.
pub fn backward(
    network: &Network,
    cache: &ForwardCache,
    output_gradient: &DMatrix<f64>,
) -> Network {
    backward_with_input(network, cache, output_gradient, false).0
}

/// Backward pass that also returns ∂loss/∂input (one column per sample) when `want_input` is true.
pub fn backward_with_input(
    network: &Network,
    cache: &ForwardCache,
    output_gradient: &DMatrix<f64>,
    want_input: bool,
) -> (Network, Option<DMatrix<f64>>) {
    let mut gradient = zeros_like(network);
    let mut dz = output_gradient.clone();
    let mut input_gradient = None;
    for k in (0..network.layers.len()).rev() {
        let layer = &network.layers[k];
        let mut dh = layer.backward(&cache.inputs[k], &dz, &mut gradient.layers[k]);
        if k > 0 || want_input {
            if k > 0 {
                dh.zip_apply(&cache.pre_activations[k - 1], |g, z| {
                    if z <= 0.0 {
                        *g = 0.0;
                    }
                });
                dz = dh;
            } else {
                input_gradient = Some(dh);
            }
        }
    }
    (gradient, input_gradient)
}

/// Logits with at least two rows: a 1-row output `z` (a binary model) becomes `[0, z]`, as in
/// [`Network::as_classifier`]; otherwise the logits unchanged.
pub fn classifier_logits(raw: &DMatrix<f64>) -> DMatrix<f64> {
    if raw.nrows() != 1 {
        return raw.clone();
    }
    let mut out = DMatrix::zeros(2, raw.ncols());
    out.row_mut(1).copy_from(&raw.row(0));
    out
}

/// Maps a gradient with respect to [`classifier_logits`] back to the raw logits.
pub fn raw_logit_gradient(raw_rows: usize, classifier_gradient: DMatrix<f64>) -> DMatrix<f64> {
    if raw_rows != 1 {
        return classifier_gradient;
    }
    classifier_gradient.rows(1, 1).into_owned()
}

/// Mean softmax cross-entropy of `logits` (classes × samples, at least two rows) against `labels`,
/// with its gradient with respect to the logits. Uses the log-sum-exp shift, so large logits are safe.
pub fn softmax_cross_entropy(logits: &DMatrix<f64>, labels: &[usize]) -> (f64, DMatrix<f64>) {
    softmax_cross_entropy_weighted(logits, labels, None)
}

/// Like [`softmax_cross_entropy`] but each sample's term is multiplied by `weights[i]` (the mean is
/// still over the number of samples). Used for per-class constraint terms.
pub fn softmax_cross_entropy_weighted(
    logits: &DMatrix<f64>,
    labels: &[usize],
    weights: Option<&[f64]>,
) -> (f64, DMatrix<f64>) {
    let samples = logits.ncols();
    let mut gradient = DMatrix::zeros(logits.nrows(), samples);
    if samples == 0 {
        return (0.0, gradient);
    }
    let mut total = 0.0;
    for i in 0..samples {
        let w = weights.map(|w| w[i]).unwrap_or(1.0);
        let column = logits.column(i);
        let (value, g) = cross_entropy_one(column.as_slice(), labels[i]);
        total += w * value;
        for (r, gr) in g.iter().enumerate() {
            gradient[(r, i)] = w * gr / samples as f64;
        }
    }
    (total / samples as f64, gradient)
}

/// Cross-entropy `−log softmax(z)_label` of one logit vector and its gradient `softmax(z) − e_label`.
pub fn cross_entropy_one(logits: &[f64], label: usize) -> (f64, Vec<f64>) {
    let max = logits.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let exps: Vec<f64> = logits.iter().map(|z| (z - max).exp()).collect();
    let sum: f64 = exps.iter().sum();
    let value = sum.ln() + max - logits[label];
    let mut gradient: Vec<f64> = exps.iter().map(|e| e / sum).collect();
    gradient[label] -= 1.0;
    (value, gradient)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use approx::assert_relative_eq;
    use nalgebra::DVector;

    fn small_network() -> Network {
        let w1 = DMatrix::from_row_slice(3, 2, &[0.5, -0.3, 0.8, 0.2, -0.6, 0.9]);
        let b1 = DVector::from_vec(vec![0.1, -0.2, 0.05]);
        let w2 = DMatrix::from_row_slice(2, 3, &[0.3, -0.7, 0.4, 0.6, 0.1, -0.5]);
        let b2 = DVector::from_vec(vec![0.0, 0.2]);
        Network::from_dense(vec![
            Dense {
                weights: w1,
                bias: b1,
            },
            Dense {
                weights: w2,
                bias: b2,
            },
        ])
    }

    #[test]
    fn forward_matches_network_forward() {
        let net = small_network();
        let batch = DMatrix::from_column_slice(2, 2, &[0.3, -0.4, 1.0, 0.7]);
        let cache = forward(&net, &batch);
        let direct = net.forward_batch(&batch);
        for (a, b) in cache.logits().iter().zip(direct.iter()) {
            assert_relative_eq!(*a, *b, epsilon = 1e-12);
        }
    }

    #[test]
    fn cross_entropy_gradient_sums_to_zero_and_matches_definition() {
        let (value, g) = cross_entropy_one(&[1.0, 2.0, 0.5], 1);
        // definition: −log(e² / (e¹ + e² + e^0.5))
        let expected = -(2.0f64.exp() / (1.0f64.exp() + 2.0f64.exp() + 0.5f64.exp())).ln();
        assert_relative_eq!(value, expected, epsilon = 1e-12);
        assert_relative_eq!(g.iter().sum::<f64>(), 0.0, epsilon = 1e-12);
        assert!(g[1] < 0.0 && g[0] > 0.0);
    }

    #[test]
    fn input_gradient_matches_finite_differences() {
        let net = small_network();
        let x = DMatrix::from_column_slice(2, 1, &[0.3, -0.4]);
        let loss =
            |x: &DMatrix<f64>| softmax_cross_entropy(&forward(&net, x).logits().clone(), &[1]).0;
        let cache = forward(&net, &x);
        let (_, dl) = softmax_cross_entropy(cache.logits(), &[1]);
        let (_, dx) = backward_with_input(&net, &cache, &dl, true);
        let dx = dx.expect("input gradient requested");
        for i in 0..2 {
            let h = 1e-6;
            let mut plus = x.clone();
            plus[i] += h;
            let mut minus = x.clone();
            minus[i] -= h;
            let numeric = (loss(&plus) - loss(&minus)) / (2.0 * h);
            assert_relative_eq!(dx[i], numeric, epsilon = 1e-7);
        }
    }
}
