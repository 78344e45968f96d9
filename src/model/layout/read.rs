//! Reading a `ballast.model/1` file: JSON text to a validated [`Model`].
//!
//! Parsing never trusts a size written in the file: every matrix is checked against the sizes actually
//! present before anything is allocated from it, and `input.dim` only once a layer has confirmed it.
//! Every validation error names the layer index and the field; JSON syntax errors give line and column.

use std::path::Path;

use nalgebra::{DMatrix, DVector};
use serde_json::Value;

use super::raw::{RawLayer, RawModel, RawRange};
use super::{InputSpec, Layer, Model, MODEL_FORMAT};
use crate::engine::Arithmetic;
use crate::model::spatial::{self, Shape, SPATIAL_KINDS};
use crate::model::ModelError;

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
