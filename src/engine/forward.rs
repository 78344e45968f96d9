//! Batched forward passes and input gradients of linear functions of the logits (one column per
//! input), the primitives of attacks and training.
//!
//! The derivative of a ReLU at an input of exactly 0 is taken as 0 (a valid one-sided choice; the
//! network is piecewise linear, so the gradient is exact everywhere else). These are plain f64
//! evaluations: nothing here is a bound, and nothing here decides a counterexample.

use nalgebra::DMatrix;

use super::Engine;

/// Every layer's output for a batch: `pre[k]` is the output of layer `k` before its ReLU (the last is
/// the logits).
#[derive(Debug, Clone)]
pub struct Activations {
    /// Outputs per layer (units × inputs).
    pub pre: Vec<DMatrix<f64>>,
}

impl Activations {
    /// The logits (classes × inputs).
    pub fn logits(&self) -> &DMatrix<f64> {
        self.pre.last().expect("at least one layer")
    }
}

impl Engine {
    /// The forward pass of a batch (one column per input).
    pub fn forward(&self, inputs: &DMatrix<f64>) -> Activations {
        let mut pre = Vec::with_capacity(self.depth());
        let mut h = self.layer(0).apply(inputs);
        for k in 1..self.depth() {
            let relu = h.map(|v| v.max(0.0));
            pre.push(h);
            h = self.layer(k).apply(&relu);
        }
        pre.push(h);
        Activations { pre }
    }

    /// The gradient with respect to the input of `Σ_c coefficients[c, j] · logit_c` for every column
    /// `j`, at the points of `activations`.
    pub fn input_gradient(
        &self,
        activations: &Activations,
        coefficients: &DMatrix<f64>,
    ) -> DMatrix<f64> {
        let mut g = coefficients.clone();
        for k in (0..self.depth()).rev() {
            g = self.layer(k).transpose_apply(&g);
            if k == 0 {
                break;
            }
            g.zip_apply(&activations.pre[k - 1], |v, z| {
                if z <= 0.0 {
                    *v = 0.0
                }
            });
        }
        g
    }
}

#[cfg(test)]
mod tests {
    use nalgebra::DVector;

    use super::*;
    use crate::model::{Dense, Network};

    fn network() -> Network {
        Network::new(vec![
            Dense {
                weights: DMatrix::from_row_slice(3, 2, &[1.0, -1.0, 0.5, 2.0, -1.5, 0.3]),
                bias: DVector::from_vec(vec![0.1, -0.2, 0.05]),
            },
            Dense {
                weights: DMatrix::from_row_slice(2, 3, &[1.0, 0.5, -1.0, -0.3, 1.2, 0.7]),
                bias: DVector::from_vec(vec![0.0, 0.1]),
            },
        ])
    }

    #[test]
    fn batched_forward_equals_the_plain_one_bit_for_bit() {
        let net = network();
        let engine = Engine::new(&net);
        let xs = DMatrix::from_column_slice(2, 3, &[0.2, 0.4, -1.0, 0.5, 3.0, -2.0]);
        let out = engine.forward(&xs);
        for j in 0..3 {
            let plain = net.forward(&[xs[(0, j)], xs[(1, j)]]);
            for c in 0..2 {
                assert_eq!(out.logits()[(c, j)], plain[c]);
            }
        }
    }

    #[test]
    fn gradient_matches_central_differences() {
        // Finite differences are an outside check of the chain rule (common practice).
        let net = network();
        let engine = Engine::new(&net);
        let x = [0.3, -0.2];
        let xs = DMatrix::from_column_slice(2, 1, &x);
        let act = engine.forward(&xs);
        let coefficients = DMatrix::from_column_slice(2, 1, &[1.0, -1.0]);
        let g = engine.input_gradient(&act, &coefficients);
        let margin = |p: &[f64]| {
            let z = net.forward(p);
            z[0] - z[1]
        };
        for i in 0..2 {
            let mut a = x;
            let mut b = x;
            a[i] += 1e-6;
            b[i] -= 1e-6;
            let fd = (margin(&a) - margin(&b)) / 2e-6;
            assert!((fd - g[(i, 0)]).abs() < 1e-6);
        }
    }
}
