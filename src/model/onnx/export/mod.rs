//! Writing a [`Model`] as a plain ONNX graph: `normalize` as Sub / Div, `dense` as Gemm (transB = 1,
//! the weights stored one row per output unit exactly as in the layout), `relu` as Relu, and the
//! spatial layers as Conv, BatchNormalization, MaxPool, AveragePool and Flatten ([`spatial`]).
//!
//! The graph has one input `input` of shape [batch, features] (or [batch, C, L] / [batch, C, H, W]
//! when the model states `input.shape`) and one output `logits` of shape [batch, outputs] (a binary
//! 1-logit model keeps its single logit: class 1 iff it is > 0). A Flatten is written before a dense
//! layer that reads channel data without a `flatten` layer. Tensors are float32 (rounded from
//! ballast's f64, the usual precision of inference stacks) or float64. Class names, feature names and
//! the input range travel in the model's metadata so that an import gives the same model back. Export
//! never changes the function computed beyond that rounding.

mod proto;
mod spatial;

use prost::Message;

use super::import::{META_CLASSES, META_LOWER, META_NAMES, META_UPPER};
use super::schema::{
    tensor_proto::DataType, GraphProto, ModelProto, OperatorSetIdProto, StringStringEntryProto,
};
use super::OnnxError;
use crate::model::spatial::Shape;
use crate::model::{Layer, Model};
use proto::{int, value_info, Graph};

/// Element type of the exported tensors.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum FloatPrecision {
    /// 32-bit floats (weights rounded to nearest).
    #[default]
    Float32,
    /// 64-bit floats (exact).
    Float64,
}

/// How to write the ONNX graph.
#[derive(Debug, Clone, Default)]
pub struct ExportOptions {
    /// Element type of inputs, weights and outputs.
    pub precision: FloatPrecision,
}

/// Opset of the default domain the exported graph declares.
pub const EXPORT_OPSET: i64 = 13;
/// IR version the exported file declares.
pub const EXPORT_IR_VERSION: i64 = 7;

/// Name of the exported graph's input.
pub const EXPORT_INPUT: &str = "input";
/// Name of the exported graph's output.
pub const EXPORT_OUTPUT: &str = "logits";

