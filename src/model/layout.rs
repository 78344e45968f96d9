//! The `ballast.model/1` JSON layout: parsing, validation and saving.
//!
//! Parsing never trusts a size written in the file: every matrix is checked against the sizes actually
//! present before anything is allocated from it. Every validation error names the layer index and the
//! field (`layers[2].weights: row 5 has 31 values, expected 32`); JSON syntax errors give line and column.

use std::path::Path;

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};
use serde_json::Value;

use super::conv::Conv;
use super::pool::Pool;
use super::spatial::{self, Shape, SPATIAL_KINDS};
use super::ModelError;
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

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModel {
    format: String,
    #[serde(default)]
    name: Option<String>,
    input: RawInput,
    #[serde(default)]
    classes: Option<Vec<String>>,
    layers: Vec<Value>,
    #[serde(default)]
    provenance: Option<Value>,
    #[serde(default)]
    arithmetic: Option<String>,
}

#[derive(Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
struct RawInput {
    dim: usize,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    names: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    lower: Option<RawRange>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    upper: Option<RawRange>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    shape: Option<Vec<usize>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    units: Option<Vec<String>>,
}

#[derive(Deserialize, Serialize, Clone)]
#[serde(untagged)]
enum RawRange {
    All(f64),
    Each(Vec<f64>),
}

#[derive(Deserialize, Serialize)]
#[serde(tag = "kind", rename_all = "lowercase", deny_unknown_fields)]
enum RawLayer {
    Normalize {
        mean: Vec<f64>,
        std: Vec<f64>,
    },
    Dense {
        weights: Vec<Vec<f64>>,
        bias: Vec<f64>,
    },
    Relu,
}

impl Model {
    /// Reads and validates a model file of at most [`crate::limits::MAX_MODEL_FILE_BYTES`].
    pub fn load(path: &Path) -> Result<Model, ModelError> {
        Model::load_with_limit(path, crate::limits::MAX_MODEL_FILE_BYTES)
    }

    /// Reads and validates a model file of at most `max_bytes` bytes.
    pub fn load_with_limit(path: &Path, max_bytes: u64) -> Result<Model, ModelError> {
        let text =
            crate::limits::read_text_file(path, max_bytes).map_err(|source| ModelError::Io {
                path: path.display().to_string(),
                source,
            })?;
        Model::from_json_str(&text).map_err(|e| e.in_file(path))
    }

    /// Parses and validates a model from JSON text.
    pub fn from_json_str(text: &str) -> Result<Model, ModelError> {
        if text.trim().is_empty() {
            return Err(ModelError::Invalid {
                place: "file".into(),
                message: "empty file, expected a JSON object".into(),
            });
        }
        let value: Value = serde_json::from_str(text).map_err(|e| ModelError::Syntax {
            line: e.line(),
            column: e.column(),
            message: without_position(&e.to_string()),
        })?;
        if !value.is_object() {
            return Err(ModelError::Invalid {
                place: "top level".into(),
                message: format!("expected a JSON object, found {}", json_kind(&value)),
            });
        }
        let raw: RawModel = serde_json::from_value(value).map_err(|e| ModelError::Invalid {
            place: "top level".into(),
            message: e.to_string(),
        })?;
        Model::from_raw(raw)
    }

