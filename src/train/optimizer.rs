//! First-order optimisers over a [`Network`]'s weights and biases: Adam (Kingma & Ba, 2015) and
//! stochastic gradient descent with (heavy-ball) momentum, both with optional L2 weight decay on the
//! weights (never on the biases), added to the gradient before the update.
//!
//! An optimiser only applies steps it is given; it never computes losses or gradients.

use crate::model::Network;

use super::backprop::zeros_like;

/// Which optimiser to use and its step sizes.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum OptimizerKind {
    /// Adam with the usual bias-corrected moment estimates.
    Adam {
        /// Step size.
        learning_rate: f64,
        /// Decay of the first-moment estimate (usually 0.9).
        beta1: f64,
        /// Decay of the second-moment estimate (usually 0.999).
        beta2: f64,
    },
    /// Plain SGD with momentum `v ← μ v + g`, `θ ← θ − η v`.
    Sgd {
        /// Step size.
        learning_rate: f64,
        /// Momentum coefficient μ in [0, 1).
        momentum: f64,
    },
}

impl OptimizerKind {
    /// Adam with the given step size and the usual β1 = 0.9, β2 = 0.999.
    pub fn adam(learning_rate: f64) -> OptimizerKind {
        OptimizerKind::Adam {
            learning_rate,
            beta1: 0.9,
            beta2: 0.999,
        }
    }

    /// The step size.
    pub fn learning_rate(&self) -> f64 {
        match self {
            OptimizerKind::Adam { learning_rate, .. }
            | OptimizerKind::Sgd { learning_rate, .. } => *learning_rate,
        }
    }
}

/// An optimiser with its running state for one parameter shape.
#[derive(Debug, Clone)]
pub struct Optimizer {
    kind: OptimizerKind,
    weight_decay: f64,
    first: Network,
    second: Network,
    steps: u64,
}

const ADAM_EPSILON: f64 = 1e-8;

impl Optimizer {
    /// A fresh optimiser for parameters shaped like `network`; `weight_decay` ≥ 0 is the L2 coefficient.
    pub fn new(kind: OptimizerKind, weight_decay: f64, network: &Network) -> Optimizer {
        Optimizer {
            kind,
            weight_decay,
            first: zeros_like(network),
            second: zeros_like(network),
            steps: 0,
        }
    }

    /// Applies one step to `parameters` with `gradient` (same shape), scaling the step size by
    /// `rate_factor` (1 for the configured rate).
    pub fn step(&mut self, parameters: &mut Network, gradient: &Network, rate_factor: f64) {
        self.steps += 1;
        let decay = self.weight_decay;
        match self.kind {
            OptimizerKind::Adam {
                learning_rate,
                beta1,
                beta2,
            } => {
                let rate = learning_rate * rate_factor;
                let correction1 = 1.0 - beta1.powi(self.steps.min(i32::MAX as u64) as i32);
                let correction2 = 1.0 - beta2.powi(self.steps.min(i32::MAX as u64) as i32);
                for k in 0..parameters.layers.len() {
                    let slices = parameters.layers[k]
                        .parameters_mut()
                        .into_iter()
                        .zip(gradient.layers[k].parameters())
                        .zip(self.first.layers[k].parameters_mut())
                        .zip(self.second.layers[k].parameters_mut());
                    for (slot, (((p, g), m), v)) in slices.enumerate() {
                        // Even slots are weights (decayed), odd slots biases.
                        let decay = if slot % 2 == 0 { decay } else { 0.0 };
                        for i in 0..p.len() {
                            let gi = g[i] + decay * p[i];
                            m[i] = beta1 * m[i] + (1.0 - beta1) * gi;
                            v[i] = beta2 * v[i] + (1.0 - beta2) * gi * gi;
                            let mh = m[i] / correction1;
                            let vh = v[i] / correction2;
                            p[i] -= rate * mh / (vh.sqrt() + ADAM_EPSILON);
                        }
                    }
                }
            }
            OptimizerKind::Sgd {
                learning_rate,
                momentum,
            } => {
                let rate = learning_rate * rate_factor;
                for k in 0..parameters.layers.len() {
                    let slices = parameters.layers[k]
                        .parameters_mut()
                        .into_iter()
                        .zip(gradient.layers[k].parameters())
                        .zip(self.first.layers[k].parameters_mut());
                    for (slot, ((p, g), v)) in slices.enumerate() {
                        let decay = if slot % 2 == 0 { decay } else { 0.0 };
                        for i in 0..p.len() {
                            let gi = g[i] + decay * p[i];
                            v[i] = momentum * v[i] + gi;
                            p[i] -= rate * v[i];
                        }
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use approx::assert_relative_eq;
    use nalgebra::{DMatrix, DVector};

    fn scalar(w: f64) -> Network {
        Network::from_dense(vec![Dense {
            weights: DMatrix::from_element(1, 1, w),
            bias: DVector::from_element(1, 0.0),
        }])
    }

    #[test]
    fn adam_first_step_has_size_learning_rate() {
        // Kingma & Ba (2015): with bias correction the first step is −η·sign(g) (up to ε).
        let mut p = scalar(1.0);
        let g = scalar(0.37);
        let mut opt = Optimizer::new(OptimizerKind::adam(0.01), 0.0, &p);
        opt.step(&mut p, &g, 1.0);
        assert_relative_eq!(p.layers[0].parameters()[0][0], 0.99, epsilon = 1e-7);
    }

    #[test]
    fn sgd_momentum_minimises_a_quadratic() {
        // f(w) = (w − 3)², gradient 2(w − 3).
        let mut p = scalar(0.0);
        let kind = OptimizerKind::Sgd {
            learning_rate: 0.05,
            momentum: 0.9,
        };
        let mut opt = Optimizer::new(kind, 0.0, &p);
        for _ in 0..500 {
            let g = scalar(2.0 * (p.layers[0].parameters()[0][0] - 3.0));
            opt.step(&mut p, &g, 1.0);
        }
        assert_relative_eq!(p.layers[0].parameters()[0][0], 3.0, epsilon = 1e-6);
    }

    #[test]
    fn weight_decay_shrinks_weights_without_a_loss_gradient() {
        let mut p = scalar(2.0);
        let kind = OptimizerKind::Sgd {
            learning_rate: 0.1,
            momentum: 0.0,
        };
        let mut opt = Optimizer::new(kind, 0.5, &p);
        opt.step(&mut p, &scalar(0.0), 1.0);
        assert_relative_eq!(
            p.layers[0].parameters()[0][0],
            2.0 - 0.1 * 0.5 * 2.0,
            epsilon = 1e-12
        );
    }
}
