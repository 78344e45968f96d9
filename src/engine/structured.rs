//! The engine's structured layer kinds: convolutions (never written out as dense matrices), fixed
//! sparse maps, and chains of layers applied in turn.
//!
//! Guarantee: each kind implements [`LinearLayer`] with the meaning stated there. A chain's interval
//! image is the parts' images in turn (a superset of the exact image), its magnitude map the parts'
//! magnitude maps in turn, and its fan-in the sum of its parts' (see [`crate::model::Affine::fan_in`]),
//! so the rounding allowances of the engine stay sound for it. A chain's reverse-mode steps run
//! through its parts' steps in turn (a sparse part has no parameters and passes derivatives on).

use nalgebra::{DMatrix, DVector};

use super::layer::{signed, DenseLayer, IntervalStep, LinearLayer};
use crate::model::affine::add_bias;
use crate::model::{Affine, Conv, Sparse};

/// The engine layer for any linear map of the model.
pub fn build(affine: &Affine) -> Box<dyn LinearLayer> {
    match affine {
        Affine::Dense(d) => Box::new(DenseLayer::new(d)),
        Affine::Conv(c) => Box::new(ConvLayer::new(c)),
        Affine::Sparse(s) => Box::new(SparseLayer(s.clone())),
        Affine::Chain(parts) => Box::new(ChainLayer(parts.iter().map(build).collect())),
    }
}

/// A convolution with its kernel's positive, negative and magnitude parts and f32 copies cached.
pub struct ConvLayer {
    conv: Conv,
    bias: DVector<f64>,
    positive: DMatrix<f64>,
    negative: DMatrix<f64>,
    magnitude: DMatrix<f64>,
    bias_magnitude: DVector<f64>,
    transposed: DMatrix<f64>,
    single: (DMatrix<f32>, DMatrix<f32>, DVector<f32>),
}

impl ConvLayer {
    /// Caches the parts of `conv`.
    pub fn new(conv: &Conv) -> ConvLayer {
        let bias = conv.bias_per_output(&conv.bias);
        ConvLayer {
            positive: conv.kernel.map(|w| w.max(0.0)),
            negative: conv.kernel.map(|w| w.min(0.0)),
            magnitude: conv.kernel.abs(),
            bias_magnitude: bias.abs(),
            transposed: conv.kernel.transpose(),
            single: (
                conv.kernel.map(|w| w as f32),
                conv.kernel.transpose().map(|w| w as f32),
                bias.map(|b| b as f32),
            ),
            bias,
            conv: conv.clone(),
        }
    }
}

impl LinearLayer for ConvLayer {
    fn input_dim(&self) -> usize {
        self.conv.shape.input_dim()
    }

    fn output_dim(&self) -> usize {
        self.conv.shape.output_dim()
    }

    fn fan_in(&self) -> usize {
        self.conv.shape.patch_len() + 1
    }

    fn apply(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        add_bias(self.conv.correlate(&self.conv.kernel, xs), &self.bias)
    }

    fn transpose_apply(&self, coefficients: &DMatrix<f64>) -> DMatrix<f64> {
        self.conv
            .correlate_transpose(&self.transposed, coefficients)
    }

    fn apply_single(&self, xs: &DMatrix<f32>) -> DMatrix<f32> {
        add_bias(self.conv.correlate(&self.single.0, xs), &self.single.2)
    }

    fn transpose_apply_single(&self, coefficients: &DMatrix<f32>) -> DMatrix<f32> {
        self.conv.correlate_transpose(&self.single.1, coefficients)
    }

    fn bias_dot(&self, coefficients: &DMatrix<f64>) -> DVector<f64> {
        coefficients.tr_mul(&self.bias)
    }

    fn magnitude_apply(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        add_bias(
            self.conv.correlate(&self.magnitude, magnitudes),
            &self.bias_magnitude,
        )
    }

    fn magnitude_linear(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        self.conv.correlate(&self.magnitude, magnitudes)
    }

