//! The plain trainer: mini-batch minimisation of softmax cross-entropy with a chosen optimiser,
//! seeded shuffling, weight decay and early stopping on a validation split.
//!
//! A leading `normalize` layer of the model is kept fixed (training works in normalised units, see
//! [`Model::split_normalization`]); everything after it is folded into canonical dense/ReLU form and
//! trained. The same seed, data and settings give the same model bit for bit. The trainer never looks
//! at robustness; see [`super::constrained`] for that.

use nalgebra::DMatrix;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::data::Dataset;
use crate::model::{predicted_class, Model, Network, Normalization};

use super::backprop::{
    backward, classifier_logits, forward, raw_logit_gradient, softmax_cross_entropy,
};
use super::optimizer::{Optimizer, OptimizerKind};
use super::TrainError;

/// Settings of the plain trainer.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct TrainSettings {
    /// Largest number of passes over the training data.
    pub epochs: usize,
    /// Samples per mini-batch (the last batch of an epoch may be smaller).
    pub batch_size: usize,
    /// Optimiser and step size.
    pub optimizer: OptimizerKind,
    /// L2 weight decay on the weights (not the biases), ≥ 0.
    pub weight_decay: f64,
    /// Seed of the shuffling and of the validation split.
    pub seed: u64,
    /// Fraction of the training data held out for validation when no validation set is given (0 = none).
    pub validation_fraction: f64,
    /// Stop after this many epochs without a lower validation loss and keep the best epoch's model;
    /// `None` trains all epochs (and still keeps the best epoch when there is validation data).
    pub patience: Option<usize>,
}

impl Default for TrainSettings {
    fn default() -> Self {
        TrainSettings {
            epochs: 100,
            batch_size: 32,
            optimizer: OptimizerKind::adam(0.002),
            weight_decay: 1e-4,
            seed: 0,
            validation_fraction: 0.1,
            patience: Some(15),
        }
    }
}

impl TrainSettings {
    /// Checks every field, naming the bad one.
    pub fn validate(&self) -> Result<(), TrainError> {
        let bad = |m: String| Err(TrainError::Settings(m));
        if self.epochs == 0 {
            return bad("epochs must be at least 1".into());
        }
        if self.batch_size == 0 {
            return bad("batch size must be at least 1".into());
        }
        let rate = self.optimizer.learning_rate();
        if !(rate.is_finite() && rate > 0.0) {
            return bad(format!("learning rate {rate} must be a finite number > 0"));
        }
        match self.optimizer {
            OptimizerKind::Adam { beta1, beta2, .. } => {
                if !(0.0..1.0).contains(&beta1) || !(0.0..1.0).contains(&beta2) {
                    return bad(format!("Adam betas ({beta1}, {beta2}) must lie in [0, 1)"));
                }
            }
            OptimizerKind::Sgd { momentum, .. } => {
                if !(0.0..1.0).contains(&momentum) {
                    return bad(format!("momentum {momentum} must lie in [0, 1)"));
                }
            }
        }
        if !(self.weight_decay.is_finite() && self.weight_decay >= 0.0) {
            return bad(format!(
                "weight decay {} must be a finite number ≥ 0",
                self.weight_decay
            ));
        }
        if !(0.0..1.0).contains(&self.validation_fraction) {
            return bad(format!(
                "validation fraction {} must lie in [0, 1)",
                self.validation_fraction
            ));
        }
        Ok(())
    }
}

/// What one epoch measured.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct EpochRecord {
    /// 1-based epoch number.
    pub epoch: usize,
    /// Mean training loss over the epoch's mini-batches.
    pub train_loss: f64,
    /// Cross-entropy on the validation data after the epoch (when there is validation data).
    pub validation_loss: Option<f64>,
    /// Clean accuracy on the validation data after the epoch.
    pub validation_accuracy: Option<f64>,
}

/// Why training stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum StopReason {
    /// All epochs ran.
    EpochsDone,
    /// The validation loss did not improve for `patience` epochs.
    EarlyStopped,
}

/// The history of a training run.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct TrainLog {
    /// One record per epoch run.
    pub epochs: Vec<EpochRecord>,
    /// The epoch whose model was returned (the best validation loss, or the last epoch).
    pub best_epoch: usize,
    /// Why training stopped.
    pub stop: StopReason,
    /// Samples trained on.
    pub training_samples: usize,
    /// Samples validated on.
    pub validation_samples: usize,
}

