//! The linear maps between a network's ReLUs, of any layer kind: dense, convolution, a fixed sparse
//! map, or a chain of these applied in turn.
//!
//! Guarantee: every kind offers the same operations with the same meaning — the map on a batch
//! ([`Affine::apply_batch`]), its linear part ([`Affine::apply_linear`]), the map of entrywise
//! magnitudes (`|W| X + |b|`, for rounding bounds; for a chain the product of its parts'
//! magnitudes, which bounds the magnitude of the product and the rounding of evaluating it part by
//! part), its parameters as flat slices, and the gradient of a linear functional of its output with
//! respect to its parameters and input. Fixed sparse maps have no trainable parameters.

use nalgebra::{DMatrix, DVector, RealField};

use super::conv::Conv;
use super::network::Dense;
use super::sparse::Sparse;

/// A linear map between ReLUs.
#[derive(Debug, Clone, PartialEq)]
pub enum Affine {
    /// `W x + b` with a dense `W`.
    Dense(Dense),
    /// A convolution with one bias per output channel.
    Conv(Conv),
    /// A fixed sparse map (pooling, a max pool's differences and sums, per-channel scale and shift).
    Sparse(Sparse),
    /// The parts applied in order (first part first).
    Chain(Vec<Affine>),
}

impl From<Dense> for Affine {
    fn from(dense: Dense) -> Affine {
        Affine::Dense(dense)
    }
}

impl Affine {
    /// Input size.
    pub fn input_dim(&self) -> usize {
        match self {
            Affine::Dense(d) => d.input_dim(),
            Affine::Conv(c) => c.shape.input_dim(),
            Affine::Sparse(s) => s.inputs,
            Affine::Chain(parts) => parts[0].input_dim(),
        }
    }

    /// Output size.
    pub fn output_dim(&self) -> usize {
        match self {
            Affine::Dense(d) => d.output_dim(),
            Affine::Conv(c) => c.shape.output_dim(),
            Affine::Sparse(s) => s.output_dim(),
            Affine::Chain(parts) => parts[parts.len() - 1].output_dim(),
        }
    }

    /// The longest dot product one output needs, bias included (for a chain, the sum over its parts:
    /// evaluating part by part accumulates their errors, and `γ_a + γ_b + γ_a γ_b ≤ γ_{a+b}`, Higham
    /// §3.1, Lemma 3.3).
    pub fn fan_in(&self) -> usize {
        match self {
            Affine::Dense(d) => d.input_dim() + 1,
            Affine::Conv(c) => c.shape.patch_len() + 1,
            Affine::Sparse(s) => s.fan_in(),
            Affine::Chain(parts) => parts.iter().map(Affine::fan_in).sum(),
        }
    }

    /// The dense layer, when this is one.
    pub fn as_dense(&self) -> Option<&Dense> {
        match self {
            Affine::Dense(d) => Some(d),
            _ => None,
        }
    }

    /// The same map written out as one dense layer (for exact references and small layers).
    pub fn to_dense(&self) -> Dense {
        match self {
            Affine::Dense(d) => d.clone(),
            Affine::Conv(c) => Dense {
                weights: c.to_dense_weights(),
                bias: c.bias_per_output(&c.bias),
            },
            Affine::Sparse(s) => Dense {
                weights: s.to_dense_weights(),
                bias: s.bias.clone(),
            },
            Affine::Chain(parts) => {
                let mut folded = parts[0].to_dense();
                for part in &parts[1..] {
                    folded = part.to_dense().after(&folded);
                }
                folded
            }
        }
    }

    /// `W X + b 1ᵀ` (one column per input).
    pub fn apply_batch(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        match self {
            Affine::Dense(d) => d.apply_batch(xs),
            Affine::Conv(c) => add_bias(c.correlate(&c.kernel, xs), &c.bias_per_output(&c.bias)),
            Affine::Sparse(s) => s.apply(xs),
            Affine::Chain(parts) => {
                let mut h = parts[0].apply_batch(xs);
                for part in &parts[1..] {
                    h = part.apply_batch(&h);
                }
                h
            }
        }
    }

    /// `W X` without the bias (the linear part on a batch of directions).
    pub fn apply_linear(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        match self {
            Affine::Dense(d) => &d.weights * xs,
            Affine::Conv(c) => c.correlate(&c.kernel, xs),
            Affine::Sparse(s) => s.apply_with(xs, |w| w),
            Affine::Chain(parts) => {
                let mut h = parts[0].apply_linear(xs);
                for part in &parts[1..] {
                    h = part.apply_linear(&h);
                }
                h
            }
        }
    }

    /// `W x + b` for one input.
    pub fn apply(&self, x: &DVector<f64>) -> DVector<f64> {
        let xs = DMatrix::from_column_slice(x.len(), 1, x.as_slice());
        DVector::from_column_slice(self.apply_batch(&xs).as_slice())
    }

