//! Writing a model back in the `ballast.model/1` layout: the JSON value, its pretty-printed text, and
//! an atomic save. Reading the written text gives the same model (ranges that are the same for every
//! feature are written once; unbounded ones are left out).

use std::path::Path;

use serde_json::Value;

use super::raw::{RawInput, RawLayer, RawRange};
use super::{Layer, Model, MODEL_FORMAT};
use crate::engine::Arithmetic;
use crate::model::spatial;
use crate::model::ModelError;

impl Model {
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
