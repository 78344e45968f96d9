//! The internal network: a stack of affine maps with a ReLU between each consecutive pair.
//!
//! Every model in the layout folds into this canonical form: `normalize` layers become affine maps and
//! are composed into their neighbours, runs of affine maps are multiplied out, and a ReLU at either end gets
//! an identity map beside it. All later stages (attack, bounds, search, training) work on this form.
//! Batches are matrices with **one column per sample**.
//!
//! Folding is done in f64 and so changes the function slightly; every folded layer carries a
//! [`FoldError`]: entrywise bounds on the difference between the stored and the exact (real-number)
//! weights and biases, from the standard error model of each product (Higham, *Accuracy and Stability
//! of Numerical Algorithms*, §3.1). Sound bounds add it ([`crate::engine`]); layers copied unchanged
//! from the model file are exact (`None`).

use nalgebra::{DMatrix, DVector};

use super::affine::Affine;
use super::layout::{Layer, Model};
use super::pool::PoolOp;
use super::sparse::Sparse;
use crate::engine::rounding::{gamma, UNIT_ROUNDOFF_F64};

/// An affine map `x ↦ W x + b` with `W` of shape out × in.
#[derive(Debug, Clone, PartialEq)]
pub struct Dense {
    /// Weights, one row per output unit.
    pub weights: DMatrix<f64>,
    /// Bias, one entry per output unit.
    pub bias: DVector<f64>,
}

impl Dense {
    /// The identity map on `dim` features.
    pub fn identity(dim: usize) -> Dense {
        Dense {
            weights: DMatrix::identity(dim, dim),
            bias: DVector::zeros(dim),
        }
    }

    /// Input size.
    pub fn input_dim(&self) -> usize {
        self.weights.ncols()
    }

    /// Output size.
    pub fn output_dim(&self) -> usize {
        self.weights.nrows()
    }

    /// `self ∘ inner`: first `inner`, then `self`.
    pub fn after(&self, inner: &Dense) -> Dense {
        Dense {
            weights: &self.weights * &inner.weights,
            bias: &self.weights * &inner.bias + &self.bias,
        }
    }

    /// Applies the map to one input.
    pub fn apply(&self, x: &DVector<f64>) -> DVector<f64> {
        &self.weights * x + &self.bias
    }

    /// Applies the map to a batch (one column per sample).
    pub fn apply_batch(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        let mut out = &self.weights * xs;
        for mut column in out.column_iter_mut() {
            column += &self.bias;
        }
        out
    }
}

/// Entrywise bounds on how far a stored (folded) affine map is from the exact one the model file
/// describes: `|W_exact − W| ≤ weights`, `|b_exact − b| ≤ bias`.
#[derive(Debug, Clone, PartialEq)]
pub struct FoldError {
    /// Bound per weight (out × in, non-negative).
    pub weights: DMatrix<f64>,
    /// Bound per bias entry (non-negative).
    pub bias: DVector<f64>,
}

/// A ReLU network in canonical form: `layers[0]`, ReLU, `layers[1]`, ReLU, …, `layers[last]`.
#[derive(Debug, Clone, PartialEq)]
pub struct Network {
    /// The linear maps; a ReLU sits between every consecutive pair, none after the last.
    pub layers: Vec<Affine>,
    /// Per layer, how far it may be from the model's exact layer (`None` = exact); empty when every
    /// layer is exact. Only dense layers are ever folded.
    pub fold_error: Vec<Option<FoldError>>,
}

impl Network {
    /// A network of dense layers (see [`Network::new`]).
    pub fn from_dense(layers: Vec<Dense>) -> Network {
        Network::new(layers.into_iter().map(Affine::Dense).collect())
    }

    /// Builds a network, checking that consecutive sizes agree.
    pub fn new(layers: Vec<Affine>) -> Network {
        assert!(
            !layers.is_empty(),
            "a network needs at least one affine map"
        );
        for pair in layers.windows(2) {
            assert_eq!(
                pair[0].output_dim(),
                pair[1].input_dim(),
                "layer sizes must chain"
            );
        }
        Network {
            layers,
            fold_error: Vec::new(),
        }
    }

    /// The fold error of layer `k` (`None` when exact).
    pub fn fold_error_of(&self, k: usize) -> Option<&FoldError> {
        self.fold_error.get(k).and_then(Option::as_ref)
    }

    /// Input size.
    pub fn input_dim(&self) -> usize {
        self.layers[0].input_dim()
    }

    /// Output size (number of logits).
    pub fn output_dim(&self) -> usize {
        self.layers[self.layers.len() - 1].output_dim()
    }

