//! How far a model's outputs, evaluated in its deployed arithmetic ([`Arithmetic`]) in any order of
//! summation, can be from the exact (real-number) outputs, over an input box.
//!
//! The bound follows the model file's layers as written (not the folded network), so a `normalize`
//! layer is charged for `(x − mean) / std` as the deployed code computes it. Per layer, with `X` a bound
//! on the exact input's magnitude and `e` the error carried in, in the standard model of floating-point
//! arithmetic (Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., §2.2 and §3.1):
//! - input: `e = u·|x| + λ` in float32 (the input is rounded to the format), `0` in float64;
//! - normalize: `e' = (e + e_mean + λ)/std·(1 + γ₄) + γ₄·|y| + λ` (`e_mean = u·|mean|` in float32,
//!   where the mean is stored rounded);
//! - dense (fan-in `n`): `e' = |W| e + γ_{n+3}(|W|(X + e) + |b|) + (n + 3)·λ`, plus
//!   `u(|W|(X + e) + |b|) + λ(Σ(X + e) + 1)` in float32 for weights stored rounded. `n + 3` roundings
//!   per term cover the dot product, the bias and a Gemm's `alpha` and `beta` (an inference engine may
//!   apply them as separate operations);
//! - ReLU: `e' = e` (it is 1-Lipschitz).
//!
//! `λ` is the format's smallest positive normal number: the standard model holds only without
//! underflow, and an operation whose result falls below `λ` is off by at most `λ` absolutely, with
//! gradual underflow or when the engine flushes subnormal numbers to zero. Overflow has no such bound:
//! when any value or partial sum could reach half the format's largest finite number, the bound is
//! `+∞` (nothing is certified: the deployed model may compute an infinity or a NaN there).
//!
//! Magnitudes come from interval propagation of the input box through the layers as written,
//! intersected at each ReLU with the caller's sound pre-activation bounds. Guarantee: for every input
//! of the box, `|deployed logit_c − exact logit_c| ≤ bound[c]`, so a margin whose sound lower bound
//! exceeds the sum of the two logits' bounds keeps its sign in the deployed arithmetic.

use nalgebra::{DMatrix, DVector, RealField};

use super::affine::Affine;
use super::layout::{Layer, Model};
use super::network::Dense;
use super::pool::PoolOp;
use super::sparse::Sparse;
use crate::bound::LayerBounds;
use crate::engine::rounding::{gamma, UNIT_ROUNDOFF_F64};
use crate::engine::structured::build;
use crate::engine::Arithmetic;
use crate::engine::LinearLayer;

enum Step {
    Normalize {
        mean: DVector<f64>,
        std: DVector<f64>,
    },
    /// Any linear layer as written (dense, conv, average pool, batch norm as two diagonal maps).
    Linear(Box<dyn LinearLayer>),
    Relu,
    /// Max pooling: exact in any arithmetic; `levels` hidden layers of the folded network stand for it.
    MaxPool {
        windows: Vec<Vec<usize>>,
        levels: usize,
    },
}

/// The per-model part of the bound, prepared once.
pub struct DeployedError {
    arithmetic: Arithmetic,
    steps: Vec<Step>,
    outputs: usize,
}

impl std::fmt::Debug for DeployedError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("DeployedError")
            .field("arithmetic", &self.arithmetic)
            .field("steps", &self.steps.len())
            .finish()
    }
}

/// One box for [`DeployedError::bound_many`]: input bounds and the hidden layers' pre-activation
/// bounds known on it (as for [`DeployedError::bound`]).
#[derive(Debug, Clone, Copy)]
pub struct ErrorBox<'a> {
    /// Lower input bounds.
    pub lower: &'a [f64],
    /// Upper input bounds.
    pub upper: &'a [f64],
    /// Sound pre-activation bounds per hidden layer (may be shorter or empty).
    pub hidden: &'a [LayerBounds],
}

fn max_abs(lo: &DMatrix<f64>, hi: &DMatrix<f64>) -> DMatrix<f64> {
    lo.zip_map(hi, |l, h| l.abs().max(h.abs()))
}

fn linear(map: Affine) -> Step {
    Step::Linear(build(&map))
}

impl DeployedError {
    /// Prepares the bound for `model` in its declared arithmetic.
    pub fn new(model: &Model) -> DeployedError {
        let mut outputs = model.input.dim;
        let mut steps = Vec::new();
        let mut after_relu = false;
        for layer in &model.layers {
            match layer {
                Layer::Normalize { mean, std } => steps.push(Step::Normalize {
                    mean: mean.clone(),
                    std: std.clone(),
                }),
                Layer::Dense { weights, bias } => {
                    outputs = weights.nrows();
                    steps.push(linear(Affine::Dense(Dense {
                        weights: weights.clone(),
                        bias: bias.clone(),
                    })));
                }
                Layer::Relu => steps.push(Step::Relu),
                Layer::Conv(c) => {
                    outputs = c.shape.output_dim();
                    steps.push(linear(Affine::Conv(c.clone())));
                }
                Layer::BatchNorm {
                    scale,
                    shift,
                    mean,
                    variance,
                    epsilon,
                    positions,
                } => {
                    let maps = Sparse::batch_norm(
                        [scale, shift, mean, variance],
                        *epsilon,
                        *positions,
                        outputs,
                    );
                    for map in maps {
                        steps.push(linear(Affine::Sparse(map)));
                    }
                }
                Layer::Pool(p) => {
                    outputs = p.output_dim();
                    match p.op {
                        PoolOp::Average => steps.push(linear(Affine::Sparse(p.average()))),
                        PoolOp::Max => steps.push(Step::MaxPool {
                            windows: p.windows(),
                            levels: p.max_as_relus(after_relu).hidden.len(),
                        }),
                    }
                }
                Layer::Flatten => continue,
            }
            after_relu = matches!(layer, Layer::Relu);
        }
        DeployedError {
            arithmetic: model.arithmetic,
            steps,
            outputs,
        }
    }

