//! The three demo models, trained from scratch by the project's plain cross-entropy trainer on the
//! generated training sets: `pump-linear` (normalize + one dense layer: softmax regression) and
//! `pump-mlp` (normalize + 12-32-32-4 ReLU network) on the twelve readings, `pump-cnn` (a small 1-D
//! CNN, [`cnn_architecture`]) on the 64-bin spectra.
//!
//! All carry the scenario's input names, valid ranges and class names, and a provenance record
//! (generator seed, training-data digest, trainer settings, epochs). Training is deterministic for a
//! given seed on one platform; across platforms the committed models are the reference, not a rerun.
//! Nothing here claims robustness: the plain trainer never looks at it.

use serde_json::json;

use super::generator::GeneratedSet;
use super::scenario::{self, CLASSES};
use super::spectrum;
use super::DemoError;
use crate::model::pool::PoolOp;
use crate::model::{InputSpec, Model};
use crate::train::{
    new_cnn, new_mlp, train_cross_entropy, CnnArchitecture, ConvBlock, OptimizerKind, TrainLog,
    TrainSettings,
};

/// File name of the linear demo model inside the models folder.
pub const LINEAR_FILE: &str = "pump-linear.json";
/// File name of the ReLU demo model inside the models folder.
pub const MLP_FILE: &str = "pump-mlp.json";

/// File name of the spectrum CNN inside the models folder.
pub const CNN_FILE: &str = "pump-cnn.json";

/// Hidden layer sizes of `pump-mlp`.
pub const MLP_HIDDEN: [usize; 2] = [32, 32];

/// The layers of `pump-cnn` after its normalize layer: conv 4×5 pad 2, relu, average pool 2, conv
/// 4×3 pad 1, relu, average pool 2, flatten (4 channels × 16 positions), dense 16, relu, dense 4
/// (1,184 parameters, 400 ReLUs). Average pooling keeps the bounds cheap: a max pool is written as
/// extra ReLU layers, and each unstable one costs the sound linear bounds a backward pass
/// (docs/benchmarks/cnn-retrain.md).
pub fn cnn_architecture() -> CnnArchitecture {
    let block = |kernel: usize| ConvBlock {
        channels: 4,
        kernel,
        stride: 1,
        padding: kernel / 2,
        pool: Some((PoolOp::Average, 2)),
    };
    CnnArchitecture {
        blocks: vec![block(5), block(3)],
        hidden: vec![16],
    }
}

/// A trained demo model with its training history.
#[derive(Debug, Clone)]
pub struct TrainedModel {
    /// The model in the layout, with names, ranges, classes and provenance.
    pub model: Model,
    /// The trainer's log.
    pub log: TrainLog,
}

/// The input specification of the scenario: names and valid ranges of the twelve features.
pub fn input_spec() -> InputSpec {
    InputSpec {
        dim: scenario::FEATURES.len(),
        names: Some(scenario::feature_names()),
        lower: scenario::lower_bounds(),
        upper: scenario::upper_bounds(),
        shape: None,
        units: Some(
            scenario::FEATURES
                .iter()
                .map(|f| f.unit.to_string())
                .collect(),
        ),
    }
}

/// The input specification of the spectra: 64 bins in mm/s, shape `[1, 64]` (one channel).
pub fn spectrum_input_spec() -> InputSpec {
    InputSpec {
        dim: spectrum::BINS,
        names: Some(spectrum::bin_names()),
        lower: vec![0.0; spectrum::BINS],
        upper: vec![spectrum::UPPER; spectrum::BINS],
        shape: Some(vec![1, spectrum::BINS]),
        units: Some(vec![spectrum::UNIT.to_string(); spectrum::BINS]),
    }
}

/// The trainer settings used for every demo model (seeded by `seed`).
pub fn train_settings(seed: u64) -> TrainSettings {
    TrainSettings {
        epochs: 150,
        batch_size: 32,
        optimizer: OptimizerKind::adam(0.003),
        weight_decay: 1e-4,
        seed,
        validation_fraction: 0.15,
        patience: Some(20),
    }
}

/// Trains the model `name` with `hidden` layer sizes on `train` (generated with `data_seed`).
pub fn train_model(
    name: &str,
    hidden: &[usize],
    train: &GeneratedSet,
    data_seed: u64,
    train_seed: u64,
) -> Result<TrainedModel, DemoError> {
    let data = train.to_dataset();
    let initial = new_mlp(&input_spec(), CLASSES.len(), hidden, &data, train_seed)?;
    finish(name, initial, train, "train.csv", data_seed, train_seed)
}

/// Trains `pump-cnn` ([`cnn_architecture`]) on the spectra `train` (generated with `data_seed`).
pub fn train_cnn_model(
    train: &GeneratedSet,
    data_seed: u64,
    train_seed: u64,
) -> Result<TrainedModel, DemoError> {
    let data = train.to_dataset();
    let architecture = cnn_architecture();
    let initial = new_cnn(
        &spectrum_input_spec(),
        CLASSES.len(),
        &architecture,
        &data,
        train_seed,
    )?;
    let mut trained = finish(
        "pump-cnn",
        initial,
        train,
        super::files::SPECTRUM_TRAIN_FILE,
        data_seed,
        train_seed,
    )?;
    if let Some(serde_json::Value::Object(map)) = &mut trained.model.provenance {
        map.insert(
            "architecture".into(),
            architecture.describe(CLASSES.len()).into(),
        );
    }
    Ok(trained)
}

/// Names `initial`, trains it on `train` and records the provenance.
fn finish(
    name: &str,
    mut initial: Model,
    train: &GeneratedSet,
    file: &str,
    data_seed: u64,
    train_seed: u64,
) -> Result<TrainedModel, DemoError> {
    initial.name = Some(name.to_owned());
    initial.classes = Some(scenario::class_names());
    let settings = train_settings(train_seed);
    let (mut model, log) = train_cross_entropy(&initial, &train.to_dataset(), &settings)?;
    let training_digest = crate::digest::sha256_bytes(train.to_csv().as_bytes());
    model.provenance = Some(json!({
        "scenario": "invented pump-fleet demo (docs/demo-scenario.md); not real data",
        "made_by": format!("ballast {} generate-demo", env!("CARGO_PKG_VERSION")),
        "data_seed": data_seed,
        "training_data": format!("demo-data/{file}"),
        "training_data_sha256": training_digest,
        "trainer": "plain cross-entropy (train::train_cross_entropy)",
        "trainer_seed": train_seed,
        "settings": settings,
        "epochs_run": log.epochs.len(),
        "best_epoch": log.best_epoch,
        "stop": log.stop,
        "training_samples": log.training_samples,
        "validation_samples": log.validation_samples,
    }));
    Ok(TrainedModel { model, log })
}

/// Trains `pump-linear` and `pump-mlp` on `train`.
pub fn train_demo_models(
    train: &GeneratedSet,
    data_seed: u64,
) -> Result<(TrainedModel, TrainedModel), DemoError> {
    let linear = train_model("pump-linear", &[], train, data_seed, data_seed)?;
    let mlp = train_model("pump-mlp", &MLP_HIDDEN, train, data_seed, data_seed)?;
    Ok((linear, mlp))
}