/// A model split for training: the fixed normalisation, the trainable network, and the model it came
/// from (for names, input range, classes and provenance).
#[derive(Debug, Clone)]
pub struct TrainableModel {
    /// The leading normalize layer, kept fixed.
    pub normalization: Option<Normalization>,
    /// The trainable canonical network, in normalised units.
    pub network: Network,
    /// The original model.
    pub template: Model,
}

impl TrainableModel {
    /// Splits `model` (see [`Model::split_normalization`]).
    pub fn new(model: &Model) -> TrainableModel {
        let (normalization, network) = model.split_normalization();
        TrainableModel {
            normalization,
            network,
            template: model.clone(),
        }
    }

    /// Raw features (one column per sample) mapped into the network's units.
    pub fn to_network_units(&self, features: &DMatrix<f64>) -> DMatrix<f64> {
        match &self.normalization {
            None => features.clone(),
            Some(n) => {
                let mut out = features.clone();
                for mut column in out.column_iter_mut() {
                    for i in 0..column.len() {
                        column[i] = (column[i] - n.mean[i]) / n.std[i];
                    }
                }
                out
            }
        }
    }

    /// The model with `network` in place of the trainable part (same normalisation and metadata).
    pub fn model_with(&self, network: &Network) -> Model {
        self.template
            .with_network(self.normalization.as_ref(), network)
    }
}

/// Checks that `data` fits `model` (sizes, labels, finite values, not empty).
pub fn check_data(model: &Model, data: &Dataset, what: &str) -> Result<(), TrainError> {
    if data.is_empty() {
        return Err(TrainError::Data(format!("the {what} data has no samples")));
    }
    if data.features.nrows() != model.input.dim {
        return Err(TrainError::Data(format!(
            "the {what} data has {} features, the model expects {}",
            data.features.nrows(),
            model.input.dim
        )));
    }
    let classes = model.class_count();
    if let Some(i) = data.labels.iter().position(|l| *l >= classes) {
        return Err(TrainError::Data(format!(
            "{what} sample {i} has label {}, the model has {classes} classes",
            data.labels[i]
        )));
    }
    if let Some(i) = data.features.iter().position(|v| !v.is_finite()) {
        return Err(TrainError::Data(format!(
            "{what} sample {} has a non-finite feature",
            i / model.input.dim.max(1)
        )));
    }
    Ok(())
}

/// Splits `data` into training and validation parts: a seeded random `fraction` of the samples
/// (at least one when `fraction > 0` and there are two or more samples) goes to validation.
pub fn split_validation(data: &Dataset, fraction: f64, seed: u64) -> (Dataset, Option<Dataset>) {
    let n = data.len();
    let held = ((n as f64) * fraction).round() as usize;
    let held = if fraction > 0.0 && n >= 2 {
        held.clamp(1, n - 1)
    } else {
        0
    };
    if held == 0 {
        return (data.clone(), None);
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed ^ SPLIT_SEED_MIX));
    let (validation, train) = order.split_at(held);
    let mut train = train.to_vec();
    train.sort_unstable();
    let mut validation = validation.to_vec();
    validation.sort_unstable();
    (data.subset(&train), Some(data.subset(&validation)))
}

/// Mixed into the seed of the validation split so it differs from the shuffling stream.
const SPLIT_SEED_MIX: u64 = 0x9e37_79b9_7f4a_7c15;

/// The columns `indices` of `features`.
pub fn gather_columns(features: &DMatrix<f64>, indices: &[usize]) -> DMatrix<f64> {
    DMatrix::from_fn(features.nrows(), indices.len(), |r, c| {
        features[(r, indices[c])]
    })
}

/// Mean cross-entropy and clean accuracy of `network` on features already in network units.
pub fn loss_and_accuracy(
    network: &Network,
    features: &DMatrix<f64>,
    labels: &[usize],
) -> (f64, f64) {
    let logits = classifier_logits(&network.forward_batch(features));
    let (loss, _) = softmax_cross_entropy(&logits, labels);
    let correct = (0..labels.len())
        .filter(|&i| predicted_class(logits.column(i).as_slice()) == labels[i])
        .count();
    (loss, correct as f64 / labels.len().max(1) as f64)
}