    /// The arithmetic covered.
    pub fn arithmetic(&self) -> Arithmetic {
        self.arithmetic
    }

    /// Bound per raw output on the deployed evaluation's error over the box `[lower, upper]`; `hidden`
    /// holds sound pre-activation bounds of the folded network's hidden layers (one per distinct ReLU,
    /// in order; may be shorter or empty).
    pub fn bound(&self, lower: &[f64], upper: &[f64], hidden: &[LayerBounds]) -> Vec<f64> {
        self.bound_many(&[ErrorBox {
            lower,
            upper,
            hidden,
        }])
        .remove(0)
    }

    /// [`DeployedError::bound`] for several boxes at once (one matrix column per box, so the layers
    /// run as matrix products); the result for each box is the one `bound` gives alone.
    pub fn bound_many(&self, boxes: &[ErrorBox]) -> Vec<Vec<f64>> {
        let count = boxes.len();
        if count == 0 {
            return Vec::new();
        }
        let u = self.arithmetic.unit_roundoff();
        let (stored, tiny, limit) = match self.arithmetic {
            Arithmetic::Float64 => (0.0, f64::MIN_POSITIVE, f64::MAX / 2.0),
            Arithmetic::Float32 => (u, f64::from(f32::MIN_POSITIVE), f64::from(f32::MAX) / 2.0),
        };
        // Per box: whether some value or partial sum could overflow (a NaN counts as too large).
        let mut overflow = vec![false; count];
        let mut check = |m: &DMatrix<f64>| {
            for (j, column) in m.column_iter().enumerate() {
                overflow[j] |= column.iter().any(|x| x.is_nan() || *x > limit);
            }
        };
        let widen = 1.0 + 8.0 * UNIT_ROUNDOFF_F64;
        let dim = boxes[0].lower.len();
        let mut lo = DMatrix::from_fn(dim, count, |i, j| boxes[j].lower[i]);
        let mut hi = DMatrix::from_fn(dim, count, |i, j| boxes[j].upper[i]);
        check(&max_abs(&lo, &hi));
        let input_tiny = if stored > 0.0 { tiny } else { 0.0 };
        let mut error = (max_abs(&lo, &hi) * stored).add_scalar(input_tiny);
        let mut relu = 0;
        let mut last_was_relu = false;
        for step in &self.steps {
            match step {
                Step::Normalize { mean, std } => {
                    let g = gamma(4, u);
                    let per_row = |m: &DMatrix<f64>, f: &dyn Fn(f64, usize) -> f64| {
                        DMatrix::from_fn(m.nrows(), m.ncols(), |i, j| f(m[(i, j)], i))
                    };
                    let new_lo = per_row(&lo, &|v, i| (v - mean[i]) / std[i]);
                    let new_hi = per_row(&hi, &|v, i| (v - mean[i]) / std[i]);
                    let magnitude = max_abs(&new_lo, &new_hi) * widen;
                    check(&(per_row(&max_abs(&lo, &hi), &|v, i| v + mean[i].abs()) + &error));
                    check(&magnitude);
                    let carried = per_row(&error, &|e, i| {
                        (e + mean[i].abs() * stored + tiny) / std[i] * (1.0 + g)
                    });
                    error = (carried + magnitude * g).add_scalar(tiny);
                    (lo, hi) = (new_lo, new_hi);
                    last_was_relu = false;
                }
                Step::Linear(layer) => {
                    // The fan-in plus two: Gemm's alpha/beta and a separately added bias.
                    let n = layer.fan_in() + 2;
                    let g = gamma(n, u) + stored;
                    let x = max_abs(&lo, &hi);
                    let reach = &x + &error;
                    let touched = layer.magnitude_apply(&reach);
                    check(&(&touched * (1.0 + g) * widen));
                    // Underflow: each of the n operations, and (float32) each stored weight and bias.
                    let absolute: Vec<f64> = reach
                        .column_iter()
                        .map(|c| {
                            n as f64 * tiny
                                + if stored > 0.0 {
                                    tiny * (c.sum() + 1.0)
                                } else {
                                    0.0
                                }
                        })
                        .collect();
                    let carried = layer.magnitude_linear(&error);
                    let (new_lo, new_hi) = layer.interval(&lo, &hi);
                    let slack = layer.magnitude_apply(&x) * gamma(n, UNIT_ROUNDOFF_F64);
                    lo = new_lo - &slack;
                    hi = new_hi + &slack;
                    error = carried + touched * g;
                    for (j, mut column) in error.column_iter_mut().enumerate() {
                        column.apply(|e| *e = (*e + absolute[j]) * widen);
                    }
                    last_was_relu = false;
                }
                Step::MaxPool { windows, levels } => {
                    let pick = |m: &DMatrix<f64>| {
                        DMatrix::from_fn(windows.len(), m.ncols(), |w, j| {
                            windows[w]
                                .iter()
                                .map(|i| m[(*i, j)])
                                .fold(f64::NEG_INFINITY, f64::max)
                        })
                    };
                    (lo, hi, error) = (pick(&lo), pick(&hi), pick(&error));
                    relu += levels;
                    last_was_relu = false;
                }
                Step::Relu => {
                    if !last_was_relu {
                        for (j, b) in boxes.iter().enumerate() {
                            let Some(b) = b.hidden.get(relu).filter(|b| b.len() == lo.nrows())
                            else {
                                continue;
                            };
                            for i in 0..lo.nrows() {
                                let (l, h) =
                                    (lo[(i, j)].max(b.lower[i]), hi[(i, j)].min(b.upper[i]));
                                if l <= h {
                                    lo[(i, j)] = l;
                                    hi[(i, j)] = h;
                                }
                            }
                        }
                        relu += 1;
                    }
                    lo.apply(|v| *v = v.max(0.0));
                    hi.apply(|v| *v = v.max(0.0));
                    last_was_relu = true;
                }
            }
        }
        debug_assert_eq!(error.nrows(), self.outputs);
        (0..count)
            .map(|j| {
                if overflow[j] {
                    vec![f64::INFINITY; self.outputs]
                } else {
                    error.column(j).iter().copied().collect()
                }
            })
            .collect()
    }

