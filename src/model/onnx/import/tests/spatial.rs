//! Unit tests of the converter on channel data: refused attributes, shape-keeping elementwise
//! steps, reshapes between spatial layers, the size limit.

use super::*;

#[test]
fn spatial_attributes_outside_the_supported_set_are_refused_by_name() {
    // Data [N, 1, 6]; W [2, 1, 3].
    let w = || constant("w", &[2, 1, 3], &[1.0, 0.0, -1.0, 0.5, 0.5, 0.5]);
    let conv = |attributes| node("Conv", "c", &["x", "w"], "y", attributes);
    let pool = |op, attributes| node(op, "p", &["x"], "y", attributes);
    let cases: Vec<(NodeProto, &str)> = vec![
        (conv(vec![int("group", 2)]), "node 'c' (Conv): group = 2"),
        (
            conv(vec![text("auto_pad", "SAME_UPPER")]),
            "auto_pad SAME_UPPER is not supported",
        ),
        (conv(vec![ints("pads", &[1])]), "pads is [1], expected 2"),
        (
            conv(vec![ints("kernel_shape", &[2])]),
            "kernel_shape [2] does not match",
        ),
        (
            conv(vec![ints("strides", &[0])]),
            "strides is [0], expected 1 integer(s), each ≥ 1",
        ),
        (
            pool(
                "MaxPool",
                vec![ints("kernel_shape", &[2]), int("ceil_mode", 1)],
            ),
            "node 'p' (MaxPool): ceil_mode = 1",
        ),
        (
            pool(
                "AveragePool",
                vec![
                    ints("kernel_shape", &[2]),
                    ints("pads", &[1, 1]),
                    int("count_include_pad", 1),
                ],
            ),
            "count_include_pad = 1 with padding",
        ),
        (
            pool(
                "MaxPool",
                vec![ints("kernel_shape", &[2]), ints("dilations", &[2])],
            ),
            "dilations (1, 2) are not supported",
        ),
        (pool("MaxPool", vec![]), "kernel_shape is missing"),
        (
            pool(
                "MaxPool",
                vec![ints("kernel_shape", &[2]), ints("pads", &[2, 0])],
            ),
            "each pad must be smaller than the window",
        ),
    ];
    for (n, expected) in cases {
        let e = import_shaped(vec![n], vec![w()], &[1, 6], "y")
            .unwrap_err()
            .to_string();
        assert!(e.contains(expected), "expected '{expected}' in: {e}");
    }
    let mut with_indices = pool("MaxPool", vec![ints("kernel_shape", &[2])]);
    with_indices.output.push("indices".into());
    let e = import_shaped(vec![with_indices], vec![], &[1, 6], "y").unwrap_err();
    assert!(e.to_string().contains("Indices output"), "{e}");
    let e = import(vec![conv(vec![])], vec![w()], 6, "y").unwrap_err();
    assert!(
        e.to_string().contains("expected [batch, channels, length]"),
        "{e}"
    );
}

#[test]
fn elementwise_steps_on_channels_stay_channel_layers() {
    // x [N, 2, 3] → Conv 1×1 (identity on 2 channels) → Mul by (−2, 0.5) per channel → Relu →
    // Flatten → MatMul: the Mul becomes a batchnorm layer (mean 0, variance 1, epsilon 0).
    let inits = vec![
        constant("w", &[2, 2, 1], &[1.0, 0.0, 0.0, 1.0]),
        constant("m", &[2, 1], &[-2.0, 0.5]),
        constant("v", &[6, 1], &[1.0, 1.0, 1.0, 1.0, 1.0, 1.0]),
    ];
    let nodes = vec![
        node("Conv", "c", &["x", "w"], "a", vec![]),
        node("Mul", "m", &["a", "m"], "b", vec![]),
        node("Relu", "r", &["b"], "h", vec![]),
        node("Flatten", "f", &["h"], "g", vec![]),
        node("MatMul", "d", &["g", "v"], "y", vec![]),
    ];
    let model = import_shaped(nodes, inits, &[2, 3], "y").unwrap();
    assert_eq!(model.input.shape, Some(vec![2, 3]));
    assert!(matches!(model.layers[0], Layer::Conv(_)));
    assert!(matches!(
        &model.layers[1],
        Layer::BatchNorm { scale, epsilon, .. } if scale.as_slice() == [-2.0, 0.5] && *epsilon == 0.0
    ));
    assert!(matches!(model.layers[3], Layer::Flatten));
    // By hand: relu(−2·x) on channel 0 plus relu(0.5·x) on channel 1.
    let x = [1.0, -1.0, 2.0, 4.0, -2.0, 0.5];
    let expected = 2.0 + 0.5 * (4.0 + 0.5);
    approx::assert_abs_diff_eq!(model.network().forward(&x)[0], expected, epsilon = 1e-12);

    // A factor that changes sign within a channel has no channel form once a conv fixed the shape.
    let inits = vec![
        constant("w", &[2, 2, 1], &[1.0, 0.0, 0.0, 1.0]),
        constant("m", &[3], &[-1.0, 1.0, 1.0]),
    ];
    let nodes = vec![
        node("Conv", "c", &["x", "w"], "a", vec![]),
        node("Mul", "m", &["a", "m"], "b", vec![]),
        node("Relu", "r", &["b"], "y", vec![]),
    ];
    let e = import_shaped(nodes, inits.clone(), &[2, 3], "y").unwrap_err();
    assert!(
        e.to_string().contains("node 'r' (Relu)")
            && e.to_string().contains("vary within a channel"),
        "{e}"
    );
    // Before a flatten and a dense map the same factor is composed into the dense layer.
    let mut inits = inits;
    inits.push(constant("v", &[6, 1], &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]));
    let nodes = vec![
        node("Conv", "c", &["x", "w"], "a", vec![]),
        node("Mul", "m", &["a", "m"], "b", vec![]),
        node("Flatten", "f", &["b"], "g", vec![]),
        node("MatMul", "d", &["g", "v"], "y", vec![]),
    ];
    let model = import_shaped(nodes, inits, &[2, 3], "y").unwrap();
    assert!(
        matches!(model.layers[1], Layer::Flatten),
        "{:?}",
        model.layers
    );
    // By hand: Σ v_i · m_i · x_i with m = (−1, 1, 1, −1, 1, 1) (the conv is the identity).
    let x = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
    let expected = -1.0 + 4.0 + 9.0 - 16.0 + 25.0 + 36.0;
    approx::assert_abs_diff_eq!(model.network().forward(&x)[0], expected, epsilon = 1e-12);
}

