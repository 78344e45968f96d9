//! Batched forward passes and input gradients of linear functions of the logits (one column per
//! input), the primitives of attacks and training, in f64 or (for searches that re-check what they
//! find) f32.
//!
//! The derivative of a ReLU at an input of exactly 0 is taken as 0 (a valid one-sided choice; the
//! network is piecewise linear, so the gradient is exact everywhere else). These are plain
//! floating-point evaluations: nothing here is a bound, and nothing here decides a counterexample.

use nalgebra::{DMatrix, RealField};

use super::{Engine, LinearLayer};

/// A floating-point format the forward pass and the input gradient run in (`f64`, or `f32` for
/// searches whose findings are re-checked in f64).
pub trait Precision: RealField + Copy {
    /// `W X + b 1ᵀ` of `layer` in this format.
    fn apply(layer: &dyn LinearLayer, xs: &DMatrix<Self>) -> DMatrix<Self>;
    /// `Wᵀ A` of `layer` in this format.
    fn transpose_apply(layer: &dyn LinearLayer, coefficients: &DMatrix<Self>) -> DMatrix<Self>;
}

impl Precision for f64 {
    fn apply(layer: &dyn LinearLayer, xs: &DMatrix<f64>) -> DMatrix<f64> {
        layer.apply(xs)
    }

    fn transpose_apply(layer: &dyn LinearLayer, coefficients: &DMatrix<f64>) -> DMatrix<f64> {
        layer.transpose_apply(coefficients)
    }
}

impl Precision for f32 {
    fn apply(layer: &dyn LinearLayer, xs: &DMatrix<f32>) -> DMatrix<f32> {
        layer.apply_single(xs)
    }

    fn transpose_apply(layer: &dyn LinearLayer, coefficients: &DMatrix<f32>) -> DMatrix<f32> {
        layer.transpose_apply_single(coefficients)
    }
}

/// Every layer's output for a batch: `pre[k]` is the output of layer `k` before its ReLU (the last is
/// the logits).
#[derive(Debug, Clone)]
pub struct Activations<T: Precision = f64> {
    /// Outputs per layer (units × inputs).
    pub pre: Vec<DMatrix<T>>,
}

impl<T: Precision> Activations<T> {
    /// The logits (classes × inputs).
    pub fn logits(&self) -> &DMatrix<T> {
        self.pre.last().expect("at least one layer")
    }
}

impl Engine {
    /// The forward pass of a batch (one column per input).
    pub fn forward<T: Precision>(&self, inputs: &DMatrix<T>) -> Activations<T> {
        let mut pre = Vec::with_capacity(self.depth());
        let mut h = T::apply(self.layer(0), inputs);
        for k in 1..self.depth() {
            let relu = h.map(|v| v.max(T::zero()));
            pre.push(h);
            h = T::apply(self.layer(k), &relu);
        }
        pre.push(h);
        Activations { pre }
    }

    /// The gradient with respect to the input of `Σ_c coefficients[c, j] · logit_c` for every column
    /// `j`, at the points of `activations`.
    pub fn input_gradient<T: Precision>(
        &self,
        activations: &Activations<T>,
        coefficients: &DMatrix<T>,
    ) -> DMatrix<T> {
        let mut g = coefficients.clone();
        for k in (0..self.depth()).rev() {
            g = T::transpose_apply(self.layer(k), &g);
            if k == 0 {
                break;
            }
            g.zip_apply(&activations.pre[k - 1], |v, z| {
                if z <= T::zero() {
                    *v = T::zero()
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
        Network::from_dense(vec![
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
        let single = engine.input_gradient(
            &engine.forward(&xs.map(|v| v as f32)),
            &coefficients.map(|v| v as f32),
        );
        for i in 0..2 {
            assert!((single[(i, 0)] as f64 - g[(i, 0)]).abs() < 1e-5);
        }
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
