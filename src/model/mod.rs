//! Models: the `ballast.model/1` JSON layout ([`layout`]) and the canonical ReLU network every stage
//! works on ([`network`]), and the retraining record a retrained model carries ([`lineage`]).

pub mod affine;
pub mod conv;
pub mod deployed;
pub mod layout;
pub mod lineage;
pub mod network;
pub mod onnx;
pub mod pool;
pub mod sparse;
pub mod spatial;

pub use affine::Affine;
pub use conv::{Conv, ConvShape};
pub use layout::{InputSpec, Layer, Model, MODEL_FORMAT};
pub use network::{predicted_class, Dense, Network, Normalization};
pub use sparse::Sparse;

/// Why a model could not be read or written.
#[derive(Debug, thiserror::Error)]
pub enum ModelError {
    /// The file could not be read or written.
    #[error("{path}")]
    Io {
        /// The file.
        path: String,
        /// What the system said.
        source: std::io::Error,
    },
    /// The text is not valid JSON.
    #[error("JSON syntax error at line {line}, column {column}: {message}")]
    Syntax {
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What the parser said.
        message: String,
    },
    /// The JSON is valid but does not describe a valid model.
    #[error("{place}: {message}")]
    Invalid {
        /// Where in the layout (e.g. `layers[2].weights`).
        place: String,
        /// What is wrong and what was expected.
        message: String,
    },
    /// Another error, located in a file.
    #[error("{path}: {inner}")]
    InFile {
        /// The model file.
        path: String,
        /// The error inside it.
        inner: Box<ModelError>,
    },
}

impl ModelError {
    /// Attaches the file path to an error that does not name it yet.
    pub fn in_file(self, path: &std::path::Path) -> ModelError {
        match self {
            ModelError::Io { .. } | ModelError::InFile { .. } => self,
            other => ModelError::InFile {
                path: path.display().to_string(),
                inner: Box::new(other),
            },
        }
    }
}
