//! The serde shapes of a `ballast.model/1` file (the JSON as written, before any check), shared by
//! reading and writing. Unknown fields are refused; nothing here validates a value.

use serde::{Deserialize, Serialize};
use serde_json::Value;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawModel {
    pub(super) format: String,
    #[serde(default)]
    pub(super) name: Option<String>,
    pub(super) input: RawInput,
    #[serde(default)]
    pub(super) classes: Option<Vec<String>>,
    pub(super) layers: Vec<Value>,
    #[serde(default)]
    pub(super) provenance: Option<Value>,
    #[serde(default)]
    pub(super) arithmetic: Option<String>,
}

#[derive(Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawInput {
    pub(super) dim: usize,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(super) names: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(super) lower: Option<RawRange>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(super) upper: Option<RawRange>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(super) shape: Option<Vec<usize>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(super) units: Option<Vec<String>>,
}

#[derive(Deserialize, Serialize, Clone)]
#[serde(untagged)]
pub(super) enum RawRange {
    All(f64),
    Each(Vec<f64>),
}

#[derive(Deserialize, Serialize)]
#[serde(tag = "kind", rename_all = "lowercase", deny_unknown_fields)]
pub(super) enum RawLayer {
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