    /// Sizes of the hidden (ReLU) layers, in order.
    pub fn hidden_sizes(&self) -> Vec<usize> {
        self.layers[..self.layers.len() - 1]
            .iter()
            .map(Affine::output_dim)
            .collect()
    }

    /// Total number of ReLU units.
    pub fn relu_count(&self) -> usize {
        self.hidden_sizes().iter().sum()
    }

    /// Number of weights and biases.
    pub fn parameter_count(&self) -> usize {
        self.layers.iter().map(Affine::parameter_count).sum()
    }

    /// Logits for one input.
    pub fn forward(&self, x: &[f64]) -> DVector<f64> {
        let mut h = DVector::from_column_slice(x);
        let last = self.layers.len() - 1;
        for (i, layer) in self.layers.iter().enumerate() {
            h = layer.apply(&h);
            if i < last {
                h.apply(|v| *v = v.max(0.0));
            }
        }
        h
    }

    /// Logits for a batch (one column per sample in, one column per sample out).
    pub fn forward_batch(&self, xs: &DMatrix<f64>) -> DMatrix<f64> {
        let last = self.layers.len() - 1;
        let mut h = xs.clone();
        for (i, layer) in self.layers.iter().enumerate() {
            h = layer.apply_batch(&h);
            if i < last {
                h.apply(|v| *v = v.max(0.0));
            }
        }
        h
    }

    /// Pre-activations of every layer for one input (`result[k]` is the output of `layers[k]`).
    pub fn pre_activations(&self, x: &[f64]) -> Vec<DVector<f64>> {
        let mut out = Vec::with_capacity(self.layers.len());
        let mut h = DVector::from_column_slice(x);
        for layer in &self.layers {
            let z = layer.apply(&h);
            h = z.map(|v| v.max(0.0));
            out.push(z);
        }
        out
    }

    /// The same classifier with at least two logits: a 1-logit binary model `z` becomes `[0, z]`, so the
    /// usual argmax rule gives class 1 exactly when `z > 0` (ties go to the lower index).
    pub fn as_classifier(&self) -> Network {
        if self.output_dim() != 1 {
            return self.clone();
        }
        let mut layers = self.layers.clone();
        let last = layers.last_mut().expect("non-empty");
        let Affine::Dense(last) = last else {
            // Any other kind: append the fixed map z ↦ (0, z).
            let widen = Sparse::new(1, vec![Vec::new(), vec![(0, 1.0)]], DVector::zeros(2));
            *last = Affine::Chain(vec![last.clone(), Affine::Sparse(widen)]);
            return Network {
                layers,
                fold_error: self.fold_error.clone(),
            };
        };
        let inputs = last.input_dim();
        let mut weights = DMatrix::zeros(2, inputs);
        weights.row_mut(1).copy_from(&last.weights.row(0));
        let mut bias = DVector::zeros(2);
        bias[1] = last.bias[0];
        *last = Dense { weights, bias };
        let mut fold_error = self.fold_error.clone();
        let k = layers.len() - 1;
        if let Some(Some(e)) = fold_error.get_mut(k) {
            let mut weights = DMatrix::zeros(2, inputs);
            weights.row_mut(1).copy_from(&e.weights.row(0));
            let mut bias = DVector::zeros(2);
            bias[1] = e.bias[0];
            *e = FoldError { weights, bias };
        }
        Network { layers, fold_error }
    }
}

/// Index of the largest logit; ties go to the lowest index. This is the decision rule everywhere.
pub fn predicted_class(logits: &[f64]) -> usize {
    let mut best = 0;
    for (i, v) in logits.iter().enumerate() {
        if *v > logits[best] {
            best = i;
        }
    }
    best
}

/// Input normalisation `(x − mean) / std` kept apart from a network (used by training).
#[derive(Debug, Clone, PartialEq)]
pub struct Normalization {
    /// Per-feature mean.
    pub mean: DVector<f64>,
    /// Per-feature standard deviation (> 0).
    pub std: DVector<f64>,
}

impl Normalization {
    /// The normalisation as an affine map.
    pub fn as_dense(&self) -> Dense {
        Dense {
            weights: DMatrix::from_diagonal(&self.std.map(|s| 1.0 / s)),
            bias: -self.mean.component_div(&self.std),
        }
    }
}

impl Model {
    /// The folded canonical network with the model's raw output size (1 for binary models).
    pub fn network(&self) -> Network {
        fold_layers(self.input.dim, &self.layers)
    }

