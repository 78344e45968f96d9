//! Unit tests of the converter on small hand-built graphs (flat graphs here, channel graphs in
//! [`spatial`]).

mod spatial;

use prost::Message;

use super::*;
use crate::model::onnx::schema::{
    tensor_proto::DataType, tensor_shape_proto::dimension, tensor_shape_proto::Dimension,
    type_proto, AttributeProto, OperatorSetIdProto, TensorProto, TensorShapeProto, TypeProto,
    ValueInfoProto,
};
use crate::model::Layer;

fn value_info(name: &str, dims: &[i64]) -> ValueInfoProto {
    let mut dim = vec![Dimension {
        value: Some(dimension::Value::DimParam("N".into())),
        ..Default::default()
    }];
    dim.extend(dims.iter().map(|d| Dimension {
        value: Some(dimension::Value::DimValue(*d)),
        ..Default::default()
    }));
    ValueInfoProto {
        name: Some(name.into()),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: Some(DataType::Float as i32),
                shape: Some(TensorShapeProto { dim }),
            })),
            ..Default::default()
        }),
        ..Default::default()
    }
}

fn constant(name: &str, dims: &[i64], values: &[f32]) -> TensorProto {
    TensorProto {
        name: Some(name.into()),
        dims: dims.to_vec(),
        data_type: Some(DataType::Float as i32),
        float_data: values.to_vec(),
        ..Default::default()
    }
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
        name: Some(name.into()),
        op_type: Some(op.into()),
        attribute,
        ..Default::default()
    }
}

fn ints(name: &str, values: &[i64]) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        ints: values.to_vec(),
        ..Default::default()
    }
}

fn text(name: &str, value: &str) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        s: Some(value.as_bytes().to_vec()),
        ..Default::default()
    }
}

fn int(name: &str, value: i64) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        i: Some(value),
        ..Default::default()
    }
}

fn import(
    nodes: Vec<NodeProto>,
    initializer: Vec<TensorProto>,
    width: i64,
    output: &str,
) -> Result<Model, OnnxError> {
    import_shaped(nodes, initializer, &[width], output)
}

fn import_shaped(
    nodes: Vec<NodeProto>,
    initializer: Vec<TensorProto>,
    input: &[i64],
    output: &str,
) -> Result<Model, OnnxError> {
    let graph = GraphProto {
        node: nodes,
        name: Some("t".into()),
        initializer,
        input: vec![value_info("x", input)],
        output: vec![value_info(output, &[1])],
        ..Default::default()
    };
    let proto = ModelProto {
        ir_version: Some(8),
        opset_import: vec![OperatorSetIdProto {
            domain: Some(String::new()),
            version: Some(15),
        }],
        graph: Some(graph),
        ..Default::default()
    };
    import_model(&proto.encode_to_vec(), &ImportOptions::default())
}

#[test]
fn constant_minus_data_times_and_divided_compose_exactly() {
    // y = ((c − x) · m) / d, elementwise, then a 2 → 1 MatMul; checked against the formula by hand.
    let inits = vec![
        constant("c", &[2], &[1.0, 2.0]),
        constant("m", &[1, 2], &[3.0, -1.0]),
        constant("d", &[], &[2.0]),
        constant("w", &[2, 1], &[1.0, 1.0]),
    ];
    let nodes = vec![
        node("Sub", "sub", &["c", "x"], "a", vec![]),
        node("Mul", "mul", &["a", "m"], "b", vec![]),
        node("Div", "div", &["b", "d"], "e", vec![]),
        node("MatMul", "mm", &["e", "w"], "y", vec![]),
    ];
    let model = import(nodes, inits, 2, "y").unwrap();
    let x = [0.5, -4.0];
    let expected = (1.0 - x[0]) * 3.0 / 2.0 + -(2.0 - x[1]) / 2.0;
    let y = model.network().forward(&x);
    approx::assert_abs_diff_eq!(y[0], expected, epsilon = 1e-12);
}

#[test]
fn operations_that_are_not_affine_or_not_final_are_refused_by_name() {
    let w = || constant("w", &[2, 2], &[1.0, 0.0, 0.0, 1.0]);
    let cases: Vec<(Vec<NodeProto>, &str)> = vec![
        (
            vec![
                node("Softmax", "sm", &["x"], "p", vec![]),
                node("MatMul", "late", &["p", "w"], "y", vec![]),
            ],
            "node 'late' (MatMul): MatMul after Softmax 'sm'",
        ),
        (
            vec![node("Gemm", "g", &["x", "w"], "y", vec![int("transA", 1)])],
            "transA=1",
        ),
        (
            vec![node("Add", "twice", &["x", "x"], "y", vec![])],
            "both operands",
        ),
        (
            vec![node("Div", "inv", &["w", "x"], "y", vec![])],
            "not affine",
        ),
        (
            vec![node("MatMul", "left", &["w", "x"], "y", vec![])],
            "constant · data",
        ),
        (
            vec![node("Tanh", "squash", &["x"], "y", vec![])],
            "node 'squash' (Tanh)",
        ),
        (
            vec![node("Sigmoid", "two", &["x"], "y", vec![])],
            "only as the final step on a single logit",
        ),
        (
            vec![node(
                "Concat",
                "cat",
                &["x", "x"],
                "y",
                vec![int("axis", 1)],
            )],
            "Concat is supported only as [1 − sigmoid(z), sigmoid(z)]",
        ),
    ];
    for (nodes, expected) in cases {
        let e = import(nodes, vec![w()], 2, "y").unwrap_err().to_string();
        assert!(e.contains(expected), "expected '{expected}' in: {e}");
    }
}

#[test]
fn reshape_must_keep_the_batch_and_broadcasts_must_fit() {
    let shape = TensorProto {
        name: Some("s".into()),
        dims: vec![2],
        data_type: Some(DataType::Int64 as i32),
        int64_data: vec![1, -1],
        ..Default::default()
    };
    let e = import(
        vec![node("Reshape", "r", &["x", "s"], "y", vec![])],
        vec![shape],
        3,
        "y",
    )
    .unwrap_err();
    assert!(e.to_string().contains("keep the batch"), "{e}");
    let e = import(
        vec![node("Add", "add", &["x", "b"], "y", vec![])],
        vec![constant("b", &[2], &[1.0, 2.0])],
        3,
        "y",
    )
    .unwrap_err();
    assert!(e.to_string().contains("does not broadcast"), "{e}");
    let e = import(
        vec![node("Div", "div", &["x", "b"], "y", vec![])],
        vec![constant("b", &[1], &[0.0])],
        3,
        "y",
    )
    .unwrap_err();
    assert!(e.to_string().contains("divides by zero"), "{e}");
}
