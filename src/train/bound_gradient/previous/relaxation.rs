//! The backward linear relaxation of the certified loss (CROWN-style bounds on interval boxes, Zhang
//! et al., 2020) and its reverse-mode step: the coefficient matrices of every hidden layer, one column
//! per (sample, forbidden class) pair, and the derivative through each ReLU's relaxation, including
//! the dependence of the upper slope `s = u / (u − l)` on the interval bounds.
//!
//! Guarantee: for every pair, the margin it computes is a lower bound on the margin over the region's
//! bounding box for the real-number network, given sound interval bounds of the hidden layers (the
//! relaxation `α z ≤ relu(z) ≤ s (z − l)` holds on `[l, u]`). It changes no parameter.

use nalgebra::{DMatrix, DVector};

use super::Block;

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

/// What the backward linear relaxation keeps for its gradient (one column per pair).
pub(super) struct LinearPass {
    /// `lambda[k]`: coefficients on hidden layer `k`'s pre-activations, before relaxation.
    pub(super) lambda: Vec<DMatrix<f64>>,
    /// `relaxed[k]`: the same after relaxation (coefficients on its ReLU outputs).
    pub(super) relaxed: Vec<DMatrix<f64>>,
    /// Coefficients on the input.
    pub(super) input: DMatrix<f64>,
    /// The linear margin bound per pair.
    pub(super) margins: Vec<f64>,
}

impl Block<'_> {
    /// The backward linear relaxation from `start` (the spec pulled back through the last layer),
    /// keeping every coefficient matrix the gradient needs.
    pub(super) fn linear_pass(&self, start: &DMatrix<f64>) -> LinearPass {
        let layers = &self.network.layers;
        let hidden = layers.len() - 1;
        let mut lambda_in = vec![DMatrix::zeros(0, 0); hidden];
        let mut relaxed_all = vec![DMatrix::zeros(0, 0); hidden];
        let mut lambda = start.clone();
        let mut constant = layers[hidden].bias_dot(&self.spec);
        for k in (0..hidden).rev() {
            let mut relaxed = lambda.clone();
            for (p, &s) in self.owner.iter().enumerate() {
                for i in 0..lambda.nrows() {
                    let v = lambda[(i, p)];
                    relaxed[(i, p)] = match relax(self.lower[k][(i, s)], self.upper[k][(i, s)]) {
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
                                constant[p] += v * (-slope * lower);
                                slope * v
                            }
                        }
                    };
                }
            }
            let next = layers[k].transpose_apply(&relaxed);
            constant += layers[k].bias_dot(&relaxed);
            lambda_in[k] = lambda;
            relaxed_all[k] = relaxed;
            lambda = next;
        }
        let margins = (0..self.owner.len())
            .map(|p| {
                let s = self.owner[p];
                let mut value = constant[p];
                for i in 0..lambda.nrows() {
                    let v = lambda[(i, p)];
                    value += v * self.centre[0][(i, s)] - v.abs() * self.radius[0][(i, s)];
                }
                value
            })
            .collect();
        LinearPass {
            lambda: lambda_in,
            relaxed: relaxed_all,
            input: lambda,
            margins,
        }
    }

    /// Reverse step through the relaxation of hidden layer `k`: from `∂/∂R` (`d_relaxed`) and the
    /// constant's derivative to `∂/∂Λ` (returned), adding the slope's dependence on the bounds into
    /// `d_lower`, `d_upper`.
    pub(super) fn relaxation_backward(
        &self,
        k: usize,
        lambda: &DMatrix<f64>,
        d_relaxed: &DMatrix<f64>,
        d_constant: &DVector<f64>,
        d_lower: &mut DMatrix<f64>,
        d_upper: &mut DMatrix<f64>,
    ) -> DMatrix<f64> {
        let mut d_input = DMatrix::zeros(lambda.nrows(), lambda.ncols());
        for (p, &s) in self.owner.iter().enumerate() {
            for i in 0..lambda.nrows() {
                match relax(self.lower[k][(i, s)], self.upper[k][(i, s)]) {
                    Relaxed::Zero => {}
                    Relaxed::Identity => d_input[(i, p)] = d_relaxed[(i, p)],
                    Relaxed::Unstable {
                        alpha,
                        slope,
                        lower,
                        upper,
                    } => {
                        let v = lambda[(i, p)];
                        if v >= 0.0 {
                            d_input[(i, p)] = alpha * d_relaxed[(i, p)];
                        } else {
                            // relaxed = s·v, constant += −s·l·v (product = s·l).
                            d_input[(i, p)] =
                                slope * d_relaxed[(i, p)] - d_constant[p] * slope * lower;
                            let d_slope = d_relaxed[(i, p)] * v;
                            let d_product = -d_constant[p] * v;
                            let gap = upper - lower;
                            let ds_du = -lower / (gap * gap);
                            let ds_dl = upper / (gap * gap);
                            let dp_dl = slope + lower * ds_dl;
                            let dp_du = lower * ds_du;
                            d_lower[(i, s)] += d_slope * ds_dl + d_product * dp_dl;
                            d_upper[(i, s)] += d_slope * ds_du + d_product * dp_du;
                        }
                    }
                }
            }
        }
        d_input
    }
}