    /// The folded network with at least two logits (see [`Network::as_classifier`]): what attacks, bounds
    /// and search work on.
    pub fn classifier(&self) -> Network {
        self.network().as_classifier()
    }

    /// Splits off a leading `normalize` layer (kept as is) and folds the rest; used by training so the
    /// optimiser works in normalised units. Without a leading normalize layer the first part is `None`.
    pub fn split_normalization(&self) -> (Option<Normalization>, Network) {
        match self.layers.first() {
            Some(Layer::Normalize { mean, std }) if self.layers.len() > 1 => {
                let norm = Normalization {
                    mean: mean.clone(),
                    std: std.clone(),
                };
                (Some(norm), fold_layers(self.input.dim, &self.layers[1..]))
            }
            _ => (None, self.network()),
        }
    }

    /// A copy of this model (same name, input, classes, provenance) whose layers are `normalization`
    /// (if any) followed by `network` written as dense / relu layers.
    pub fn with_network(&self, normalization: Option<&Normalization>, network: &Network) -> Model {
        let mut layers = Vec::new();
        if let Some(n) = normalization {
            layers.push(Layer::Normalize {
                mean: n.mean.clone(),
                std: n.std.clone(),
            });
        }
        let structured = self.layers.iter().any(|l| {
            !matches!(
                l,
                Layer::Normalize { .. } | Layer::Dense { .. } | Layer::Relu
            )
        });
        if structured {
            // Layer kinds are kept as written; the trained parameters go back into the dense and
            // conv layers in order (lowering never folds them in such a model).
            let mut values = network.layers.iter().flat_map(Affine::parameters);
            let skip = usize::from(normalization.is_some());
            for layer in self.layers.iter().skip(skip) {
                let mut layer = layer.clone();
                let slots = match &mut layer {
                    Layer::Dense { weights, bias } => {
                        Some((weights.as_mut_slice(), bias.as_mut_slice()))
                    }
                    Layer::Conv(c) => Some((c.kernel.as_mut_slice(), c.bias.as_mut_slice())),
                    _ => None,
                };
                if let Some((w, b)) = slots {
                    w.copy_from_slice(values.next().expect("one weight slot per trained layer"));
                    b.copy_from_slice(values.next().expect("one bias slot per trained layer"));
                }
                layers.push(layer);
            }
            return Model {
                layers,
                ..self.clone()
            };
        }
        let last = network.layers.len() - 1;
        for (i, layer) in network.layers.iter().enumerate() {
            let d = layer.to_dense();
            layers.push(Layer::Dense {
                weights: d.weights,
                bias: d.bias,
            });
            if i < last {
                layers.push(Layer::Relu);
            }
        }
        Model {
            layers,
            ..self.clone()
        }
    }
}

fn fold_layers(input_dim: usize, layers: &[Layer]) -> Network {
    let mut done: Vec<(Affine, Option<FoldError>)> = Vec::new();
    let mut pending = Pending::default();
    let mut width = input_dim;
    let mut last_was_relu = false;
    for layer in layers {
        match layer {
            Layer::Normalize { mean, std } => pending.push(Part::Normalize(Normalization {
                mean: mean.clone(),
                std: std.clone(),
            })),
            Layer::Dense { weights, bias } => {
                let map = Dense {
                    weights: weights.clone(),
                    bias: bias.clone(),
                };
                width = map.output_dim();
                pending.push(Part::Dense(map));
            }
            Layer::Relu => {
                if last_was_relu {
                    continue; // relu ∘ relu = relu
                }
                done.push(pending.finish(width));
            }
            Layer::Conv(conv) => {
                width = conv.shape.output_dim();
                pending.push(Part::Structured(Affine::Conv(conv.clone())));
            }
            Layer::BatchNorm {
                scale,
                shift,
                mean,
                variance,
                epsilon,
                positions,
            } => {
                let maps =
                    Sparse::batch_norm([scale, shift, mean, variance], *epsilon, *positions, width);
                for map in maps {
                    pending.push(Part::Structured(Affine::Sparse(map)));
                }
            }
            Layer::Pool(pool) => match pool.op {
                PoolOp::Average => {
                    width = pool.output_dim();
                    pending.push(Part::Structured(Affine::Sparse(pool.average())));
                }
                PoolOp::Max => {
                    let non_negative = last_was_relu && pending.is_empty();
                    let lowered = pool.max_as_relus(non_negative);
                    for map in lowered.hidden {
                        pending.push(Part::Structured(Affine::Sparse(map)));
                        done.push(pending.finish(width));
                    }
                    width = pool.output_dim();
                    pending.push(Part::Structured(Affine::Sparse(lowered.output)));
                }
            },
            Layer::Flatten => continue,
        }
        last_was_relu = matches!(layer, Layer::Relu);
    }
    done.push(pending.finish(width));
    let exact = done.iter().all(|(_, e)| e.is_none());
    let (layers, errors): (Vec<Affine>, Vec<Option<FoldError>>) = done.into_iter().unzip();
    let mut network = Network::new(layers);
    if !exact {
        network.fold_error = errors;
    }
    network
}

