//! Exact input gradients of classification margins, by backpropagation through the canonical
//! [`Network`].
//!
//! The margin of a sample with label `y` against class `t` is `z_y(x) − z_t(x)` (the logit difference
//! of Carlini & Wagner, 2017); it is negative exactly when `t` beats `y`. Its gradient is computed by the
//! chain rule through every affine map and ReLU mask, never by finite differences. At a ReLU input of
//! exactly 0 the derivative taken is 0 (a valid one-sided choice; the margin is piecewise linear, so
//! the gradient is exact everywhere else). Nothing here decides whether a point is a counterexample:
//! that is [`super::counterexample::validate`]'s job, with a plain forward pass.

use crate::model::Network;

/// Reusable buffers for margins and their gradients on one network (one per thread; no allocation
/// per call).
#[derive(Debug, Clone)]
pub struct MarginGradient<'a> {
    network: &'a Network,
    /// `transposed[k]` holds the weights of `layers[k]` row by row (column-major `Wᵀ`), so the backward
    /// pass is a sum of contiguous rows that skips inactive units.
    transposed: Vec<Vec<f64>>,
    /// `outputs[k]` is the output of `layers[k]`, after the ReLU for hidden layers.
    outputs: Vec<Vec<f64>>,
    /// Backward buffers: `backward[k]` holds the gradient with respect to the input of `layers[k]`.
    backward: Vec<Vec<f64>>,
}

impl<'a> MarginGradient<'a> {
    /// Buffers sized for `network`.
    pub fn new(network: &'a Network) -> MarginGradient<'a> {
        let outputs = network
            .layers
            .iter()
            .map(|l| vec![0.0; l.output_dim()])
            .collect();
        let backward = network
            .layers
            .iter()
            .map(|l| vec![0.0; l.input_dim()])
            .collect();
        let transposed = network
            .layers
            .iter()
            .map(|l| l.weights.transpose().as_slice().to_vec())
            .collect();
        MarginGradient {
            network,
            transposed,
            outputs,
            backward,
        }
    }

    /// The network these buffers belong to.
    pub fn network(&self) -> &'a Network {
        self.network
    }

    /// Runs the forward pass at `x` (keeping the activations for a following gradient call) and returns
    /// the logits.
    ///
    /// # Panics
    /// If `x.len()` differs from the network's input size.
    pub fn logits(&mut self, x: &[f64]) -> &[f64] {
        assert_eq!(x.len(), self.network.input_dim(), "input size");
        let last = self.network.layers.len() - 1;
        for k in 0..=last {
            let layer = &self.network.layers[k];
            let rows = layer.output_dim();
            let weights = layer.weights.as_slice(); // column-major: column j is weights[j*rows..]
            let (before, rest) = self.outputs.split_at_mut(k);
            let out = &mut rest[0];
            out.copy_from_slice(layer.bias.as_slice());
            let input: &[f64] = if k == 0 { x } else { &before[k - 1] };
            for (j, &value) in input.iter().enumerate() {
                if value != 0.0 {
                    let column = &weights[j * rows..(j + 1) * rows];
                    for (o, w) in out.iter_mut().zip(column) {
                        *o += value * w;
                    }
                }
            }
            if k < last {
                for o in out.iter_mut() {
                    *o = o.max(0.0);
                }
            }
        }
        &self.outputs[last]
    }