    fn interval(&self, lower: &DMatrix<f64>, upper: &DMatrix<f64>) -> (DMatrix<f64>, DMatrix<f64>) {
        let c = &self.conv;
        let low = c.correlate(&self.positive, lower) + c.correlate(&self.negative, upper);
        let high = c.correlate(&self.positive, upper) + c.correlate(&self.negative, lower);
        (add_bias(low, &self.bias), add_bias(high, &self.bias))
    }

    fn parameter_gradient(&self, xs: &DMatrix<f64>, outer: &DMatrix<f64>, gradient: &mut Affine) {
        let Affine::Conv(g) = gradient else {
            panic!("a gradient has the shape of its layer")
        };
        g.kernel += self.conv.kernel_gradient(outer, xs);
        g.bias += self.conv.bias_gradient(outer);
    }

    fn interval_gradient(
        &self,
        boxes: (&DMatrix<f64>, &DMatrix<f64>),
        d_image: (&DMatrix<f64>, &DMatrix<f64>),
        gradient: &mut Affine,
    ) -> (DMatrix<f64>, DMatrix<f64>) {
        let step = IntervalStep::new(boxes, d_image);
        self.parameter_gradient(&step.centre, &step.d_centre, gradient);
        let c = &self.conv;
        if let Affine::Conv(g) = gradient {
            g.kernel += signed(c.kernel_gradient(&step.d_radius, &step.radius), &c.kernel);
        }
        IntervalStep::corners(
            c.correlate_transpose(&self.transposed, &step.d_centre),
            c.correlate_transpose(&self.magnitude.transpose(), &step.d_radius),
        )
    }
}

/// A fixed sparse map.
pub struct SparseLayer(Sparse);

impl LinearLayer for SparseLayer {
    fn input_dim(&self) -> usize {
        self.0.inputs
    }

    fn output_dim(&self) -> usize {
        self.0.output_dim()
    }

    fn fan_in(&self) -> usize {
        self.0.fan_in()
    }

    fn apply(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        self.0.apply(xs)
    }

    fn transpose_apply(&self, coefficients: &DMatrix<f64>) -> DMatrix<f64> {
        self.0.transpose_apply_with(coefficients, |w| w)
    }

    fn apply_single(&self, xs: &DMatrix<f32>) -> DMatrix<f32> {
        add_bias(
            self.0.apply_with(xs, |w| w as f32),
            &self.0.bias.map(|b| b as f32),
        )
    }

    fn transpose_apply_single(&self, coefficients: &DMatrix<f32>) -> DMatrix<f32> {
        self.0.transpose_apply_with(coefficients, |w| w as f32)
    }

    fn bias_dot(&self, coefficients: &DMatrix<f64>) -> DVector<f64> {
        coefficients.tr_mul(&self.0.bias)
    }

    fn magnitude_apply(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        add_bias(self.0.apply_with(magnitudes, f64::abs), &self.0.bias.abs())
    }

    fn magnitude_linear(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        self.0.apply_with(magnitudes, f64::abs)
    }

    fn interval(&self, lower: &DMatrix<f64>, upper: &DMatrix<f64>) -> (DMatrix<f64>, DMatrix<f64>) {
        let low =
            self.0.apply_with(lower, |w| w.max(0.0)) + self.0.apply_with(upper, |w| w.min(0.0));
        let high =
            self.0.apply_with(upper, |w| w.max(0.0)) + self.0.apply_with(lower, |w| w.min(0.0));
        (add_bias(low, &self.0.bias), add_bias(high, &self.0.bias))
    }

    fn parameter_gradient(&self, _: &DMatrix<f64>, _: &DMatrix<f64>, _: &mut Affine) {}

    fn interval_gradient(
        &self,
        boxes: (&DMatrix<f64>, &DMatrix<f64>),
        d_image: (&DMatrix<f64>, &DMatrix<f64>),
        _: &mut Affine,
    ) -> (DMatrix<f64>, DMatrix<f64>) {
        let step = IntervalStep::new(boxes, d_image);
        IntervalStep::corners(
            self.0.transpose_apply_with(&step.d_centre, |w| w),
            self.0.transpose_apply_with(&step.d_radius, f64::abs),
        )
    }
}

