//! The imported model as a whole: the data input's shape and element type, the input range, names and
//! classes from the options or the file's metadata, the provenance, and a final validation.
//!
//! Guarantee: the returned [`Model`] satisfies the layout's rules (sizes chain through every layer,
//! numbers finite, classes and names fit); a float32 graph gives a model with `arithmetic: float32`,
//! and a data input with channels (`[batch, C, L]` or `[batch, C, H, W]`) gives `input.shape`.

use std::collections::{HashMap, HashSet};

use serde_json::json;

use super::super::schema::{
    tensor_proto::DataType, tensor_shape_proto::dimension, type_proto, GraphProto, ModelProto,
    ValueInfoProto,
};
use super::{
    graph_error, Converted, ImportOptions, OnnxError, META_CLASSES, META_LOWER, META_NAMES,
    META_UPPER,
};
use crate::engine::Arithmetic;
use crate::model::{InputSpec, Layer, Model, ModelError};

/// The data input's shape without the batch dimension (every other dimension fixed and positive).
pub(super) fn input_shape(input: &ValueInfoProto) -> Result<Vec<usize>, OnnxError> {
    let name = input.name.clone().unwrap_or_default();
    let tensor = match input.r#type.as_ref().and_then(|t| t.value.as_ref()) {
        Some(type_proto::Value::TensorType(t)) => t,
        _ => return Err(graph_error(format!("data input '{name}' is not a tensor"))),
    };
    let element = tensor.elem_type.unwrap_or(0);
    if element != DataType::Float as i32 && element != DataType::Double as i32 {
        return Err(graph_error(format!(
            "data input '{name}' has element type {element}; expected FLOAT or DOUBLE"
        )));
    }
    let dims = tensor.shape.as_ref().ok_or_else(|| {
        graph_error(format!(
            "data input '{name}' has no shape; expected [batch, features]"
        ))
    })?;
    if dims.dim.len() < 2 {
        return Err(graph_error(format!(
            "data input '{name}' has rank {}; expected [batch, features]",
            dims.dim.len()
        )));
    }
    let mut shape = Vec::new();
    for (i, d) in dims.dim.iter().enumerate().skip(1) {
        match d.value {
            Some(dimension::Value::DimValue(v)) if v > 0 => shape.push(v as usize),
            _ => {
                return Err(graph_error(format!(
                    "data input '{name}': dimension {i} is dynamic or not positive; only the batch dimension may be dynamic"
                )))
            }
        }
    }
    if shape
        .iter()
        .try_fold(1usize, |a, d| a.checked_mul(*d))
        .is_none()
    {
        return Err(graph_error(format!(
            "data input '{name}': the feature count overflows"
        )));
    }
    Ok(shape)
}

fn parse_metadata<T: serde::de::DeserializeOwned>(
    metadata: &HashMap<&str, &str>,
    key: &str,
) -> Result<Option<T>, OnnxError> {
    match metadata.get(key) {
        None => Ok(None),
        Some(text) => serde_json::from_str(text)
            .map(Some)
            .map_err(|e| graph_error(format!("metadata '{key}': {e}"))),
    }
}

