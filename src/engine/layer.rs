//! The linear layers the engine runs, behind one small set of batched operations.
//!
//! Every algorithm of the engine (forward pass, gradients, interval and linear bounds, rounding
//! allowances) touches a layer only through [`LinearLayer`]: the map on a batch, its transpose, the
//! map of the entrywise magnitudes, and the interval image of a box — and, for training, the
//! reverse-mode steps of the map and of the interval image with respect to the layer's parameters
//! ([`super::adjoint`]). A new layer kind (a convolution, a pooling average) implements these
//! operations and no algorithm changes. Batches are matrices with one column per sub-problem. All
//! operations are plain floating-point products; the engine accounts for their rounding (see
//! [`super::rounding`]); the reverse-mode steps are exact-arithmetic derivatives with no allowance.

use nalgebra::{DMatrix, DVector};

use crate::model::{Affine, Dense};

/// A possibly inexact affine layer `x ↦ W x + b` as the engine sees it.
pub trait LinearLayer: Send + Sync {
    /// Input size.
    fn input_dim(&self) -> usize;
    /// Output size.
    fn output_dim(&self) -> usize;
    /// The longest dot product the layer evaluates (its fan-in).
    fn fan_in(&self) -> usize;
    /// `W X + b 1ᵀ` (one column per sub-problem).
    fn apply(&self, xs: &DMatrix<f64>) -> DMatrix<f64>;
    /// `Wᵀ A`: pulls output coefficients (one column per sub-problem) back to input coefficients.
    fn transpose_apply(&self, coefficients: &DMatrix<f64>) -> DMatrix<f64>;
    /// `Wᵀ A` where `A` is zero outside `rows`: `coefficients` holds rows `rows` of `A` (in that
    /// order). The default writes `A` out in full and calls [`LinearLayer::transpose_apply`]; a layer
    /// whose product can skip the zero rows overrides it.
    fn transpose_apply_rows(&self, coefficients: &DMatrix<f64>, rows: &[usize]) -> DMatrix<f64> {
        let mut full = DMatrix::zeros(self.output_dim(), coefficients.ncols());
        for (r, &i) in rows.iter().enumerate() {
            full.row_mut(i).copy_from(&coefficients.row(r));
        }
        self.transpose_apply(&full)
    }
    /// For unit objectives `(unit, sign)`: the columns `sign · Wᵀ e_unit` and constants `sign · b_unit`
    /// (what [`LinearLayer::transpose_apply`] and [`LinearLayer::bias_dot`] give on the unit columns,
    /// which the default computes that way; a layer that can select its rows overrides it).
    fn transpose_units(&self, units: &[(usize, f64)]) -> (DMatrix<f64>, DVector<f64>) {
        let mut a = DMatrix::zeros(self.output_dim(), units.len());
        for (j, &(i, sign)) in units.iter().enumerate() {
            a[(i, j)] = sign;
        }
        (self.transpose_apply(&a), self.bias_dot(&a))
    }
    /// [`LinearLayer::apply`] in f32 (weights rounded to f32; for searches that re-check in f64).
    fn apply_single(&self, xs: &DMatrix<f32>) -> DMatrix<f32>;
    /// [`LinearLayer::transpose_apply`] in f32.
    fn transpose_apply_single(&self, coefficients: &DMatrix<f32>) -> DMatrix<f32>;
    /// `bᵀ A`: the constant each column of output coefficients picks up from the bias.
    fn bias_dot(&self, coefficients: &DMatrix<f64>) -> DVector<f64>;
    /// `|W| X + |b| 1ᵀ` for non-negative `X` (magnitudes for error bounds).
    fn magnitude_apply(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64>;
    /// `|W| X` for non-negative `X` (an error carried through the map, no bias).
    fn magnitude_linear(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64>;
    /// The box image `W⁺L + W⁻U + b` and `W⁺U + W⁻L + b` of the boxes `[L, U]` (columns), as computed
    /// (no rounding allowance).
    fn interval(&self, lower: &DMatrix<f64>, upper: &DMatrix<f64>) -> (DMatrix<f64>, DMatrix<f64>);
    /// Adds to `gradient` (this layer's parameters, in the shape of the model layer it was built
    /// from) the derivative of `Σⱼ outerⱼᵀ (W xⱼ + b)` with respect to `W` and `b`. Layers without
    /// trainable parameters (fixed sparse maps) add nothing.
    fn parameter_gradient(&self, xs: &DMatrix<f64>, outer: &DMatrix<f64>, gradient: &mut Affine);
    /// The reverse-mode step of [`LinearLayer::interval`] read in exact arithmetic as the centre
    /// `W c + b` and radius `|W| r` of the box `c ± r`: given the derivatives of a function with
    /// respect to the image's lower and upper ends, adds its derivative with respect to the
    /// parameters to `gradient` (the magnitude contributes `sign(w)` times the plain derivative, the
    /// one-sided 0 at `w = 0`) and returns its derivatives with respect to `lower` and `upper`.
    fn interval_gradient(
        &self,
        boxes: (&DMatrix<f64>, &DMatrix<f64>),
        d_image: (&DMatrix<f64>, &DMatrix<f64>),
        gradient: &mut Affine,
    ) -> (DMatrix<f64>, DMatrix<f64>);
}

/// A box and the derivatives of its interval image, in centre and radius form (see
/// [`LinearLayer::interval_gradient`]).
pub(crate) struct IntervalStep {
    /// `c = (L + U) / 2`.
    pub centre: DMatrix<f64>,
    /// `r = (U − L) / 2`.
    pub radius: DMatrix<f64>,
    /// The derivative with respect to the image's centre (`d_lower + d_upper`).
    pub d_centre: DMatrix<f64>,
    /// The derivative with respect to the image's radius (`d_upper − d_lower`).
    pub d_radius: DMatrix<f64>,
}

impl IntervalStep {
    /// The step for `boxes = (L, U)` and `d_image = (∂/∂lower, ∂/∂upper)` of the image.
    pub(crate) fn new(
        boxes: (&DMatrix<f64>, &DMatrix<f64>),
        d_image: (&DMatrix<f64>, &DMatrix<f64>),
    ) -> IntervalStep {
        IntervalStep {
            centre: (boxes.0 + boxes.1) * 0.5,
            radius: (boxes.1 - boxes.0) * 0.5,
            d_centre: d_image.0 + d_image.1,
            d_radius: d_image.1 - d_image.0,
        }
    }

    /// From the derivatives with respect to the box's centre (`Wᵀ ∂centre`) and radius
    /// (`|W|ᵀ ∂radius`) to those with respect to its lower and upper corners.
    pub(crate) fn corners(
        d_centre: DMatrix<f64>,
        d_radius: DMatrix<f64>,
    ) -> (DMatrix<f64>, DMatrix<f64>) {
        ((&d_centre - &d_radius) * 0.5, (d_centre + d_radius) * 0.5)
    }
}

/// `plain ∘ sign(weights)` (sign 0 at 0, the one-sided choice at the kink of `|w|`): the parameter
/// derivative of a magnitude map from the plain one.
pub(crate) fn signed(plain: DMatrix<f64>, weights: &DMatrix<f64>) -> DMatrix<f64> {
    plain.zip_map(weights, |v, w| {
        if w > 0.0 {
            v
        } else if w < 0.0 {
            -v
        } else {
            0.0
        }
    })
}

/// A dense layer with its transpose and its positive, negative and magnitude parts cached.
#[derive(Debug, Clone)]
pub struct DenseLayer {
    weights: DMatrix<f64>,
    transposed: DMatrix<f64>,
    bias: DVector<f64>,
    positive: DMatrix<f64>,
    negative: DMatrix<f64>,
    magnitude: DMatrix<f64>,
    bias_magnitude: DVector<f64>,
    /// `W`, `Wᵀ` and `b` rounded to f32.
    single: (DMatrix<f32>, DMatrix<f32>, DVector<f32>),
}

impl DenseLayer {
    /// Caches the parts of `dense`.
    pub fn new(dense: &Dense) -> DenseLayer {
        DenseLayer {
            weights: dense.weights.clone(),
            transposed: dense.weights.transpose(),
            bias: dense.bias.clone(),
            positive: dense.weights.map(|w| w.max(0.0)),
            negative: dense.weights.map(|w| w.min(0.0)),
            magnitude: dense.weights.abs(),
            bias_magnitude: dense.bias.abs(),
            single: (
                dense.weights.map(|w| w as f32),
                dense.weights.transpose().map(|w| w as f32),
                dense.bias.map(|b| b as f32),
            ),
        }
    }
}

fn add_bias<T: nalgebra::RealField + Copy>(mut out: DMatrix<T>, bias: &DVector<T>) -> DMatrix<T> {
    for mut column in out.column_iter_mut() {
        column += bias;
    }
    out
}

impl LinearLayer for DenseLayer {
    fn input_dim(&self) -> usize {
        self.weights.ncols()
    }

    fn output_dim(&self) -> usize {
        self.weights.nrows()
    }

    fn fan_in(&self) -> usize {
        self.weights.ncols() + 1
    }

    fn apply(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        add_bias(&self.weights * xs, &self.bias)
    }

    fn transpose_apply(&self, coefficients: &DMatrix<f64>) -> DMatrix<f64> {
        // A product with the cached `Wᵀ` runs through the blocked matrix multiplication like `apply`
        // (nalgebra's `tr_mul` takes one dot product per entry: several times slower on wide layers).
        &self.transposed * coefficients
    }

    fn transpose_apply_rows(&self, coefficients: &DMatrix<f64>, rows: &[usize]) -> DMatrix<f64> {
        self.transposed.select_columns(rows) * coefficients
    }

    fn transpose_units(&self, units: &[(usize, f64)]) -> (DMatrix<f64>, DVector<f64>) {
        let columns = DMatrix::from_fn(self.input_dim(), units.len(), |r, j| {
            units[j].1 * self.transposed[(r, units[j].0)]
        });
        let constants =
            DVector::from_iterator(units.len(), units.iter().map(|&(i, s)| s * self.bias[i]));
        (columns, constants)
    }

    fn apply_single(&self, xs: &DMatrix<f32>) -> DMatrix<f32> {
        add_bias(&self.single.0 * xs, &self.single.2)
    }

    fn transpose_apply_single(&self, coefficients: &DMatrix<f32>) -> DMatrix<f32> {
        &self.single.1 * coefficients
    }

    fn bias_dot(&self, coefficients: &DMatrix<f64>) -> DVector<f64> {
        coefficients.tr_mul(&self.bias)
    }

    fn magnitude_apply(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        add_bias(&self.magnitude * magnitudes, &self.bias_magnitude)
    }

    fn magnitude_linear(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        &self.magnitude * magnitudes
    }

    fn interval(&self, lower: &DMatrix<f64>, upper: &DMatrix<f64>) -> (DMatrix<f64>, DMatrix<f64>) {
        let low = &self.positive * lower + &self.negative * upper;
        let high = &self.positive * upper + &self.negative * lower;
        (add_bias(low, &self.bias), add_bias(high, &self.bias))
    }

    fn parameter_gradient(&self, xs: &DMatrix<f64>, outer: &DMatrix<f64>, gradient: &mut Affine) {
        let Affine::Dense(g) = gradient else {
            panic!("a gradient has the shape of its layer")
        };
        g.weights += outer * xs.transpose();
        g.bias += outer.column_sum();
    }

    fn interval_gradient(
        &self,
        boxes: (&DMatrix<f64>, &DMatrix<f64>),
        d_image: (&DMatrix<f64>, &DMatrix<f64>),
        gradient: &mut Affine,
    ) -> (DMatrix<f64>, DMatrix<f64>) {
        let step = IntervalStep::new(boxes, d_image);
        self.parameter_gradient(&step.centre, &step.d_centre, gradient);
        if let Affine::Dense(g) = gradient {
            g.weights += signed(&step.d_radius * step.radius.transpose(), &self.weights);
        }
        // `|W|ᵀ D` as `(Dᵀ |W|)ᵀ`: a blocked product without caching `|W|ᵀ`.
        let d_radius = (step.d_radius.transpose() * &self.magnitude).transpose();
        IntervalStep::corners(&self.transposed * &step.d_centre, d_radius)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn interval_contains_every_image_of_the_box() {
        let dense = Dense {
            weights: DMatrix::from_row_slice(2, 2, &[1.0, -2.0, 0.5, 3.0]),
            bias: DVector::from_vec(vec![0.1, -0.2]),
        };
        let layer = DenseLayer::new(&dense);
        let lower = DMatrix::from_column_slice(2, 1, &[-1.0, 0.0]);
        let upper = DMatrix::from_column_slice(2, 1, &[1.0, 2.0]);
        let (lo, hi) = layer.interval(&lower, &upper);
        for corner in [[-1.0, 0.0], [-1.0, 2.0], [1.0, 0.0], [1.0, 2.0]] {
            let y = layer.apply(&DMatrix::from_column_slice(2, 1, &corner));
            for i in 0..2 {
                assert!(lo[i] <= y[i] && y[i] <= hi[i]);
            }
        }
        // transpose: (Wᵀ a)ᵀ x = aᵀ (W x)
        let a = DMatrix::from_column_slice(2, 1, &[2.0, -1.0]);
        let x = DMatrix::from_column_slice(2, 1, &[0.3, 0.7]);
        let left = (layer.transpose_apply(&a).transpose() * &x)[0];
        let right = (a.transpose() * (&dense.weights * &x))[0];
        assert!((left - right).abs() < 1e-12);
    }

    /// Skipping zero rows and selecting rows are the plain products without exact-zero terms.
    #[test]
    fn row_products_equal_the_full_products() {
        let (n, m, c) = (7, 5, 4);
        let dense = Dense {
            weights: DMatrix::from_fn(n, m, |i, j| ((i * 5 + j * 3) % 7) as f64 / 3.0 - 1.0),
            bias: DVector::from_fn(n, |i, _| i as f64 / 10.0 - 0.3),
        };
        let layer = DenseLayer::new(&dense);
        let rows = [1, 2, 5];
        let mut a = DMatrix::zeros(n, c);
        for &i in &rows {
            for j in 0..c {
                a[(i, j)] = (i as f64 + 1.0) * (j as f64 - 1.5);
            }
        }
        let full = layer.transpose_apply(&a);
        let skipped = layer.transpose_apply_rows(&a.select_rows(&rows), &rows);
        assert!((full - skipped).abs().max() <= 1e-12);
        let units = [(3, 1.0), (3, -1.0), (0, 1.0)];
        let (columns, constants) = layer.transpose_units(&units);
        for (j, &(i, s)) in units.iter().enumerate() {
            for r in 0..m {
                assert_eq!(columns[(r, j)], s * dense.weights[(i, r)]);
            }
            assert_eq!(constants[j], s * dense.bias[i]);
        }
    }
}
