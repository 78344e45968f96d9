//! The `ballast.model/1` JSON layout: the validated model as written in a file, layer by layer, and
//! what it says about itself (sizes, class and feature names). Reading and validating is in `read`,
//! writing back in `write`, the parameter counts checked before folding in `size`.
//!
//! Parsing never trusts a size written in the file: every matrix is checked against the sizes actually
//! present before anything is allocated from it. Every validation error names the layer index and the
//! field (`layers[2].weights: row 5 has 31 values, expected 32`); JSON syntax errors give line and column.

mod raw;
mod read;
mod size;
mod write;

use nalgebra::{DMatrix, DVector};
use serde_json::Value;

use super::conv::Conv;
use super::pool::Pool;
use crate::engine::Arithmetic;

/// The format tag every model file carries.
pub const MODEL_FORMAT: &str = "ballast.model/1";

/// The valid input range and naming of a model's input features (raw units, before any normalize layer).
#[derive(Debug, Clone, PartialEq)]
pub struct InputSpec {
    /// Number of input features.
    pub dim: usize,
    /// Optional feature names, one per feature, used to match data columns.
    pub names: Option<Vec<String>>,
    /// Lower end of the valid range per feature (−∞ when unbounded).
    pub lower: Vec<f64>,
    /// Upper end of the valid range per feature (+∞ when unbounded).
    pub upper: Vec<f64>,
    /// The feature shape (`input.shape`: `[C, L]` or `[C, H, W]`, flattened row-major), when stated.
    pub shape: Option<Vec<usize>>,
    /// Optional physical unit of each feature (`input.units`, e.g. `mm/s`), shown on the sheet.
    pub units: Option<Vec<String>>,
}

/// One layer of the layout, validated.
#[derive(Debug, Clone, PartialEq)]
pub enum Layer {
    /// Elementwise `(x − mean) / std`, std > 0.
    Normalize {
        /// Per-feature mean.
        mean: DVector<f64>,
        /// Per-feature standard deviation, all > 0.
        std: DVector<f64>,
    },
    /// Affine map `W x + b`, `W` of shape out × in.
    Dense {
        /// Weights, one row per output unit.
        weights: DMatrix<f64>,
        /// Bias, one entry per output unit.
        bias: DVector<f64>,
    },
    /// Elementwise `max(0, x)`.
    Relu,
    /// A 1-D or 2-D convolution (see [`crate::model::conv`]).
    Conv(Conv),
    /// Inference-form batch normalisation per channel:
    /// `scale · (x − mean) / sqrt(variance + epsilon) + shift`.
    BatchNorm {
        /// Per-channel scale (γ).
        scale: DVector<f64>,
        /// Per-channel shift (β).
        shift: DVector<f64>,
        /// Per-channel running mean.
        mean: DVector<f64>,
        /// Per-channel running variance.
        variance: DVector<f64>,
        /// Added to the variance.
        epsilon: f64,
        /// Spatial positions per channel.
        positions: usize,
    },
    /// Average or max pooling (see [`crate::model::pool`]).
    Pool(Pool),
    /// Marks the end of the spatial layers (the features are already flat row-major: no-op).
    Flatten,
}

/// A validated model in the `ballast.model/1` layout, kept layer by layer for saving.
#[derive(Debug, Clone, PartialEq)]
pub struct Model {
    /// Optional model name.
    pub name: Option<String>,
    /// Input size, names and valid range.
    pub input: InputSpec,
    /// Optional class names; when present, one per output class.
    pub classes: Option<Vec<String>>,
    /// The layers as written in the file.
    pub layers: Vec<Layer>,
    /// Free-form provenance (never validated beyond being JSON).
    pub provenance: Option<Value>,
    /// The floating-point format the model is evaluated in where it is deployed (`arithmetic` in the
    /// file; float64 when absent). Certificates cover evaluation in this format.
    pub arithmetic: Arithmetic,
}

impl Model {
    /// Size of the output layer (1 means a binary classifier on the sign of the logit).
    pub fn output_dim(&self) -> usize {
        self.layers
            .iter()
            .rev()
            .find_map(|l| match l {
                Layer::Dense { weights, .. } => Some(weights.nrows()),
                Layer::Conv(c) => Some(c.shape.output_dim()),
                Layer::Pool(p) => Some(p.output_dim()),
                _ => None,
            })
            .unwrap_or(self.input.dim)
    }

    /// Number of classes the model decides between (2 for a 1-output model).
    pub fn class_count(&self) -> usize {
        let out = self.output_dim();
        if out == 1 {
            2
        } else {
            out
        }
    }

    /// Name of class `index`: from `classes` when present, otherwise the index itself.
    pub fn class_name(&self, index: usize) -> String {
        match &self.classes {
            Some(c) if index < c.len() => c[index].clone(),
            _ => index.to_string(),
        }
    }

    /// Name of input feature `index`: from `input.names` when present, otherwise `x{index}`.
    pub fn feature_name(&self, index: usize) -> String {
        match &self.input.names {
            Some(n) if index < n.len() => n[index].clone(),
            _ => format!("x{index}"),
        }
    }
}
