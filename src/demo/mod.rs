//! The bundled demo scenario: an invented pump-fleet condition-monitoring data set, its seeded
//! generator, its files and its models.
//!
//! [`scenario`] holds the tables (features, units, ranges, tolerances, classes), [`spectrum`] the
//! second input form (64-bin vibration spectra and their generator), [`generator`] makes the data
//! deterministically from a seed, [`files`] writes the data, tolerance and requirement files,
//! [`models`] trains the three demo models, [`bundle`] embeds the committed files in the binary,
//! [`case`] certifies, retrains and certifies again one model, and [`pipeline`] runs the whole job
//! (`ballast demo`).
//! Everything here is invented for the demo only; nothing here decides robustness itself.

pub mod bundle;
pub mod case;
pub mod files;
pub mod generator;
pub mod models;
pub mod pipeline;
pub mod scenario;
pub mod spectrum;

/// Why a demo step failed.
#[derive(Debug, thiserror::Error)]
pub enum DemoError {
    /// A file or folder could not be written or read.
    #[error("{path}: {cause}")]
    Io {
        /// The file or folder.
        path: String,
        /// What the system said.
        cause: std::io::Error,
    },
    /// Training a demo model failed.
    #[error("training the demo model: {0}")]
    Train(#[from] crate::train::TrainError),
    /// A demo model could not be read or saved.
    #[error(transparent)]
    Model(#[from] crate::model::ModelError),
    /// A demo data file could not be read.
    #[error(transparent)]
    Data(#[from] crate::data::DataError),
    /// The demo requirement could not be read.
    #[error(transparent)]
    Requirement(#[from] crate::threat::requirement::RequirementError),
    /// Certification could not run.
    #[error("certify: {0}")]
    Certify(#[from] crate::certify::CertifyError),
    /// A sheet could not be written.
    #[error(transparent)]
    Sheet(#[from] crate::sheet::SheetError),
}