pub(super) fn assemble(
    proto: &ModelProto,
    graph: &GraphProto,
    converted: Converted,
    metadata: &HashMap<&str, &str>,
    options: &ImportOptions,
) -> Result<Model, OnnxError> {
    let Converted {
        mut path,
        input_dim: dim,
        input_dims,
        input_name,
        score_name,
        dropped,
        graph_labels,
    } = converted;
    // The graph evaluates in the element type of its data input (float32 unless it is DOUBLE), and in
    // float32 from any Cast to FLOAT on the score path on.
    let float32 = path.float32_cast
        || graph
            .input
            .iter()
            .filter(|i| i.name.as_deref() == Some(input_name.as_str()))
            .filter_map(|i| match i.r#type.as_ref().and_then(|t| t.value.as_ref()) {
                Some(type_proto::Value::TensorType(t)) => t.elem_type,
                _ => None,
            })
            .any(|e| e == DataType::Float as i32);
    let arithmetic = options.arithmetic.unwrap_or(if float32 {
        Arithmetic::Float32
    } else {
        Arithmetic::Float64
    });
    path.flush()
        .map_err(|e| graph_error(format!("at the score output: {e}")))?;
    if path.layers.is_empty() {
        return Err(graph_error(
            "the score path holds no layer (the scores equal the input)".into(),
        ));
    }
    // `input.shape`: what the first spatial layer read, else the data input's channel shape.
    let shape = path
        .input_shape
        .take()
        .or_else(|| (2..=3).contains(&input_dims.len()).then_some(input_dims));
    let layers = path.layers;
    let nan_or_inf = |l: &Layer| match l {
        Layer::Dense { weights, bias } => weights.iter().chain(bias.iter()).any(|v| !v.is_finite()),
        Layer::Normalize { mean, std } => mean.iter().chain(std.iter()).any(|v| !v.is_finite()),
        Layer::Conv(c) => c.kernel.iter().chain(c.bias.iter()).any(|v| !v.is_finite()),
        Layer::BatchNorm {
            scale,
            shift,
            mean,
            variance,
            ..
        } => [scale, shift, mean, variance]
            .iter()
            .any(|v| v.iter().any(|x| !x.is_finite())),
        Layer::Relu | Layer::Pool(_) | Layer::Flatten => false,
    };
    if layers.iter().any(nan_or_inf) {
        return Err(graph_error(
            "converting the affine steps overflowed to a non-finite number".into(),
        ));
    }
    let range =
        |given: &Option<Vec<f64>>, key: &str, default: f64| -> Result<Vec<f64>, OnnxError> {
            let values = match given {
                Some(v) => Some(v.clone()),
                None => parse_metadata::<Vec<Option<f64>>>(metadata, key)?
                    .map(|v| v.into_iter().map(|x| x.unwrap_or(default)).collect()),
            };
            let values = values.unwrap_or_else(|| vec![default; dim]);
            if values.len() != dim {
                return Err(graph_error(format!(
                    "input range has {} values, the model has {dim} features",
                    values.len()
                )));
            }
            Ok(values)
        };
    let lower = range(&options.lower, META_LOWER, f64::NEG_INFINITY)?;
    let upper = range(&options.upper, META_UPPER, f64::INFINITY)?;
    let names = match &options.feature_names {
        Some(n) => Some(n.clone()),
        None => parse_metadata::<Vec<String>>(metadata, META_NAMES)?,
    };
    let classes = match &options.classes {
        Some(c) => Some(c.clone()),
        None => graph_labels.or(parse_metadata::<Vec<String>>(metadata, META_CLASSES)?),
    };
    let name = options
        .name
        .clone()
        .or_else(|| graph.name.clone().filter(|n| !n.is_empty()));
    let provenance = json!({
        "imported_from": "onnx",
        "producer": format!("{} {}", proto.producer_name.clone().unwrap_or_default(),
                            proto.producer_version.clone().unwrap_or_default()).trim().to_owned(),
        "ir_version": proto.ir_version,
        "input": input_name,
        "score_output": score_name,
        "dropped_final_steps": dropped,
    });
    for i in 0..dim {
        if lower[i].is_nan()
            || upper[i].is_nan()
            || lower[i] > upper[i]
            || lower[i] == f64::INFINITY
            || upper[i] == f64::NEG_INFINITY
        {
            return Err(graph_error(format!(
                "input range of feature {i} is [{}, {}], expected lower ≤ upper",
                lower[i], upper[i]
            )));
        }
    }
    let model = Model {
        name,
        input: InputSpec {
            shape,
            dim,
            names,
            lower,
            upper,
            units: None,
        },
        classes,
        layers,
        provenance: Some(provenance),
        arithmetic,
    };
    validate(&model)?;
    Ok(model)
}

/// The layout's rules for a converted model: sizes chain (spatial layers read exactly the features
/// before them), every layer non-empty, std > 0, classes and feature names fit (finiteness is checked
/// before).
fn validate(model: &Model) -> Result<(), OnnxError> {
    let invalid =
        |place: String, message: String| OnnxError::Model(ModelError::Invalid { place, message });
    let mut width = model.input.dim;
    for (i, layer) in model.layers.iter().enumerate() {
        match layer {
            Layer::Normalize { mean, std } => {
                if mean.len() != width || std.len() != width || std.iter().any(|s| *s <= 0.0) {
                    return Err(invalid(
                        format!("layers[{i}]"),
                        format!("normalize must have {width} entries with std > 0"),
                    ));
                }
            }
            Layer::Dense { weights, bias } => {
                if weights.ncols() != width || weights.nrows() == 0 || bias.len() != weights.nrows()
                {
                    return Err(invalid(
                        format!("layers[{i}]"),
                        format!(
                            "dense is {}x{}, expected at least one row of {width} inputs",
                            weights.nrows(),
                            weights.ncols()
                        ),
                    ));
                }
                width = weights.nrows();
            }
            Layer::Conv(c) => {
                check_width(i, "conv", c.shape.input_dim(), width)?;
                width = c.shape.output_dim();
            }
            Layer::Pool(p) => {
                check_width(i, "pooling", p.input_dim(), width)?;
                width = p.output_dim();
            }
            Layer::BatchNorm {
                scale, positions, ..
            } => check_width(i, "batchnorm", scale.len() * positions, width)?,
            Layer::Relu | Layer::Flatten => {}
        }
    }
    if let Some(classes) = &model.classes {
        let expected = if width == 1 { 2 } else { width };
        if classes.len() != expected {
            return Err(invalid(
                "classes".into(),
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
    if let Some(names) = &model.input.names {
        let distinct: HashSet<&String> = names.iter().collect();
        if names.len() != model.input.dim || distinct.len() != names.len() {
            return Err(invalid(
                "input.names".into(),
                format!("expected {} distinct names", model.input.dim),
            ));
        }
    }
    Ok(())
}

fn check_width(i: usize, kind: &str, reads: usize, width: usize) -> Result<(), OnnxError> {
    if reads != width {
        return Err(OnnxError::Model(ModelError::Invalid {
            place: format!("layers[{i}]"),
            message: format!("{kind} reads {reads} features, expected {width}"),
        }));
    }
    Ok(())
}