    fn from_raw(raw: RawModel) -> Result<Model, ModelError> {
        if raw.format != MODEL_FORMAT {
            return Err(invalid(
                "format",
                format!("is \"{}\", expected \"{MODEL_FORMAT}\"", raw.format),
            ));
        }
        let arithmetic = match &raw.arithmetic {
            None => Arithmetic::Float64,
            Some(text) => match text.as_str() {
                "float64" => Arithmetic::Float64,
                "float32" => Arithmetic::Float32,
                other => {
                    return Err(invalid(
                        "arithmetic",
                        format!("is \"{other}\", expected \"float64\" or \"float32\""),
                    ))
                }
            },
        };
        let dim = raw.input.dim;
        if dim == 0 {
            return Err(invalid("input.dim", "must be at least 1".into()));
        }
        if let Some(names) = &raw.input.names {
            if names.len() != dim {
                return Err(invalid(
                    "input.names",
                    format!("has {} names, expected {dim} (input.dim)", names.len()),
                ));
            }
            let mut seen = std::collections::HashSet::new();
            for (i, n) in names.iter().enumerate() {
                if !seen.insert(n.as_str()) {
                    return Err(invalid(
                        &format!("input.names[{i}]"),
                        format!("\"{n}\" appears twice"),
                    ));
                }
            }
        }
        if let Some(units) = &raw.input.units {
            if units.len() != dim {
                return Err(invalid(
                    "input.units",
                    format!("has {} units, expected {dim} (input.dim)", units.len()),
                ));
            }
        }
        if raw.layers.is_empty() {
            return Err(invalid(
                "layers",
                "is empty, expected at least one layer".into(),
            ));
        }
        let mut layers = Vec::with_capacity(raw.layers.len().min(1024));
        let mut shape = match &raw.input.shape {
            Some(dims) => Shape::from_dims(dims, dim)?,
            None => Shape::flat(dim),
        };
        let mut width = dim;
        for (index, value) in raw.layers.into_iter().enumerate() {
            let place = format!("layers[{index}]");
            let kind = value.get("kind").and_then(Value::as_str).map(str::to_owned);
            if let Some(k) = kind.as_deref().filter(|k| SPATIAL_KINDS.contains(k)) {
                layers.push(spatial::parse(&value, k, &mut shape, &place)?);
                width = shape.size();
                continue;
            }
            let raw_layer: RawLayer = serde_json::from_value(value).map_err(|e| {
                invalid(
                    &place,
                    match kind {
                        None => format!(
                            "{e} (expected an object with \"kind\": dense, relu, normalize, \
                             conv, batchnorm, averagepool, maxpool or flatten)"
                        ),
                        Some(_) => e.to_string(),
                    },
                )
            })?;
            let layer = match raw_layer {
                RawLayer::Normalize { mean, std } => {
                    check_vector(&mean, width, &format!("{place}.mean"))?;
                    check_vector(&std, width, &format!("{place}.std"))?;
                    if let Some(i) = std.iter().position(|s| *s <= 0.0) {
                        return Err(invalid(
                            &format!("{place}.std"),
                            format!("entry {i} is {}, expected > 0", std[i]),
                        ));
                    }
                    Layer::Normalize {
                        mean: DVector::from_vec(mean),
                        std: DVector::from_vec(std),
                    }
                }
                RawLayer::Dense { weights, bias } => {
                    let out = weights.len();
                    if out == 0 {
                        return Err(invalid(
                            &format!("{place}.weights"),
                            "has no rows, expected at least one".into(),
                        ));
                    }
                    for (r, row) in weights.iter().enumerate() {
                        if row.len() != width {
                            return Err(invalid(
                                &format!("{place}.weights"),
                                format!("row {r} has {} values, expected {width}", row.len()),
                            ));
                        }
                        if let Some(c) = row.iter().position(|v| !v.is_finite()) {
                            return Err(invalid(
                                &format!("{place}.weights"),
                                format!("row {r} column {c} is not a finite number"),
                            ));
                        }
                    }
                    check_vector(&bias, out, &format!("{place}.bias"))?;
                    let weights = DMatrix::from_fn(out, width, |r, c| weights[r][c]);
                    width = out;
                    shape = Shape::flat(out);
                    Layer::Dense {
                        weights,
                        bias: DVector::from_vec(bias),
                    }
                }
                RawLayer::Relu => Layer::Relu,
            };
            layers.push(layer);
        }
        // `input.dim` is trusted only once a layer's actual size has confirmed it: the ranges below are
        // allocated from it, so a relu-only model could otherwise claim any size in a tiny file.
        if !layers
            .iter()
            .any(|l| matches!(l, Layer::Dense { .. } | Layer::Conv(_)))
        {
            return Err(invalid(
                "layers",
                "has no dense or conv layer, expected at least one".into(),
            ));
        }
        let lower = expand_range(
            raw.input.lower.as_ref(),
            dim,
            f64::NEG_INFINITY,
            "input.lower",
        )?;
        let upper = expand_range(raw.input.upper.as_ref(), dim, f64::INFINITY, "input.upper")?;
        for i in 0..dim {
            if lower[i] > upper[i] {
                return Err(invalid(
                    "input",
                    format!(
                        "feature {i}: lower {} is above upper {}",
                        lower[i], upper[i]
                    ),
                ));
            }
        }
        if let Some(classes) = &raw.classes {
            let expected = if width == 1 { 2 } else { width };
            if classes.len() != expected {
                return Err(invalid(
                    "classes",
                    format!(
                        "has {} names, expected {expected} (the model has {width} output{})",
                        classes.len(),
                        if width == 1 {
                            ", a binary classifier"
                        } else {
                            "s"
                        }
                    ),
                ));
            }
        }
        Ok(Model {
            name: raw.name,
            input: InputSpec {
                dim,
                names: raw.input.names,
                lower,
                upper,
                shape: raw.input.shape,
                units: raw.input.units,
            },
            classes: raw.classes,
            layers,
            provenance: raw.provenance,
            arithmetic,
        })
    }

