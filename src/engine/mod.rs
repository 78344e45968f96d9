//! The bound engine: every propagation ballast runs — forward passes, margin gradients, interval
//! bounds, the backward linear relaxation with optimised slopes and split multipliers, and the
//! reverse-mode derivatives of these bounds that training follows ([`adjoint`]) — written once, over a
//! layer-generic network view, on batches of sub-problems stacked as matrix columns.
//!
//! Guarantee: every lower bound the engine returns is a bound on the **real-number** network described
//! by the model file (not only on its f64 evaluation): each layer's interval and each backward pass
//! carries an a-priori rounding allowance (Higham's `γₙ` bounds, [`rounding`]) and the error of any
//! fold of the model's layers ([`FoldError`]). Deployed-arithmetic errors are a separate, later
//! subtraction ([`crate::model::deployed`]). Nothing here decides that a point is a counterexample.
//!
//! Layer indexing: `layers[k]` is a linear layer; for `k < K − 1` its output is a hidden pre-activation
//! followed by a ReLU. Batches are matrices with one column per sub-problem; a sub-problem belongs to a
//! domain ([`Domains`]), and the per-domain data (bounds, relaxations) are matrices with one column per
//! domain.

pub mod adjoint;
pub mod backward;
pub mod domains;
pub mod forward;
pub mod intermediate;
pub mod layer;
mod products;
pub mod rounding;
pub mod slopes;
pub mod structured;

use nalgebra::DMatrix;

pub use domains::Domains;
pub use layer::{DenseLayer, LinearLayer};
pub use rounding::Arithmetic;

use crate::model::network::FoldError;
use crate::model::Network;

/// The engine for one classifier-form network (at least two logits).
pub struct Engine {
    layers: Vec<Box<dyn LinearLayer>>,
    fold: Vec<Option<FoldError>>,
    factor: f64,
}

impl std::fmt::Debug for Engine {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Engine")
            .field("layers", &self.layers.len())
            .field("factor", &self.factor)
            .finish()
    }
}

impl Engine {
    /// The engine for `network` (taken in classifier form), with the network's fold errors.
    pub fn new(network: &Network) -> Engine {
        let network = network.as_classifier();
        let mut fold = network.fold_error.clone();
        fold.resize(network.layers.len(), None);
        let layers: Vec<Box<dyn LinearLayer>> =
            network.layers.iter().map(structured::build).collect();
        let longest = layers.iter().map(|l| l.fan_in()).max().unwrap_or(1);
        let widest = layers
            .iter()
            .map(|l| l.input_dim().max(l.output_dim()))
            .max()
            .unwrap_or(1);
        let factor = rounding::allowance_factor(longest.max(widest), layers.len());
        Engine {
            layers,
            fold,
            factor,
        }
    }

    /// Number of linear layers.
    pub fn depth(&self) -> usize {
        self.layers.len()
    }

    /// Input size.
    pub fn input_dim(&self) -> usize {
        self.layers[0].input_dim()
    }

    /// Number of logits.
    pub fn output_dim(&self) -> usize {
        self.layers[self.layers.len() - 1].output_dim()
    }

    /// Sizes of the hidden layers.
    pub fn hidden_sizes(&self) -> Vec<usize> {
        self.layers[..self.layers.len() - 1]
            .iter()
            .map(|l| l.output_dim())
            .collect()
    }

    /// Layer `k`.
    pub fn layer(&self, k: usize) -> &dyn LinearLayer {
        self.layers[k].as_ref()
    }

    /// The multiplier of magnitude sums in the rounding allowance.
    pub fn allowance_factor(&self) -> f64 {
        self.factor
    }

    /// `Ew_k H + eb_k` for layer `k` and input magnitudes `H` (one column per domain), or `None` when
    /// the layer is exact.
    pub(crate) fn fold_term(&self, k: usize, magnitudes: &DMatrix<f64>) -> Option<DMatrix<f64>> {
        self.fold[k].as_ref().map(|e| {
            let mut out = &e.weights * magnitudes;
            for mut column in out.column_iter_mut() {
                column += &e.bias;
            }
            // The product is a sum of non-negative terms: its relative rounding error is below the
            // allowance factor; enlarge by that much.
            out * (1.0 + self.factor)
        })
    }
}
