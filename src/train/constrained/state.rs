//! What the constrained trainer records per epoch ([`ConstrainedEpoch`]) and the state it carries
//! across calls ([`ConstrainedState`]), so a later round continues with the same weights, optimiser
//! state, multipliers, slacks and corrections. These are training measurements, never a certificate.

use super::{ConstrainedSettings, GapCorrection};
use crate::model::Network;
use crate::train::averaging::IterateAverage;
use crate::train::optimizer::Optimizer;
use crate::train::plain::TrainableModel;

/// What one epoch of constrained training measured.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ConstrainedEpoch {
    /// 1-based epoch number (counting across rounds).
    pub epoch: usize,
    /// Fraction of the full budget used at the end of the epoch.
    pub epsilon_scale: f64,
    /// Mean clean cross-entropy over the epoch's batches.
    pub clean_loss: f64,
    /// Mean robust loss over the epoch's batches.
    pub robust_loss: f64,
    /// Robust error rate measured on the training batches (the constraint's measure).
    pub robust_error: f64,
    /// The multipliers at the end of the epoch (one per constraint term).
    pub multipliers: Vec<f64>,
    /// The relaxation slacks at the end of the epoch (all 0 without relaxation).
    pub slacks: Vec<f64>,
    /// Each constraint's measurement (robust error rate or mean robust loss, on its rows) averaged
    /// over the epoch's batches, in the order of the multipliers (NaN when no batch had its rows).
    pub measured: Vec<f64>,
    /// The largest generalisation-gap correction of an allowance after the epoch (0 when not in use).
    pub gap_correction: f64,
    /// Each constraint's gap correction after the epoch, in the order of the multipliers.
    pub gap_corrections: Vec<f64>,
    /// Mean clean cross-entropy on the validation data (the objective's held-out estimate).
    pub validation_clean_loss: Option<f64>,
    /// Standard error of that mean (sample standard deviation of the per-sample losses / √n).
    pub validation_clean_loss_error: Option<f64>,
    /// Clean accuracy on the validation data.
    pub validation_clean_accuracy: Option<f64>,
    /// Certified accuracy on the validation data by sound linear bounds at the full budget.
    pub validation_certified_accuracy: Option<f64>,
}

/// State carried across calls (so rounds can continue where the last one stopped).
#[derive(Debug, Clone)]
pub struct ConstrainedState {
    /// The trainable network.
    pub network: Network,
    /// The optimiser's state.
    pub optimizer: Optimizer,
    /// The multipliers.
    pub multipliers: Vec<f64>,
    /// The relaxation slacks, one per multiplier (0 without relaxation).
    pub slacks: Vec<f64>,
    /// Epochs run so far.
    pub epochs_done: usize,
    /// The allowance corrections carried across epochs and rounds, one per constraint term.
    pub corrections: Vec<GapCorrection>,
    /// The iterate average (see [`ConstrainedSettings::average_tail`]); `None` until it starts.
    pub average: Option<IterateAverage>,
}

impl ConstrainedState {
    /// A fresh state for `trainable` under `settings`.
    pub fn new(
        trainable: &TrainableModel,
        settings: &ConstrainedSettings,
        classes: usize,
    ) -> ConstrainedState {
        let count = settings.terms(classes).len();
        let start = settings.formulation.initial_multipliers(1)[0];
        ConstrainedState {
            network: trainable.network.clone(),
            optimizer: Optimizer::new(
                settings.train.optimizer,
                settings.train.weight_decay,
                &trainable.network,
            ),
            multipliers: vec![start; count],
            slacks: vec![0.0; count],
            epochs_done: 0,
            corrections: vec![GapCorrection::default(); count],
            average: None,
        }
    }
}