    /// Number of weights and biases in all dense and conv layers.
    pub fn parameter_count(&self) -> usize {
        self.layers
            .iter()
            .map(|l| match l {
                Layer::Dense { weights, bias } => weights.len() + bias.len(),
                Layer::Conv(c) => c.kernel.len() + c.bias.len(),
                _ => 0,
            })
            .sum()
    }

    /// Number of weights and biases the folded canonical network holds (see
    /// [`Model::network`](crate::model::Model::network)), counting also the intermediate maps built while
    /// folding (a `normalize` layer of width `w` folds through a `w × w` map). Computed from the layer
    /// shapes without building anything, so it can be checked against a limit first: a chain of dense
    /// layers without a ReLU between them multiplies out and may hold far more numbers than the file.
    /// Saturates at `usize::MAX`.
    pub fn network_parameter_count(&self) -> usize {
        let size = |out: usize, input: usize| out.saturating_mul(input).saturating_add(out);
        let mut total = 0usize;
        // (outputs, inputs) of the affine map being composed since the last ReLU
        let mut pending: Option<(usize, usize)> = None;
        let mut width = self.input.dim;
        let mut last_was_relu = false;
        for layer in &self.layers {
            match layer {
                Layer::Normalize { .. } => {
                    total = total.saturating_add(size(width, width));
                    let input = pending.map_or(width, |(_, input)| input);
                    total = total.saturating_add(size(width, input));
                    pending = Some((width, input));
                    last_was_relu = false;
                }
                Layer::Dense { weights, .. } => {
                    let input = pending.map_or(width, |(_, input)| input);
                    width = weights.nrows();
                    total = total.saturating_add(size(width, input));
                    pending = Some((width, input));
                    last_was_relu = false;
                }
                Layer::Relu => {
                    if !last_was_relu && pending.take().is_none() {
                        total = total.saturating_add(size(width, width));
                    }
                    last_was_relu = true;
                }
                // Kept as structured parts (never multiplied out): their own size, plus the
                // lowering of a max pool (at most three units per window entry).
                Layer::Conv(c) => {
                    width = c.shape.output_dim();
                    total = total.saturating_add(c.kernel.len() + c.bias.len());
                    pending = None;
                    last_was_relu = false;
                }
                Layer::Pool(p) => {
                    let entries = p.output_dim() * p.kernel.0 * p.kernel.1;
                    total = total.saturating_add(entries.saturating_mul(6));
                    width = p.output_dim();
                    pending = None;
                    last_was_relu = false;
                }
                Layer::BatchNorm { .. } => {
                    total = total.saturating_add(width.saturating_mul(4));
                    pending = None;
                    last_was_relu = false;
                }
                Layer::Flatten => {}
            }
        }
        if pending.is_none() {
            total = total.saturating_add(size(width, width));
        }
        total
    }

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

