//! Reverse-mode derivatives of the engine's bounds, for training: from what a forward bound
//! computation recorded — the interval bounds of every hidden layer and their ReLU relaxations
//! ([`super::intermediate::compute`] with
//! [`Tightness::Interval`](super::intermediate::Tightness)), and for a backward pass run with
//! [`Keep::Everything`] its coefficients on every hidden layer and its minimisers — the derivative of `Σⱼ d_boundⱼ · boundⱼ` with respect to every layer's parameters
//! and to the interval bounds feeding the relaxations (the dependence of the upper slope
//! `s = u / (u − l)` and intercept `−s·l` on `l`, `u`), then carried back through the interval
//! propagation itself.
//!
//! Guarantee: these are the exact reverse-mode derivatives of the bounds read in exact arithmetic,
//! taken through each layer's own operations ([`LinearLayer::parameter_gradient`],
//! [`LinearLayer::interval_gradient`]), so convolutions, sparse maps and chains need nothing here.
//! Left out on purpose: the rounding allowance and fold error the bounds subtract, and the tiny nudge
//! of each upper intercept — they move a bound by a relative amount near the unit roundoff, and
//! training does not need them in its gradient. At the measure-zero kinks (a bound, a coefficient or
//! a weight exactly 0) one-sided derivatives are taken. Covered: the adaptive lower slopes without
//! split multipliers ([`Choices::default`](super::backward::Choices)) on domains without splits; the
//! minimisation over the input set contributes its minimiser (Danskin's theorem). Nothing here is a
//! bound or changes one.

use nalgebra::{DMatrix, DVector};

use super::backward::{Backward, Keep, Objectives};
use super::intermediate::{HiddenBounds, Relaxation};
use super::{Domains, Engine, LinearLayer};
use crate::model::{Affine, Network};

/// Derivatives being accumulated for one batch of domains.
#[derive(Debug, Clone)]
pub struct Adjoint {
    /// Per layer, the derivative with respect to its parameters (the model layer's shape).
    pub parameters: Vec<Affine>,
    /// Per hidden layer, the derivative with respect to its lower bounds (units × domains).
    pub lower: Vec<DMatrix<f64>>,
    /// Per hidden layer, the derivative with respect to its upper bounds (units × domains).
    pub upper: Vec<DMatrix<f64>>,
}

impl Adjoint {
    /// Zero derivatives for the engine built from `network` (in classifier form) and the bounds
    /// `hidden` it computed.
    pub fn new(network: &Network, hidden: &HiddenBounds) -> Adjoint {
        let zeros = |m: &DMatrix<f64>| DMatrix::zeros(m.nrows(), m.ncols());
        Adjoint {
            parameters: network.layers.iter().map(Affine::zeros_like).collect(),
            lower: hidden.lower.iter().map(zeros).collect(),
            upper: hidden.upper.iter().map(zeros).collect(),
        }
    }

    /// Adds the derivative of `Σⱼ d_bound[j] · bound[j]` for the bounds
    /// [`super::backward::over_last_box`] returns for `objectives`.
    pub fn over_last_box(
        &mut self,
        engine: &Engine,
        hidden: &HiddenBounds,
        domains: &Domains,
        objectives: &Objectives,
        d_bound: &[f64],
    ) {
        let top = objectives.top;
        let layer = engine.layer(top);
        let g = layer.transpose_apply(&objectives.coefficients);
        let mut d_g = DMatrix::zeros(g.nrows(), g.ncols());
        for (j, &d) in objectives.domain.iter().enumerate() {
            for i in 0..g.nrows() {
                let (lo, hi) = hidden.box_entry(domains, top, i, d);
                // The minimising corner (the centre at a zero coefficient, one-sided).
                let w = g[(i, j)];
                d_g[(i, j)] = d_bound[j] * corner(w, lo, hi);
                if top > 0 {
                    let (l, u) = (hidden.lower[top - 1][(i, d)], hidden.upper[top - 1][(i, d)]);
                    if w > 0.0 && l > 0.0 {
                        self.lower[top - 1][(i, d)] += d_bound[j] * w;
                    } else if w < 0.0 && u > 0.0 {
                        self.upper[top - 1][(i, d)] += d_bound[j] * w;
                    }
                }
            }
        }
        let scales = DVector::from_column_slice(d_bound);
        transposed_step(
            layer,
            &objectives.coefficients,
            &d_g,
            &scales,
            &mut self.parameters[top],
        );
    }