/// Encodes `model` as ONNX protobuf bytes.
pub fn export_model(model: &Model, options: &ExportOptions) -> Result<Vec<u8>, OnnxError> {
    if model.layers.is_empty() {
        return Err(OnnxError::Graph {
            message: "the model has no layers".into(),
        });
    }
    let element = match options.precision {
        FloatPrecision::Float32 => DataType::Float,
        FloatPrecision::Float64 => DataType::Double,
    };
    let mut graph = Graph {
        nodes: Vec::new(),
        initializers: Vec::new(),
        element,
    };
    let mut shape = match &model.input.shape {
        Some(dims) => Shape::from_dims(dims, model.input.dim)?,
        None => Shape::flat(model.input.dim),
    };
    let input_dims = shape.dims();
    let mut current = EXPORT_INPUT.to_owned();
    let last = model.layers.len() - 1;
    for (i, layer) in model.layers.iter().enumerate() {
        let output = if i == last {
            EXPORT_OUTPUT.to_owned()
        } else {
            format!("layer{i}")
        };
        match layer {
            Layer::Normalize { mean, std } => {
                let dims = shape.dims();
                let mean = graph.tensor(format!("layer{i}.mean"), &dims, mean.as_slice());
                let std = graph.tensor(format!("layer{i}.std"), &dims, std.as_slice());
                let centred = format!("layer{i}.centred");
                graph.node(
                    "Sub",
                    &format!("layer{i}_sub"),
                    &[&current, &mean],
                    &centred,
                    vec![],
                );
                graph.node(
                    "Div",
                    &format!("layer{i}_div"),
                    &[&centred, &std],
                    &output,
                    vec![],
                );
            }
            Layer::Dense { weights, bias } => {
                if shape.spatial_rank > 0 {
                    let flat = format!("layer{i}.flat");
                    graph.node(
                        "Flatten",
                        &format!("layer{i}_flatten"),
                        &[&current],
                        &flat,
                        vec![int("axis", 1)],
                    );
                    current = flat;
                }
                let (rows, cols) = weights.shape();
                let row_major: Vec<f64> = (0..rows)
                    .flat_map(|r| weights.row(r).iter().copied().collect::<Vec<_>>())
                    .collect();
                let w = graph.tensor(format!("layer{i}.weights"), &[rows, cols], &row_major);
                let b = graph.tensor(format!("layer{i}.bias"), &[rows], bias.as_slice());
                graph.node(
                    "Gemm",
                    &format!("layer{i}_gemm"),
                    &[&current, &w, &b],
                    &output,
                    vec![int("transB", 1)],
                );
                shape = Shape::flat(rows);
            }
            Layer::Relu => {
                graph.node(
                    "Relu",
                    &format!("layer{i}_relu"),
                    &[&current],
                    &output,
                    vec![],
                );
            }
            Layer::Flatten => {
                graph.node(
                    "Flatten",
                    &format!("layer{i}_flatten"),
                    &[&current],
                    &output,
                    vec![int("axis", 1)],
                );
                shape = Shape::flat(shape.size());
            }
            Layer::Conv(_) | Layer::BatchNorm { .. } | Layer::Pool(_) => {
                if shape.spatial_rank == 0 {
                    return Err(OnnxError::Graph {
                        message: format!("layers[{i}]: a spatial layer on flat features"),
                    });
                }
                shape = spatial::write(&mut graph, i, layer, shape, &current, &output);
            }
        }
        current = output;
    }
    let mut metadata = Vec::new();
    let mut put = |key: &str, value: serde_json::Value| {
        metadata.push(StringStringEntryProto {
            key: Some(key.into()),
            value: Some(value.to_string()),
        });
    };
    if let Some(classes) = &model.classes {
        put(META_CLASSES, serde_json::json!(classes));
    }
    if let Some(names) = &model.input.names {
        put(META_NAMES, serde_json::json!(names));
    }
    let finite = |v: &[f64]| -> Option<serde_json::Value> {
        if v.iter().all(|x| x.is_infinite()) {
            None
        } else {
            Some(serde_json::json!(v
                .iter()
                .map(|x| if x.is_finite() { Some(*x) } else { None })
                .collect::<Vec<_>>()))
        }
    };
    if let Some(v) = finite(&model.input.lower) {
        put(META_LOWER, v);
    }
    if let Some(v) = finite(&model.input.upper) {
        put(META_UPPER, v);
    }
    let graph = GraphProto {
        node: graph.nodes,
        name: Some(model.name.clone().unwrap_or_else(|| "ballast-model".into())),
        initializer: graph.initializers,
        input: vec![value_info(EXPORT_INPUT, element, &input_dims)],
        output: vec![value_info(EXPORT_OUTPUT, element, &shape.dims())],
        ..Default::default()
    };
    let proto = ModelProto {
        ir_version: Some(EXPORT_IR_VERSION),
        opset_import: vec![OperatorSetIdProto {
            domain: Some(String::new()),
            version: Some(EXPORT_OPSET),
        }],
        producer_name: Some("ballast".into()),
        producer_version: Some(env!("CARGO_PKG_VERSION").into()),
        graph: Some(graph),
        metadata_props: metadata,
        ..Default::default()
    };
    Ok(proto.encode_to_vec())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::onnx::{import_model, ImportOptions};

    const SMALL: &str = r#"{"format":"ballast.model/1","name":"small",
        "input":{"dim":2,"names":["a","b"],"lower":[0.0,-1.0],"upper":[1.0,2.0]},
        "classes":["no","yes"],
        "layers":[{"kind":"normalize","mean":[0.5,0.25],"std":[2.0,0.5]},
                  {"kind":"dense","weights":[[1.0,-2.0],[0.5,0.25],[-1.0,1.5]],"bias":[0.1,-0.2,0.3]},
                  {"kind":"relu"},
                  {"kind":"dense","weights":[[1.0,-1.0,0.5]],"bias":[0.05]}]}"#;

    #[test]
    fn float64_export_imports_back_to_the_same_model() {
        let model = Model::from_json_str(SMALL).unwrap();
        let bytes = export_model(
            &model,
            &ExportOptions {
                precision: FloatPrecision::Float64,
            },
        )
        .unwrap();
        let back = import_model(&bytes, &ImportOptions::default()).unwrap();
        assert_eq!(back.classes, model.classes);
        assert_eq!(back.input.names, model.input.names);
        assert_eq!(back.input.lower, model.input.lower);
        assert_eq!(back.input.upper, model.input.upper);
        assert_eq!(back.layers.len(), model.layers.len());
        let (a, b) = (model.network(), back.network());
        for x in [[0.0, 0.0], [0.3, 1.7], [1.0, -1.0]] {
            let (ya, yb) = (a.forward(&x), b.forward(&x));
            approx::assert_abs_diff_eq!(ya[0], yb[0], epsilon = 1e-12);
        }
    }
}