/// One piece of the linear map being gathered between two ReLUs.
enum Part {
    Normalize(Normalization),
    Dense(Dense),
    Structured(Affine),
}

/// The pieces since the last ReLU: multiplied out into one dense map (with its [`FoldError`]) when all
/// are dense or `normalize`, as they always were; otherwise kept as a chain of exact parts (a
/// `normalize` becomes a diagonal map one rounding away from exact, see [`Sparse::roundings`]).
#[derive(Default)]
struct Pending(Vec<Part>);

impl Pending {
    fn push(&mut self, part: Part) {
        self.0.push(part);
    }

    fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    fn finish(&mut self, width: usize) -> (Affine, Option<FoldError>) {
        let parts = std::mem::take(&mut self.0);
        if parts.is_empty() {
            return (Affine::Dense(Dense::identity(width)), None);
        }
        if parts.iter().all(|p| !matches!(p, Part::Structured(_))) {
            let mut folded: Option<Folded> = None;
            for part in parts {
                let next = match part {
                    Part::Normalize(n) => {
                        let map = n.as_dense();
                        // One rounding per entry: 1/std, and mean/std.
                        let error = FoldError {
                            weights: map.weights.abs() * (2.0 * UNIT_ROUNDOFF_F64),
                            bias: map.bias.abs() * (2.0 * UNIT_ROUNDOFF_F64),
                        };
                        (map, Some(error))
                    }
                    Part::Dense(d) => (d, None),
                    Part::Structured(_) => unreachable!("checked above"),
                };
                folded = Some(compose(folded, next));
            }
            let (map, error) = folded.expect("non-empty");
            return (Affine::Dense(map), error);
        }
        let mut chain: Vec<Affine> = parts
            .into_iter()
            .map(|part| match part {
                Part::Normalize(n) => Affine::Sparse(
                    Sparse::diagonal(
                        &n.std.map(|s| 1.0 / s),
                        DVector::from_fn(n.mean.len(), |i, _| -n.mean[i] / n.std[i]),
                    )
                    .rounded(1),
                ),
                Part::Dense(d) => Affine::Dense(d),
                Part::Structured(a) => a,
            })
            .collect();
        if chain.len() == 1 {
            return (chain.remove(0), None);
        }
        (Affine::Chain(chain), None)
    }
}

/// An affine map with the bound on its distance from the exact map.
type Folded = (Dense, Option<FoldError>);

/// `next ∘ inner` with its error: `|ΔW| ≤ γ_m|Wn||Wi| + En|Wi| + |Wn|Ei + En Ei` and likewise for the
/// bias (`m` the inner dimension), each product's rounding bounded by Higham's `γ_m`.
fn compose(pending: Option<Folded>, next: Folded) -> Folded {
    let Some((inner, inner_error)) = pending else {
        return next;
    };
    let (outer, outer_error) = next;
    let product = outer.after(&inner);
    let m = inner.output_dim();
    let g = gamma(m + 1, UNIT_ROUNDOFF_F64);
    let outer_abs = outer.weights.abs();
    let inner_abs = inner.weights.abs();
    let mut weights = (&outer_abs * &inner_abs) * g;
    let mut bias = (&outer_abs * inner.bias.abs() + outer.bias.abs()) * g;
    if let Some(e) = &inner_error {
        weights += &outer_abs * &e.weights;
        bias += &outer_abs * &e.bias;
    }
    if let Some(e) = &outer_error {
        let inner_weights = match &inner_error {
            Some(i) => &inner_abs + &i.weights,
            None => inner_abs.clone(),
        };
        let inner_bias = match &inner_error {
            Some(i) => inner.bias.abs() + &i.bias,
            None => inner.bias.abs(),
        };
        weights += &e.weights * inner_weights;
        bias += &e.weights * inner_bias + &e.bias;
    }
    // The error terms are sums of non-negative products: enlarge for their own rounding.
    let scale = 1.0 + gamma(2 * m + 4, UNIT_ROUNDOFF_F64);
    let error = FoldError {
        weights: weights * scale,
        bias: bias * scale,
    };
    (product, Some(error))
}