    /// Adds the derivative of `Σⱼ d_bound[j] · pass.lower[j]` for the pass
    /// `backward::run(engine, hidden, domains, objectives, Choices::default(), Keep::Everything)`.
    pub fn backward(
        &mut self,
        engine: &Engine,
        hidden: &HiddenBounds,
        objectives: &Objectives,
        pass: &Backward,
        d_bound: &[f64],
    ) {
        let top = objectives.top;
        let domain = &objectives.domain;
        debug_assert_eq!(
            pass.on_hidden.len(),
            top,
            "a pass kept with {:?}",
            Keep::Everything
        );
        let scales = DVector::from_column_slice(d_bound);
        // The minimum of gᵀx over the input set moves with g as its minimiser does (Danskin).
        let mut d_g = pass.minimiser.clone();
        for (j, mut column) in d_g.column_iter_mut().enumerate() {
            column *= d_bound[j];
        }
        for k in 0..top {
            // Layer k sent R (coefficients on its output) to g = Wᵀ R and the constant bᵀ R.
            let layer = engine.layer(k);
            let relaxed = relaxed(&hidden.relax[k], &pass.on_hidden[k], domain);
            let d_relaxed = scaled_apply(layer, &d_g, &scales);
            transposed_step(layer, &relaxed, &d_g, &scales, &mut self.parameters[k]);
            d_g = self.relaxation_step(k, hidden, &pass.on_hidden[k], &d_relaxed, d_bound, domain);
        }
        transposed_step(
            engine.layer(top),
            &objectives.coefficients,
            &d_g,
            &scales,
            &mut self.parameters[top],
        );
    }

    /// The reverse step through hidden layer `k`'s relaxation: from the derivative with respect to
    /// the relaxed coefficients `R` (on the pre-activations) and the constant, to the derivative with
    /// respect to the coefficients on the ReLU outputs (returned), adding the bounds' part.
    fn relaxation_step(
        &mut self,
        k: usize,
        hidden: &HiddenBounds,
        on_hidden: &DMatrix<f64>,
        d_relaxed: &DMatrix<f64>,
        d_constant: &[f64],
        domain: &[usize],
    ) -> DMatrix<f64> {
        let relax = &hidden.relax[k];
        let mut d_in = DMatrix::zeros(on_hidden.nrows(), on_hidden.ncols());
        for (j, &d) in domain.iter().enumerate() {
            for i in 0..on_hidden.nrows() {
                let (v, dr) = (on_hidden[(i, j)], d_relaxed[(i, j)]);
                if v >= 0.0 || relax.upper_intercept[(i, d)] <= 0.0 {
                    // The lower line, or a stable unit (both lines alike): R = slope · v.
                    d_in[(i, j)] = relax.lower_slope[(i, d)] * dr;
                    continue;
                }
                // The upper line of an unstable unit: R = s·v, constant += −s·l·v.
                let (l, u) = (hidden.lower[k][(i, d)], hidden.upper[k][(i, d)]);
                let s = relax.upper_slope[(i, d)];
                d_in[(i, j)] = s * dr - d_constant[j] * s * l;
                let (d_slope, d_product) = (dr * v, -d_constant[j] * v);
                let gap = u - l;
                let (ds_dl, ds_du) = (u / (gap * gap), -l / (gap * gap));
                self.lower[k][(i, d)] += d_slope * ds_dl + d_product * (s + l * ds_dl);
                self.upper[k][(i, d)] += d_slope * ds_du + d_product * l * ds_du;
            }
        }
        d_in
    }

