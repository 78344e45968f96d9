//! ONNX import and export: turns an ONNX graph of fully connected or convolutional layers into a
//! [`Model`] and writes a [`Model`] back as a plain ONNX graph (Gemm / Relu, normalisation as Sub / Div,
//! Conv, BatchNormalization, MaxPool, AveragePool, Flatten).
//!
//! Import follows only the path from the graph's one data input to its score output (the logits,
//! scores or probabilities); label branches (ArgMax, ZipMap, ArrayFeatureExtractor, label casts) are
//! ignored. Affine operations on flat features (Gemm, MatMul + Add, Sub / Mul / Div by constants,
//! BatchNormalization in inference form, the `ai.onnx.ml` Scaler and LinearClassifier) are composed
//! exactly in f64; convolutions, pooling and batch normalisation on channel data become the layout's
//! layers of the same kind with the same numbers. A final Softmax (or a classifier's post-transform and
//! a following Normalizer) is dropped because it keeps the argmax, so the imported model's outputs are
//! logits. Anything else on that path is refused with an error naming the node, its op type and why —
//! import never approximates an operation it does not model. The file size is checked against a limit
//! before reading, every tensor's claimed shape is checked against the bytes actually present before
//! anything is allocated from it, and sizes only the graph claims (the data input's width, a layer's
//! unfolding) are checked against the size limit.

mod export;
mod import;
mod schema;
mod tensor;

use std::io::Read;
use std::path::Path;

pub use export::{export_model, ExportOptions, FloatPrecision};
pub use import::{import_model, ImportOptions};

use super::{Model, ModelError};

/// Why an ONNX file could not be imported or a model could not be exported.
#[derive(Debug, thiserror::Error)]
pub enum OnnxError {
    /// The file could not be read or written.
    #[error("{path}")]
    Io {
        /// The file.
        path: String,
        /// What the system said.
        source: std::io::Error,
    },
    /// The file is larger than the limit.
    #[error("{path}: file is {size} bytes, above the limit of {limit} bytes (use --allow-large to lift it)")]
    TooLarge {
        /// The file.
        path: String,
        /// Its size in bytes.
        size: u64,
        /// The limit in bytes.
        limit: u64,
    },
    /// The bytes are not a valid ONNX protobuf message.
    #[error("not a valid ONNX model (protobuf decoding failed: {message})")]
    Decode {
        /// What the decoder said.
        message: String,
    },
    /// A problem with the graph as a whole (inputs, outputs, ordering, metadata).
    #[error("{message}")]
    Graph {
        /// What is wrong and what was expected.
        message: String,
    },
    /// A tensor (initializer or constant) could not be decoded.
    #[error("tensor '{name}': {message}")]
    Tensor {
        /// The tensor's name.
        name: String,
        /// What is wrong and what was expected.
        message: String,
    },
    /// A node on the score path that ballast cannot represent exactly.
    #[error("node '{node}' ({op_type}): {reason}")]
    Unsupported {
        /// The node's name (or its position and first output when it has no name).
        node: String,
        /// The node's op type, with its domain when not the default one.
        op_type: String,
        /// Why it cannot be imported.
        reason: String,
    },
    /// The converted model does not pass the layout's validation.
    #[error("converted model is invalid: {0}")]
    Model(#[from] ModelError),
    /// Another error, located in a file.
    #[error("{path}: {inner}")]
    InFile {
        /// The ONNX file.
        path: String,
        /// The error inside it.
        inner: Box<OnnxError>,
    },
}

impl OnnxError {
    /// Attaches the file path to an error that does not name it yet.
    pub fn in_file(self, path: &Path) -> OnnxError {
        match self {
            OnnxError::Io { .. } | OnnxError::TooLarge { .. } | OnnxError::InFile { .. } => self,
            other => OnnxError::InFile {
                path: path.display().to_string(),
                inner: Box::new(other),
            },
        }
    }
}

/// True when `path` names an ONNX file (extension `.onnx`, any case).
pub fn is_onnx_path(path: &Path) -> bool {
    path.extension()
        .map(|e| e.to_string_lossy().eq_ignore_ascii_case("onnx"))
        .unwrap_or(false)
}

/// Reads an ONNX file of at most `max_bytes` bytes and imports it (see [`import_model`]).
pub fn load_onnx(path: &Path, max_bytes: u64, options: &ImportOptions) -> Result<Model, OnnxError> {
    let bytes = read_bounded(path, max_bytes)?;
    import_model(&bytes, options).map_err(|e| e.in_file(path))
}

/// Exports `model` and writes it to `path` atomically.
pub fn save_onnx(model: &Model, path: &Path, options: &ExportOptions) -> Result<(), OnnxError> {
    let bytes = export_model(model, options)?;
    crate::atomic::write_file(path, &bytes).map_err(|source| OnnxError::Io {
        path: path.display().to_string(),
        source,
    })
}

fn read_bounded(path: &Path, max_bytes: u64) -> Result<Vec<u8>, OnnxError> {
    let io = |source| OnnxError::Io {
        path: path.display().to_string(),
        source,
    };
    let file = std::fs::File::open(path).map_err(io)?;
    let size = file.metadata().map_err(io)?.len();
    if size > max_bytes {
        return Err(OnnxError::TooLarge {
            path: path.display().to_string(),
            size,
            limit: max_bytes,
        });
    }
    let mut bytes = Vec::with_capacity(size as usize);
    file.take(max_bytes.saturating_add(1))
        .read_to_end(&mut bytes)
        .map_err(io)?;
    if bytes.len() as u64 > max_bytes {
        return Err(OnnxError::TooLarge {
            path: path.display().to_string(),
            size: bytes.len() as u64,
            limit: max_bytes,
        });
    }
    Ok(bytes)
}