/// Layers applied in turn, with no ReLU between them.
pub struct ChainLayer(Vec<Box<dyn LinearLayer>>);

impl LinearLayer for ChainLayer {
    fn input_dim(&self) -> usize {
        self.0[0].input_dim()
    }

    fn output_dim(&self) -> usize {
        self.0[self.0.len() - 1].output_dim()
    }

    fn fan_in(&self) -> usize {
        self.0.iter().map(|l| l.fan_in()).sum()
    }

    fn apply(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        self.0.iter().fold(xs.clone(), |h, l| l.apply(&h))
    }

    fn transpose_apply(&self, coefficients: &DMatrix<f64>) -> DMatrix<f64> {
        self.0
            .iter()
            .rev()
            .fold(coefficients.clone(), |a, l| l.transpose_apply(&a))
    }

    fn apply_single(&self, xs: &DMatrix<f32>) -> DMatrix<f32> {
        self.0.iter().fold(xs.clone(), |h, l| l.apply_single(&h))
    }

    fn transpose_apply_single(&self, coefficients: &DMatrix<f32>) -> DMatrix<f32> {
        self.0
            .iter()
            .rev()
            .fold(coefficients.clone(), |a, l| l.transpose_apply_single(&a))
    }

    fn bias_dot(&self, coefficients: &DMatrix<f64>) -> DVector<f64> {
        let mut a = coefficients.clone();
        let mut total = DVector::zeros(coefficients.ncols());
        for layer in self.0.iter().rev() {
            total += layer.bias_dot(&a);
            a = layer.transpose_apply(&a);
        }
        total
    }

    fn magnitude_apply(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        self.0
            .iter()
            .fold(magnitudes.clone(), |h, l| l.magnitude_apply(&h))
    }

    fn magnitude_linear(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        self.0
            .iter()
            .fold(magnitudes.clone(), |h, l| l.magnitude_linear(&h))
    }

    fn interval(&self, lower: &DMatrix<f64>, upper: &DMatrix<f64>) -> (DMatrix<f64>, DMatrix<f64>) {
        self.0
            .iter()
            .fold((lower.clone(), upper.clone()), |(lo, hi), l| {
                l.interval(&lo, &hi)
            })
    }

    fn parameter_gradient(&self, xs: &DMatrix<f64>, outer: &DMatrix<f64>, gradient: &mut Affine) {
        let Affine::Chain(grads) = gradient else {
            panic!("a gradient has the shape of its layer")
        };
        let mut inputs = vec![xs.clone()];
        for part in &self.0[..self.0.len() - 1] {
            let next = part.apply(inputs.last().expect("non-empty"));
            inputs.push(next);
        }
        let mut outer = outer.clone();
        for (k, part) in self.0.iter().enumerate().rev() {
            part.parameter_gradient(&inputs[k], &outer, &mut grads[k]);
            if k > 0 {
                outer = part.transpose_apply(&outer);
            }
        }
    }

    fn interval_gradient(
        &self,
        boxes: (&DMatrix<f64>, &DMatrix<f64>),
        d_image: (&DMatrix<f64>, &DMatrix<f64>),
        gradient: &mut Affine,
    ) -> (DMatrix<f64>, DMatrix<f64>) {
        let Affine::Chain(grads) = gradient else {
            panic!("a gradient has the shape of its layer")
        };
        let mut inputs = vec![(boxes.0.clone(), boxes.1.clone())];
        for part in &self.0[..self.0.len() - 1] {
            let (lo, hi) = inputs.last().expect("non-empty");
            let next = part.interval(lo, hi);
            inputs.push(next);
        }
        let mut d = (d_image.0.clone(), d_image.1.clone());
        for (k, part) in self.0.iter().enumerate().rev() {
            let (lo, hi) = &inputs[k];
            d = part.interval_gradient((lo, hi), (&d.0, &d.1), &mut grads[k]);
        }
        d
    }
}