    /// Carries the bound derivatives back through the interval propagation (through each ReLU of the
    /// boxes and each layer's interval image) and returns the parameter derivatives.
    pub fn through_intervals(
        mut self,
        engine: &Engine,
        hidden: &HiddenBounds,
        domains: &Domains,
    ) -> Vec<Affine> {
        for k in (0..hidden.lower.len()).rev() {
            let (box_lower, box_upper) = if k == 0 {
                (domains.lower.clone(), domains.upper.clone())
            } else {
                let relu = |m: &DMatrix<f64>| m.map(|v| v.max(0.0));
                (relu(&hidden.lower[k - 1]), relu(&hidden.upper[k - 1]))
            };
            let (d_lower, d_upper) = engine.layer(k).interval_gradient(
                (&box_lower, &box_upper),
                (&self.lower[k], &self.upper[k]),
                &mut self.parameters[k],
            );
            if k > 0 {
                let active = |d: f64, bound: f64| if bound > 0.0 { d } else { 0.0 };
                self.lower[k - 1] += d_lower.zip_map(&hidden.lower[k - 1], active);
                self.upper[k - 1] += d_upper.zip_map(&hidden.upper[k - 1], active);
            }
        }
        self.parameters
    }
}

/// The corner of `[lo, hi]` minimising `w·x` (the centre when `w = 0`).
fn corner(w: f64, lo: f64, hi: f64) -> f64 {
    if w > 0.0 {
        lo
    } else if w < 0.0 {
        hi
    } else {
        (lo + hi) * 0.5
    }
}

/// The coefficients on the pre-activations the backward pass made of `on_hidden` (coefficients on
/// the ReLU outputs), with the adaptive lower slopes.
fn relaxed(relax: &Relaxation, on_hidden: &DMatrix<f64>, domain: &[usize]) -> DMatrix<f64> {
    DMatrix::from_fn(on_hidden.nrows(), on_hidden.ncols(), |i, j| {
        let v = on_hidden[(i, j)];
        let slope = if v >= 0.0 {
            &relax.lower_slope
        } else {
            &relax.upper_slope
        };
        v * slope[(i, domain[j])]
    })
}

/// `W X + β sᵀ` with `β` the layer's whole bias (`layer(0)`; a chain's biases carried through its
/// later parts).
fn scaled_apply(layer: &dyn LinearLayer, xs: &DMatrix<f64>, scales: &DVector<f64>) -> DMatrix<f64> {
    let beta = layer.apply(&DMatrix::zeros(layer.input_dim(), 1));
    let mut out = layer.apply(xs);
    for (j, mut column) in out.column_iter_mut().enumerate() {
        column.axpy(scales[j] - 1.0, &beta.column(0), 1.0);
    }
    out
}

/// Adds the parameter derivative of the backward step that sent output coefficients `outer` to
/// input coefficients `Wᵀ A` and the constant `βᵀ A`, given their derivatives `xs` and `scales`:
/// the derivative of `Σⱼ outerⱼᵀ (W xⱼ + sⱼ β)`, as `Σⱼ outerⱼᵀ layer(xⱼ)` plus
/// `(Σⱼ (sⱼ − 1) outerⱼ)ᵀ layer(0)`.
fn transposed_step(
    layer: &dyn LinearLayer,
    outer: &DMatrix<f64>,
    xs: &DMatrix<f64>,
    scales: &DVector<f64>,
    gradient: &mut Affine,
) {
    layer.parameter_gradient(xs, outer, gradient);
    let correction = outer * scales.map(|s| s - 1.0);
    if correction.iter().any(|v| *v != 0.0) {
        let zero = DMatrix::zeros(layer.input_dim(), 1);
        let correction = DMatrix::from_column_slice(correction.len(), 1, correction.as_slice());
        layer.parameter_gradient(&zero, &correction, gradient);
    }
}
