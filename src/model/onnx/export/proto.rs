//! The pieces of an ONNX graph as ballast writes them: nodes with attributes, initializer tensors in
//! the export's element type (float32 rounded to nearest, or float64 exact), and typed value infos
//! with a dynamic batch dimension.

use super::super::schema::{
    attribute_proto::AttributeType, tensor_proto::DataType, tensor_shape_proto::dimension,
    tensor_shape_proto::Dimension, type_proto, AttributeProto, NodeProto, TensorProto,
    TensorShapeProto, TypeProto, ValueInfoProto,
};

/// The nodes and initializers written so far.
pub(super) struct Graph {
    pub nodes: Vec<NodeProto>,
    pub initializers: Vec<TensorProto>,
    pub element: DataType,
}

impl Graph {
    /// Adds an initializer of the given shape (values row-major) and returns its name.
    pub fn tensor(&mut self, name: String, dims: &[usize], values: &[f64]) -> String {
        let raw: Vec<u8> = match self.element {
            DataType::Double => values.iter().flat_map(|v| v.to_le_bytes()).collect(),
            _ => values
                .iter()
                .flat_map(|v| (*v as f32).to_le_bytes())
                .collect(),
        };
        self.initializers.push(TensorProto {
            dims: dims.iter().map(|d| *d as i64).collect(),
            data_type: Some(self.element as i32),
            name: Some(name.clone()),
            raw_data: Some(raw),
            ..Default::default()
        });
        name
    }

    /// Adds a node with one output.
    pub fn node(
        &mut self,
        op: &str,
        name: &str,
        inputs: &[&str],
        output: &str,
        attribute: Vec<AttributeProto>,
    ) {
        self.nodes.push(NodeProto {
            input: inputs.iter().map(|s| (*s).to_owned()).collect(),
            output: vec![output.to_owned()],
            name: Some(name.to_owned()),
            op_type: Some(op.to_owned()),
            attribute,
            ..Default::default()
        });
    }
}

/// An integer attribute.
pub(super) fn int(name: &str, value: i64) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        r#type: Some(AttributeType::Int as i32),
        i: Some(value),
        ..Default::default()
    }
}

/// An integer list attribute.
pub(super) fn ints(name: &str, values: &[usize]) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        r#type: Some(AttributeType::Ints as i32),
        ints: values.iter().map(|v| *v as i64).collect(),
        ..Default::default()
    }
}

/// A float attribute (ONNX stores it as float32: the value is rounded to nearest).
pub(super) fn float(name: &str, value: f64) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        r#type: Some(AttributeType::Float as i32),
        f: Some(value as f32),
        ..Default::default()
    }
}

/// A tensor value info `[batch, dims…]` with a dynamic batch dimension.
pub(super) fn value_info(name: &str, element: DataType, dims: &[usize]) -> ValueInfoProto {
    let mut dim = vec![Dimension {
        value: Some(dimension::Value::DimParam("batch".into())),
        ..Default::default()
    }];
    dim.extend(dims.iter().map(|d| Dimension {
        value: Some(dimension::Value::DimValue(*d as i64)),
        ..Default::default()
    }));
    ValueInfoProto {
        name: Some(name.to_owned()),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: Some(element as i32),
                shape: Some(TensorShapeProto { dim }),
            })),
            ..Default::default()
        }),
        ..Default::default()
    }
}