/// Mean cross-entropy over a batch and its parameter gradient.
pub fn cross_entropy_gradient(
    network: &Network,
    batch: &DMatrix<f64>,
    labels: &[usize],
) -> (f64, Network) {
    let cache = forward(network, batch);
    let raw_rows = cache.logits().nrows();
    let (loss, g) = softmax_cross_entropy(&classifier_logits(cache.logits()), labels);
    let gradient = backward(network, &cache, &raw_logit_gradient(raw_rows, g));
    (loss, gradient)
}

/// Trains `initial` on `data`, holding out `settings.validation_fraction` of it for validation and early
/// stopping. Returns the trained model (same layout, normalisation and metadata as `initial`) and the log.
pub fn train_cross_entropy(
    initial: &Model,
    data: &Dataset,
    settings: &TrainSettings,
) -> Result<(Model, TrainLog), TrainError> {
    settings.validate()?;
    check_data(initial, data, "training")?;
    let (train, validation) = split_validation(data, settings.validation_fraction, settings.seed);
    train_cross_entropy_with_validation(initial, &train, validation.as_ref(), settings)
}

/// Trains `initial` on all of `train`, validating (and early stopping) on `validation` when given;
/// `settings.validation_fraction` is ignored.
pub fn train_cross_entropy_with_validation(
    initial: &Model,
    train: &Dataset,
    validation: Option<&Dataset>,
    settings: &TrainSettings,
) -> Result<(Model, TrainLog), TrainError> {
    settings.validate()?;
    check_data(initial, train, "training")?;
    if let Some(v) = validation {
        check_data(initial, v, "validation")?;
    }
    let trainable = TrainableModel::new(initial);
    let features = trainable.to_network_units(&train.features);
    let validation_features = validation.map(|v| trainable.to_network_units(&v.features));
    let mut network = trainable.network.clone();
    let mut optimizer = Optimizer::new(settings.optimizer, settings.weight_decay, &network);
    let mut rng = ChaCha8Rng::seed_from_u64(settings.seed);
    let mut order: Vec<usize> = (0..train.len()).collect();
    let mut records = Vec::new();
    let mut best: Option<(f64, usize, Network)> = None;
    let mut stop = StopReason::EpochsDone;
    for epoch in 1..=settings.epochs {
        order.shuffle(&mut rng);
        let mut total = 0.0;
        for chunk in order.chunks(settings.batch_size) {
            let batch = gather_columns(&features, chunk);
            let labels: Vec<usize> = chunk.iter().map(|&i| train.labels[i]).collect();
            let (loss, gradient) = cross_entropy_gradient(&network, &batch, &labels);
            if !loss.is_finite() {
                return Err(TrainError::Diverged { epoch });
            }
            total += loss * chunk.len() as f64;
            optimizer.step(&mut network, &gradient, 1.0);
        }
        let mut record = EpochRecord {
            epoch,
            train_loss: total / train.len() as f64,
            validation_loss: None,
            validation_accuracy: None,
        };
        if let (Some(v), Some(vf)) = (validation, &validation_features) {
            let (loss, accuracy) = loss_and_accuracy(&network, vf, &v.labels);
            record.validation_loss = Some(loss);
            record.validation_accuracy = Some(accuracy);
            let improved = best.as_ref().map(|(b, _, _)| loss < *b).unwrap_or(true);
            if improved {
                best = Some((loss, epoch, network.clone()));
            }
        }
        records.push(record);
        if let (Some(patience), Some((_, best_epoch, _))) = (settings.patience, &best) {
            if epoch - best_epoch >= patience {
                stop = StopReason::EarlyStopped;
                break;
            }
        }
    }
    let last_epoch = records.len();
    let (best_epoch, network) = match best {
        Some((_, e, n)) => (e, n),
        None => (last_epoch, network),
    };
    let log = TrainLog {
        epochs: records,
        best_epoch,
        stop,
        training_samples: train.len(),
        validation_samples: validation.map(Dataset::len).unwrap_or(0),
    };
    Ok((trainable.model_with(&network), log))
}
