//! Writing a [`Model`] as a plain ONNX graph: `normalize` as Sub / Div, `dense` as Gemm (transB = 1,
//! the weights stored one row per output unit exactly as in the layout), `relu` as Relu.
//!
//! The graph has one input `input` of shape [batch, features] and one output `logits` of shape
//! [batch, outputs] (a binary 1-logit model keeps its single logit: class 1 iff it is > 0). Tensors are
//! float32 (rounded from ballast's f64, the usual precision of inference stacks) or float64. Class
//! names, feature names and the input range travel in the model's metadata so that an import gives
//! the same model back. Export never changes the function computed beyond that rounding.

use prost::Message;

use super::import::{META_CLASSES, META_LOWER, META_NAMES, META_UPPER};
use super::schema::{
    tensor_proto::DataType, tensor_shape_proto::dimension, tensor_shape_proto::Dimension,
    type_proto, AttributeProto, GraphProto, ModelProto, NodeProto, OperatorSetIdProto,
    StringStringEntryProto, TensorProto, TensorShapeProto, TypeProto, ValueInfoProto,
};
use super::OnnxError;
use crate::model::{Layer, Model};

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
    let element = match options.precision {
        FloatPrecision::Float32 => DataType::Float,
        FloatPrecision::Float64 => DataType::Double,
    };
    let mut nodes = Vec::new();
    let mut initializers = Vec::new();
    let mut current = EXPORT_INPUT.to_owned();
    let mut width = model.input.dim;
    let last = model.layers.len().saturating_sub(1);
    for (i, layer) in model.layers.iter().enumerate() {
        let output = if i == last {
            EXPORT_OUTPUT.to_owned()
        } else {
            format!("layer{i}")
        };
        match layer {
            Layer::Normalize { mean, std } => {
                let mean_name = format!("layer{i}.mean");
                let std_name = format!("layer{i}.std");
                initializers.push(tensor(&mean_name, &[mean.len()], mean.as_slice(), element));
                initializers.push(tensor(&std_name, &[std.len()], std.as_slice(), element));
                let centred = format!("layer{i}.centred");
                nodes.push(node(
                    "Sub",
                    &format!("layer{i}_sub"),
                    &[&current, &mean_name],
                    &centred,
                    vec![],
                ));
                nodes.push(node(
                    "Div",
                    &format!("layer{i}_div"),
                    &[&centred, &std_name],
                    &output,
                    vec![],
                ));
            }
            Layer::Dense { weights, bias } => {
                let (rows, cols) = weights.shape();
                let row_major: Vec<f64> = (0..rows)
                    .flat_map(|r| weights.row(r).iter().copied().collect::<Vec<_>>())
                    .collect();
                let w_name = format!("layer{i}.weights");
                let b_name = format!("layer{i}.bias");
                initializers.push(tensor(&w_name, &[rows, cols], &row_major, element));
                initializers.push(tensor(&b_name, &[rows], bias.as_slice(), element));
                let trans_b = AttributeProto {
                    name: Some("transB".into()),
                    r#type: Some(super::schema::attribute_proto::AttributeType::Int as i32),
                    i: Some(1),
                    ..Default::default()
                };
                nodes.push(node(
                    "Gemm",
                    &format!("layer{i}_gemm"),
                    &[&current, &w_name, &b_name],
                    &output,
                    vec![trans_b],
                ));
                width = rows;
            }
            Layer::Relu => {
                nodes.push(node(
                    "Relu",
                    &format!("layer{i}_relu"),
                    &[&current],
                    &output,
                    vec![],
                ));
            }
            Layer::Conv(_) | Layer::BatchNorm { .. } | Layer::Pool(_) | Layer::Flatten => {
                return Err(OnnxError::Graph {
                    message: format!(
                        "layers[{i}]: exporting conv, batchnorm, pooling and flatten layers to \
                         ONNX is not supported yet; keep the JSON layout for this model"
                    ),
                });
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
        node: nodes,
        name: Some(model.name.clone().unwrap_or_else(|| "ballast-model".into())),
        initializer: initializers,
        input: vec![value_info(EXPORT_INPUT, element, model.input.dim)],
        output: vec![value_info(EXPORT_OUTPUT, element, width)],
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
    if model.layers.is_empty() {
        return Err(OnnxError::Graph {
            message: "the model has no layers".into(),
        });
    }
    Ok(proto.encode_to_vec())
}

fn node(
    op: &str,
    name: &str,
    inputs: &[&str],
    output: &str,
    attribute: Vec<AttributeProto>,
) -> NodeProto {
    NodeProto {
        input: inputs.iter().map(|s| (*s).to_owned()).collect(),
        output: vec![output.to_owned()],
        name: Some(name.to_owned()),
        op_type: Some(op.to_owned()),
        attribute,
        ..Default::default()
    }
}

fn tensor(name: &str, dims: &[usize], values: &[f64], element: DataType) -> TensorProto {
    let raw: Vec<u8> = match element {
        DataType::Double => values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        _ => values
            .iter()
            .flat_map(|v| (*v as f32).to_le_bytes())
            .collect(),
    };
    TensorProto {
        dims: dims.iter().map(|d| *d as i64).collect(),
        data_type: Some(element as i32),
        name: Some(name.to_owned()),
        raw_data: Some(raw),
        ..Default::default()
    }
}

fn value_info(name: &str, element: DataType, features: usize) -> ValueInfoProto {
    let dims = vec![
        Dimension {
            value: Some(dimension::Value::DimParam("batch".into())),
            ..Default::default()
        },
        Dimension {
            value: Some(dimension::Value::DimValue(features as i64)),
            ..Default::default()
        },
    ];
    ValueInfoProto {
        name: Some(name.to_owned()),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: Some(element as i32),
                shape: Some(TensorShapeProto { dim: dims }),
            })),
            ..Default::default()
        }),
        ..Default::default()
    }
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
