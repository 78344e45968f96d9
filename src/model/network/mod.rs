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
//!
//! This module holds the canonical form itself; folding a model into it (and writing a network back
//! into a model) is in `fold`.

mod fold;

use nalgebra::{DMatrix, DVector};

use super::affine::Affine;
use super::sparse::Sparse;

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