#[test]
fn a_reshape_between_spatial_layers_is_refused() {
    let shape = TensorProto {
        name: Some("s".into()),
        dims: vec![3],
        data_type: Some(DataType::Int64 as i32),
        int64_data: vec![0, 2, 3],
        ..Default::default()
    };
    let nodes = vec![
        node("Conv", "c1", &["x", "w"], "a", vec![]),
        node("Reshape", "r", &["a", "s"], "b", vec![]),
        node("Conv", "c2", &["b", "w2"], "y", vec![]),
    ];
    let inits = vec![
        constant("w", &[1, 1, 1], &[1.0]),
        constant("w2", &[1, 2, 1], &[1.0, 1.0]),
        shape,
    ];
    let e = import_shaped(nodes, inits, &[1, 6], "y").unwrap_err();
    assert!(
        e.to_string().contains("node 'c2' (Conv)") && e.to_string().contains("cannot reshape"),
        "{e}"
    );
}

#[test]
fn subtract_then_divide_reads_back_as_written() {
    // 1/3 is not a double, so composing (x − m) · (1/3) and writing it back as (x − m') / s' would
    // change the numbers; the pair is kept as written.
    let inits = vec![
        constant("m", &[2], &[0.1, -7.0]),
        constant("s", &[2], &[3.0, 0.3]),
        constant("w", &[2, 1], &[1.0, 1.0]),
    ];
    let nodes = vec![
        node("Sub", "sub", &["x", "m"], "a", vec![]),
        node("Div", "div", &["a", "s"], "b", vec![]),
        node("MatMul", "mm", &["b", "w"], "y", vec![]),
    ];
    let model = import(nodes, inits, 2, "y").unwrap();
    let Layer::Normalize { mean, std } = &model.layers[0] else {
        panic!("expected a normalize layer first: {:?}", model.layers)
    };
    assert_eq!(mean.as_slice(), [f64::from(0.1f32), -7.0]);
    assert_eq!(std.as_slice(), [3.0, f64::from(0.3f32)]);
}

#[test]
fn sizes_the_graph_only_claims_are_checked_against_the_limit() {
    // A 1×1 kernel over a claimed [1, 5000, 5000] input: 25 million features no tensor backs.
    let conv = || node("Conv", "c", &["x", "w"], "y", vec![]);
    let w = constant("w", &[1, 1, 1, 1], &[1.0]);
    let e = import_shaped(vec![conv()], vec![w], &[1, 5000, 5000], "y").unwrap_err();
    assert!(
        e.to_string().contains("25000000 features, above the limit"),
        "{e}"
    );
    // Within the width limit (16 million), a 2×2 kernel unfolds into 3999² · 4 window entries.
    let w = constant("w", &[1, 1, 2, 2], &[1.0; 4]);
    let e = import_shaped(vec![conv()], vec![w], &[1, 4000, 4000], "y").unwrap_err();
    assert!(
        e.to_string()
            .contains("node 'c' (Conv): unfolds into 63968004 window entries"),
        "{e}"
    );
}