    /// `|W| X + |b| 1ᵀ` for non-negative `X` (a chain: its parts' magnitude maps in turn).
    pub fn magnitude_apply(&self, magnitudes: &DMatrix<f64>) -> DMatrix<f64> {
        match self {
            Affine::Dense(d) => add_bias(d.weights.abs() * magnitudes, &d.bias.abs()),
            Affine::Conv(c) => add_bias(
                c.correlate(&c.kernel.abs(), magnitudes),
                &c.bias_per_output(&c.bias.abs()),
            ),
            Affine::Sparse(s) => add_bias(s.apply_with(magnitudes, f64::abs), &s.bias.abs()),
            Affine::Chain(parts) => {
                let mut h = parts[0].magnitude_apply(magnitudes);
                for part in &parts[1..] {
                    h = part.magnitude_apply(&h);
                }
                h
            }
        }
    }

    /// The trainable parameters as flat slices (weights then bias per part; none for sparse maps).
    pub fn parameters(&self) -> Vec<&[f64]> {
        match self {
            Affine::Dense(d) => vec![d.weights.as_slice(), d.bias.as_slice()],
            Affine::Conv(c) => vec![c.kernel.as_slice(), c.bias.as_slice()],
            Affine::Sparse(_) => Vec::new(),
            Affine::Chain(parts) => parts.iter().flat_map(Affine::parameters).collect(),
        }
    }

    /// [`Affine::parameters`], mutable.
    pub fn parameters_mut(&mut self) -> Vec<&mut [f64]> {
        match self {
            Affine::Dense(d) => vec![d.weights.as_mut_slice(), d.bias.as_mut_slice()],
            Affine::Conv(c) => vec![c.kernel.as_mut_slice(), c.bias.as_mut_slice()],
            Affine::Sparse(_) => Vec::new(),
            Affine::Chain(parts) => parts.iter_mut().flat_map(Affine::parameters_mut).collect(),
        }
    }

    /// Number of trainable parameters.
    pub fn parameter_count(&self) -> usize {
        self.parameters().iter().map(|p| p.len()).sum()
    }

    /// Reverse-mode step for `Y = W X + b`: given `∂L/∂Y` (`outer`) and the input `X`, adds `∂L/∂θ`
    /// to `gradient` (same kind and shape as `self`) and returns `∂L/∂X`.
    pub fn backward(
        &self,
        xs: &DMatrix<f64>,
        outer: &DMatrix<f64>,
        gradient: &mut Affine,
    ) -> DMatrix<f64> {
        match (self, gradient) {
            (Affine::Dense(d), Affine::Dense(g)) => {
                g.weights += outer * xs.transpose();
                g.bias += outer.column_sum();
                d.weights.tr_mul(outer)
            }
            (Affine::Conv(c), Affine::Conv(g)) => {
                g.kernel += c.kernel_gradient(outer, xs);
                g.bias += c.bias_gradient(outer);
                c.correlate_transpose(&c.kernel.transpose(), outer)
            }
            (Affine::Sparse(s), Affine::Sparse(_)) => s.transpose_apply_with(outer, |w| w),
            (Affine::Chain(parts), Affine::Chain(grads)) => {
                let mut inputs = vec![xs.clone()];
                for part in &parts[..parts.len() - 1] {
                    let next = part.apply_batch(inputs.last().expect("non-empty"));
                    inputs.push(next);
                }
                let mut g = outer.clone();
                for (k, part) in parts.iter().enumerate().rev() {
                    g = part.backward(&inputs[k], &g, &mut grads[k]);
                }
                g
            }
            _ => panic!("a gradient has the shape of its layer"),
        }
    }

    /// `|W| X` without bias.
    pub fn magnitude_linear(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        match self {
            Affine::Dense(d) => d.weights.abs() * xs,
            Affine::Conv(c) => c.correlate(&c.kernel.abs(), xs),
            Affine::Sparse(s) => s.apply_with(xs, f64::abs),
            Affine::Chain(parts) => {
                let mut h = parts[0].magnitude_linear(xs);
                for part in &parts[1..] {
                    h = part.magnitude_linear(&h);
                }
                h
            }
        }
    }

    /// A zero-parameter copy (the shape of a gradient).
    pub fn zeros_like(&self) -> Affine {
        let mut zero = self.clone();
        for p in zero.parameters_mut() {
            p.fill(0.0);
        }
        zero
    }
}

/// Adds `bias` to every column.
pub fn add_bias<T: RealField + Copy>(mut out: DMatrix<T>, bias: &DVector<T>) -> DMatrix<T> {
    for mut column in out.column_iter_mut() {
        column += bias;
    }
    out
}