    /// Bound on the deployed error of the margin `logit_label − logit_target` in the classifier form
    /// (a 1-logit model's classifier is `[0, z]`).
    pub fn margin_error(errors: &[f64], label: usize, target: usize) -> f64 {
        if errors.len() == 1 {
            errors[0]
        } else {
            errors[label] + errors[target]
        }
    }
}

/// The model's raw outputs at `x`, evaluated layer by layer as written in the model's arithmetic
/// (float32: inputs, parameters and every operation rounded to float32), the way a deployment computes
/// them.
pub fn forward(model: &Model, x: &[f64]) -> Vec<f64> {
    match model.arithmetic {
        Arithmetic::Float64 => evaluate::<f64>(model, x, |v| v),
        Arithmetic::Float32 => evaluate::<f32>(model, x, |v| v as f32),
    }
}

fn evaluate<T: RealField + Copy + Into<f64>>(
    model: &Model,
    x: &[f64],
    round: impl Fn(f64) -> T,
) -> Vec<f64> {
    let mut h: Vec<T> = x.iter().map(|v| round(*v)).collect();
    for layer in &model.layers {
        h = match layer {
            Layer::Normalize { mean, std } => h
                .iter()
                .zip(mean.iter().zip(std.iter()))
                .map(|(v, (m, s))| (*v - round(*m)) / round(*s))
                .collect(),
            Layer::Dense { weights, bias } => (0..weights.nrows())
                .map(|r| {
                    let mut sum = T::zero();
                    for (w, v) in weights.row(r).iter().zip(&h) {
                        sum += round(*w) * *v;
                    }
                    sum + round(bias[r])
                })
                .collect(),
            Layer::Relu => h.iter().map(|v| v.max(T::zero())).collect(),
            Layer::Conv(c) => {
                let xs = DMatrix::from_column_slice(h.len(), 1, &h);
                let out = c.correlate(&c.kernel.map(&round), &xs);
                let positions = c.positions();
                out.iter()
                    .enumerate()
                    .map(|(r, v)| *v + round(c.bias[r / positions]))
                    .collect()
            }
            Layer::BatchNorm {
                scale,
                shift,
                mean,
                variance,
                epsilon,
                positions,
            } => h
                .iter()
                .enumerate()
                .map(|(r, v)| {
                    let c = r / positions;
                    let spread = (round(variance[c]) + round(*epsilon)).sqrt();
                    (*v - round(mean[c])) / spread * round(scale[c]) + round(shift[c])
                })
                .collect(),
            Layer::Pool(p) => p
                .windows()
                .iter()
                .map(|w| match p.op {
                    PoolOp::Max => w.iter().map(|i| h[*i]).fold(h[w[0]], |a, b| a.max(b)),
                    PoolOp::Average => {
                        let mut sum = T::zero();
                        for i in w {
                            sum += h[*i];
                        }
                        sum / round(w.len() as f64)
                    }
                })
                .collect(),
            Layer::Flatten => h,
        };
    }
    h.into_iter().map(Into::into).collect()
}

#[cfg(test)]
#[path = "deployed_tests.rs"]
mod tests;