    /// Gradient of `z_label − z_target` at the point of the last [`MarginGradient::logits`] call,
    /// written into `gradient` (input size). Returns the margin at that point.
    ///
    /// # Panics
    /// If `label` or `target` is not a logit index or `gradient` has the wrong size.
    pub fn gradient_at_last(&mut self, label: usize, target: usize, gradient: &mut [f64]) -> f64 {
        let layers = &self.network.layers;
        let last = layers.len() - 1;
        let logits = &self.outputs[last];
        let margin = logits[label] - logits[target];
        assert_eq!(gradient.len(), self.network.input_dim(), "gradient size");
        // Gradient with respect to the input of the last layer: row `label` minus row `target`.
        {
            let layer = &layers[last];
            let rows = layer.output_dim();
            let weights = layer.weights.as_slice();
            let into = if last == 0 {
                &mut *gradient
            } else {
                &mut self.backward[last][..]
            };
            for (j, g) in into.iter_mut().enumerate() {
                *g = weights[j * rows + label] - weights[j * rows + target];
            }
        }
        for k in (0..last).rev() {
            let columns = layers[k].input_dim();
            let rows_major = &self.transposed[k]; // row i of W is rows_major[i*columns..]
            let (lower, upper) = self.backward.split_at_mut(k + 1);
            let upstream = &upper[0];
            let into = if k == 0 {
                &mut *gradient
            } else {
                &mut lower[k][..]
            };
            into.fill(0.0);
            // ReLU mask: the output of layers[k] is positive exactly where the unit is active; inactive
            // units pass no gradient.
            for (i, (&u, &h)) in upstream.iter().zip(&self.outputs[k]).enumerate() {
                if h > 0.0 && u != 0.0 {
                    let row = &rows_major[i * columns..(i + 1) * columns];
                    for (g, w) in into.iter_mut().zip(row) {
                        *g += u * w;
                    }
                }
            }
        }
        margin
    }

    /// Margin `z_label − z_target` at `x` and its gradient (written into `gradient`).
    pub fn margin_and_gradient(
        &mut self,
        x: &[f64],
        label: usize,
        target: usize,
        gradient: &mut [f64],
    ) -> f64 {
        self.logits(x);
        self.gradient_at_last(label, target, gradient)
    }
}

/// Margin `z_label − z_target` of `network` at `x` and its exact gradient with respect to `x`
/// (convenience form that allocates; use [`MarginGradient`] in loops).
///
/// # Panics
/// If `x.len()` differs from the network's input size or `label` / `target` is not a logit index.
pub fn margin_and_gradient(
    network: &Network,
    x: &[f64],
    label: usize,
    target: usize,
) -> (f64, Vec<f64>) {
    let mut buffers = MarginGradient::new(network);
    let mut gradient = vec![0.0; network.input_dim()];
    let margin = buffers.margin_and_gradient(x, label, target, &mut gradient);
    (margin, gradient)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use nalgebra::{DMatrix, DVector};

    fn small_network() -> Network {
        Network::new(vec![
            Dense {
                weights: DMatrix::from_row_slice(3, 2, &[1.0, -2.0, 0.5, 0.25, -1.0, 1.5]),
                bias: DVector::from_vec(vec![0.1, -0.2, 0.3]),
            },
            Dense {
                weights: DMatrix::from_row_slice(2, 3, &[1.0, 2.0, -1.0, -0.5, 1.0, 0.75]),
                bias: DVector::from_vec(vec![0.0, 0.05]),
            },
        ])
    }

    #[test]
    fn logits_agree_with_plain_forward() {
        let network = small_network();
        let mut buffers = MarginGradient::new(&network);
        for x in [[0.3, -0.7], [1.0, 2.0], [-1.5, 0.2]] {
            let fast = buffers.logits(&x).to_vec();
            let plain = network.forward(&x);
            for (a, b) in fast.iter().zip(plain.iter()) {
                approx::assert_abs_diff_eq!(*a, *b, epsilon = 1e-12);
            }
        }
    }

    #[test]
    fn gradient_matches_central_differences_away_from_kinks() {
        // Finite differences are used here only to check the backpropagated gradient.
        let network = small_network();
        let x = [0.3, -0.7];
        let (margin, gradient) = margin_and_gradient(&network, &x, 0, 1);
        let logits = network.forward(&x);
        approx::assert_abs_diff_eq!(margin, logits[0] - logits[1], epsilon = 1e-12);
        let h = 1e-6;
        for i in 0..2 {
            let mut up = x;
            let mut down = x;
            up[i] += h;
            down[i] -= h;
            let fu = network.forward(&up);
            let fd = network.forward(&down);
            let numeric = ((fu[0] - fu[1]) - (fd[0] - fd[1])) / (2.0 * h);
            approx::assert_abs_diff_eq!(gradient[i], numeric, epsilon = 1e-6);
        }
    }
}