    /// The model in the JSON layout, as a `serde_json::Value`.
    pub fn to_json_value(&self) -> Value {
        let mut layers = Vec::with_capacity(self.layers.len());
        let mut rank = self.input.shape.as_ref().map_or(0, |s| s.len() - 1);
        for layer in &self.layers {
            if let Some(value) = spatial::to_json(layer, rank) {
                if matches!(layer, Layer::Flatten) {
                    rank = 0;
                }
                layers.push(value);
                continue;
            }
            let raw = match layer {
                Layer::Normalize { mean, std } => RawLayer::Normalize {
                    mean: mean.iter().copied().collect(),
                    std: std.iter().copied().collect(),
                },
                Layer::Dense { weights, bias } => RawLayer::Dense {
                    weights: (0..weights.nrows())
                        .map(|r| weights.row(r).iter().copied().collect())
                        .collect(),
                    bias: bias.iter().copied().collect(),
                },
                Layer::Relu => RawLayer::Relu,
                _ => unreachable!("spatial layers are written above"),
            };
            if matches!(layer, Layer::Dense { .. }) {
                rank = 0;
            }
            layers.push(serde_json::to_value(raw).expect("layers serialise"));
        }
        let input = RawInput {
            dim: self.input.dim,
            names: self.input.names.clone(),
            lower: compact_range(&self.input.lower),
            upper: compact_range(&self.input.upper),
            shape: self.input.shape.clone(),
            units: self.input.units.clone(),
        };
        let mut object = serde_json::Map::new();
        object.insert("format".into(), Value::from(MODEL_FORMAT));
        if let Some(name) = &self.name {
            object.insert("name".into(), Value::from(name.clone()));
        }
        object.insert(
            "input".into(),
            serde_json::to_value(input).expect("input serialises"),
        );
        if let Some(classes) = &self.classes {
            object.insert("classes".into(), Value::from(classes.clone()));
        }
        object.insert("layers".into(), Value::Array(layers));
        if let Some(p) = &self.provenance {
            object.insert("provenance".into(), p.clone());
        }
        if self.arithmetic != Arithmetic::Float64 {
            object.insert("arithmetic".into(), Value::from(self.arithmetic.name()));
        }
        Value::Object(object)
    }

    /// The model as pretty-printed JSON text in the layout.
    pub fn to_json_string(&self) -> String {
        let mut text =
            serde_json::to_string_pretty(&self.to_json_value()).expect("model serialises");
        text.push('\n');
        text
    }

    /// Writes the model atomically (temporary file in the same folder, fsync, rename).
    pub fn save(&self, path: &Path) -> Result<(), ModelError> {
        crate::atomic::write_file(path, self.to_json_string().as_bytes()).map_err(|source| {
            ModelError::Io {
                path: path.display().to_string(),
                source,
            }
        })
    }
}

fn invalid(place: &str, message: String) -> ModelError {
    ModelError::Invalid {
        place: place.to_owned(),
        message,
    }
}

/// serde_json appends " at line L column C"; the error already carries those separately.
fn without_position(message: &str) -> String {
    match message.rfind(" at line ") {
        Some(i) => message[..i].to_owned(),
        None => message.to_owned(),
    }
}

fn json_kind(value: &Value) -> &'static str {
    match value {
        Value::Null => "null",
        Value::Bool(_) => "a boolean",
        Value::Number(_) => "a number",
        Value::String(_) => "a string",
        Value::Array(_) => "an array",
        Value::Object(_) => "an object",
    }
}

fn check_vector(values: &[f64], expected: usize, place: &str) -> Result<(), ModelError> {
    if values.len() != expected {
        return Err(invalid(
            place,
            format!("has {} values, expected {expected}", values.len()),
        ));
    }
    if let Some(i) = values.iter().position(|v| !v.is_finite()) {
        return Err(invalid(place, format!("entry {i} is not a finite number")));
    }
    Ok(())
}

fn expand_range(
    range: Option<&RawRange>,
    dim: usize,
    default: f64,
    place: &str,
) -> Result<Vec<f64>, ModelError> {
    match range {
        None => Ok(vec![default; dim]),
        Some(RawRange::All(v)) => {
            if !v.is_finite() {
                return Err(invalid(place, "is not a finite number".into()));
            }
            Ok(vec![*v; dim])
        }
        Some(RawRange::Each(values)) => {
            check_vector(values, dim, place)?;
            Ok(values.clone())
        }
    }
}

fn compact_range(values: &[f64]) -> Option<RawRange> {
    let first = *values.first()?;
    if values.iter().all(|v| *v == first) {
        if first.is_finite() {
            Some(RawRange::All(first))
        } else {
            None
        }
    } else {
        Some(RawRange::Each(values.to_vec()))
    }
}
