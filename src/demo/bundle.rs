//! The demo files embedded in the binary, so `ballast demo` works from any folder: the committed
//! `demo-data/` files and `models/` files, byte for byte as they are in the repository.
//!
//! [`write_bundle`] puts them into a folder (`demo-data/` and `models/` inside it), each file written
//! atomically. The embedded text is never changed or regenerated here; `ballast generate-demo`
//! regenerates the committed files, and a rebuild embeds the new ones.

use std::path::{Path, PathBuf};

use super::files::{
    write_all, ACCEPTANCE_FILE, REQUIREMENT_FILE, SPECTRUM_ACCEPTANCE_FILE,
    SPECTRUM_REQUIREMENT_FILE, SPECTRUM_TOLERANCE_FILE, SPECTRUM_TRAIN_FILE, TOLERANCE_FILE,
    TRAIN_FILE,
};
use super::models::{CNN_FILE, LINEAR_FILE, MLP_FILE};
use super::DemoError;

/// Folder of the data files inside a bundle.
pub const DATA_FOLDER: &str = "demo-data";
/// Folder of the models inside a bundle.
pub const MODEL_FOLDER: &str = "models";

/// The committed `demo-data/` files as `(file name, text)`.
pub const DATA_FILES: [(&str, &str); 8] = [
    (TRAIN_FILE, include_str!("../../demo-data/train.csv")),
    (
        ACCEPTANCE_FILE,
        include_str!("../../demo-data/acceptance.csv"),
    ),
    (
        TOLERANCE_FILE,
        include_str!("../../demo-data/tolerances.json"),
    ),
    (
        REQUIREMENT_FILE,
        include_str!("../../demo-data/requirement.toml"),
    ),
    (
        SPECTRUM_TRAIN_FILE,
        include_str!("../../demo-data/spectrum-train.csv"),
    ),
    (
        SPECTRUM_ACCEPTANCE_FILE,
        include_str!("../../demo-data/spectrum-acceptance.csv"),
    ),
    (
        SPECTRUM_TOLERANCE_FILE,
        include_str!("../../demo-data/spectrum-tolerances.json"),
    ),
    (
        SPECTRUM_REQUIREMENT_FILE,
        include_str!("../../demo-data/spectrum-requirement.toml"),
    ),
];

/// The committed `models/` files as `(file name, text)`.
pub const MODEL_FILES: [(&str, &str); 3] = [
    (LINEAR_FILE, include_str!("../../models/pump-linear.json")),
    (MLP_FILE, include_str!("../../models/pump-mlp.json")),
    (CNN_FILE, include_str!("../../models/pump-cnn.json")),
];

/// Where the bundle's files went.
#[derive(Debug, Clone, PartialEq)]
pub struct BundlePaths {
    /// The training data.
    pub train: PathBuf,
    /// The acceptance data.
    pub acceptance: PathBuf,
    /// The per-feature tolerance file.
    pub tolerances: PathBuf,
    /// The requirement file.
    pub requirement: PathBuf,
    /// The linear model.
    pub linear_model: PathBuf,
    /// The ReLU model.
    pub mlp_model: PathBuf,
    /// The spectrum training data.
    pub spectrum_train: PathBuf,
    /// The spectrum acceptance data.
    pub spectrum_acceptance: PathBuf,
    /// The spectrum requirement file.
    pub spectrum_requirement: PathBuf,
    /// The spectrum CNN.
    pub cnn_model: PathBuf,
}

/// Writes the embedded files into `folder/demo-data/` and `folder/models/` (created if missing).
pub fn write_bundle(folder: &Path) -> Result<BundlePaths, DemoError> {
    let data = folder.join(DATA_FOLDER);
    let models = folder.join(MODEL_FOLDER);
    write_all(&data, DATA_FILES)?;
    write_all(&models, MODEL_FILES)?;
    Ok(BundlePaths {
        train: data.join(TRAIN_FILE),
        acceptance: data.join(ACCEPTANCE_FILE),
        tolerances: data.join(TOLERANCE_FILE),
        requirement: data.join(REQUIREMENT_FILE),
        linear_model: models.join(LINEAR_FILE),
        mlp_model: models.join(MLP_FILE),
        spectrum_train: data.join(SPECTRUM_TRAIN_FILE),
        spectrum_acceptance: data.join(SPECTRUM_ACCEPTANCE_FILE),
        spectrum_requirement: data.join(SPECTRUM_REQUIREMENT_FILE),
        cnn_model: models.join(CNN_FILE),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn embedded_data_match_the_generator() {
        let data = crate::demo::generator::generate(crate::demo::scenario::DEFAULT_SEED);
        assert!(
            DATA_FILES[0].1 == data.train.to_csv(),
            "demo-data/train.csv is stale: run generate-demo"
        );
        assert!(
            DATA_FILES[1].1 == data.acceptance.to_csv(),
            "demo-data/acceptance.csv is stale"
        );
        assert!(
            DATA_FILES[2].1 == crate::demo::files::tolerance_json(),
            "tolerances.json is stale"
        );
        assert!(
            DATA_FILES[3].1 == crate::demo::files::requirement_toml(),
            "requirement.toml is stale"
        );
        assert!(
            DATA_FILES[4].1 == data.spectrum_train.to_csv(),
            "spectrum-train.csv is stale"
        );
        assert!(
            DATA_FILES[5].1 == data.spectrum_acceptance.to_csv(),
            "spectrum-acceptance.csv is stale"
        );
        assert!(
            DATA_FILES[6].1 == crate::demo::files::spectrum_tolerance_json(),
            "spectrum-tolerances.json is stale"
        );
        assert!(
            DATA_FILES[7].1 == crate::demo::files::spectrum_requirement_toml(),
            "spectrum-requirement.toml is stale"
        );
    }
}
