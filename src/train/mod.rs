//! Training: exact gradients, optimisers, the plain cross-entropy trainer, robust losses and the
//! constrained (primal-dual) retrainer.
//!
//! What it guarantees: gradients are exact backpropagation (checked against central finite differences
//! in the tests); training is deterministic for a given seed; a leading `normalize` layer is kept fixed
//! and the saved model has the same layout conventions as the input. What it never does: claim
//! robustness. Whether a retrained model meets a floor is decided by sound bounds afterwards, never by
//! the training loss.
//!
//! # Training a model from scratch
//!
//! ```no_run
//! use ballast::train::{new_mlp, train_cross_entropy, TrainSettings};
//! # fn demo(model_input: &ballast::model::InputSpec, data: &ballast::data::Dataset) -> Result<(), ballast::train::TrainError> {
//! // 4 classes, two hidden layers of 32 units, normalize layer fitted to `data`, seed 7.
//! let initial = new_mlp(model_input, 4, &[32, 32], data, 7)?;
//! let settings = TrainSettings { epochs: 200, seed: 7, ..TrainSettings::default() };
//! let (model, log) = train_cross_entropy(&initial, data, &settings)?;
//! println!("best epoch {}, stopped: {:?}", log.best_epoch, log.stop);
//! # let _ = model; Ok(()) }
//! ```
//!
//! `new_mlp(input, classes, &[], data, seed)` gives a softmax regression (one dense layer after the
//! normalize layer). Set `classes`, `name` and `provenance` on the returned [`crate::model::Model`] as
//! needed; the trainer keeps them.
//!
//! # Constrained retraining
//!
//! [`retrain::retrain`] runs rounds of the primal-dual trainer ([`constrained`]) with a robust loss
//! ([`robust`]: interval, linear + interval, or PGD) and checks the floor with the certify pipeline
//! after each round; `ballast retrain` is its command-line front end. With a confidence level in the
//! requirement, [`confidence`] sets the level it aims at and the rule its verdict follows.

pub mod averaging;
pub mod backprop;
pub mod bound_gradient;
pub mod candidates;
pub mod cnn;
pub mod confidence;
pub mod constrained;
pub mod curves;
pub mod dual;
pub mod duality;
pub mod gap_correction;
pub mod init;
pub mod lineage;
pub mod margin;
pub mod optimizer;
pub mod plain;
pub mod price;
pub mod provenance;
pub mod retrain;
pub mod robust;
pub(crate) mod term_batch;
pub mod terms;
pub mod validation;

pub use cnn::{new_cnn, CnnArchitecture, ConvBlock};
pub use init::{fit_normalization, he_network, new_mlp};
pub use optimizer::{Optimizer, OptimizerKind};
pub use plain::{
    train_cross_entropy, train_cross_entropy_with_validation, EpochRecord, StopReason, TrainLog,
    TrainSettings, TrainableModel,
};

/// Why training could not run.
#[derive(Debug, thiserror::Error)]
pub enum TrainError {
    /// A setting is out of range (the message names it and what was expected).
    #[error("training settings: {0}")]
    Settings(String),
    /// The data does not fit the model (the message names the sample or size).
    #[error("training data: {0}")]
    Data(String),
    /// The loss became non-finite (step size too large or inputs far out of scale).
    #[error(
        "training diverged in epoch {epoch}: the loss is not finite (try a smaller learning rate)"
    )]
    Diverged {
        /// 1-based epoch.
        epoch: usize,
    },
}
