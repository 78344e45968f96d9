//! Folding a model's layers into the canonical [`Network`], and writing a network back into a model.
//!
//! Runs of `normalize` and dense layers between two ReLUs are multiplied out in f64; every folded layer
//! carries its [`FoldError`], an entrywise bound on its distance from the exact (real-number) map, from
//! Higham's error model of each product. Structured layers (conv, pooling, batch norm) are never
//! multiplied out and stay exact; a layer copied unchanged from the file has no fold error.

use nalgebra::DVector;

use super::{Dense, FoldError, Network, Normalization};
use crate::engine::rounding::{gamma, UNIT_ROUNDOFF_F64};
use crate::model::affine::Affine;
use crate::model::layout::{Layer, Model};
use crate::model::pool::PoolOp;
use crate::model::sparse::Sparse;

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
