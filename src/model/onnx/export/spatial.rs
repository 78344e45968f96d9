//! The spatial layers written as the ONNX operators they import from: `conv` as Conv (`group = 1`,
//! explicit `pads`, `strides`, `dilations`, `kernel_shape`), `batchnorm` as BatchNormalization in
//! inference form, `maxpool` as MaxPool and `averagepool` as AveragePool with
//! `count_include_pad = 0` (both ignore padding inside the window, as the layout does).
//!
//! Guarantee: each operator computes the layer's definition with the same numbers (rounded to float32
//! in a float32 export; the batch norm's epsilon is a float attribute in ONNX, so it is always rounded
//! to float32), and importing it gives the same layer back.

use super::super::schema::AttributeProto;
use super::proto::{float, int, ints, Graph};
use crate::model::pool::{Pool, PoolOp};
use crate::model::spatial::Shape;
use crate::model::{Conv, Layer};

/// `pads` in ONNX order (all starts, then all ends) for spatial rank `rank`.
fn pads((top, left, bottom, right): (usize, usize, usize, usize), rank: usize) -> Vec<usize> {
    if rank == 1 {
        vec![left, right]
    } else {
        vec![top, left, bottom, right]
    }
}

/// One value per spatial axis from a (height, width) pair.
fn per_axis((height, width): (usize, usize), rank: usize) -> Vec<usize> {
    if rank == 1 {
        vec![width]
    } else {
        vec![height, width]
    }
}

/// Writes `layer` (a conv, batchnorm or pooling layer) reading `input` into `output`, and returns the
/// shape after it; `shape` is the shape before it.
pub(super) fn write(
    graph: &mut Graph,
    i: usize,
    layer: &Layer,
    shape: Shape,
    input: &str,
    output: &str,
) -> Shape {
    let rank = shape.spatial_rank;
    match layer {
        Layer::Conv(c) => conv(graph, i, c, rank, input, output),
        Layer::BatchNorm {
            scale,
            shift,
            mean,
            variance,
            epsilon,
            ..
        } => {
            let c = scale.len();
            let scale = graph.tensor(format!("layer{i}.scale"), &[c], scale.as_slice());
            let shift = graph.tensor(format!("layer{i}.shift"), &[c], shift.as_slice());
            let mean = graph.tensor(format!("layer{i}.mean"), &[c], mean.as_slice());
            let variance = graph.tensor(format!("layer{i}.variance"), &[c], variance.as_slice());
            graph.node(
                "BatchNormalization",
                &format!("layer{i}_batchnorm"),
                &[input, &scale, &shift, &mean, &variance],
                output,
                vec![float("epsilon", *epsilon)],
            );
            shape
        }
        Layer::Pool(p) => pool(graph, i, p, rank, input, output),
        _ => unreachable!("only spatial layers are written here"),
    }
}

fn conv(graph: &mut Graph, i: usize, c: &Conv, rank: usize, input: &str, output: &str) -> Shape {
    let s = c.shape;
    let mut dims = vec![s.out_channels, s.in_channels];
    dims.extend(per_axis((s.kernel_height, s.kernel_width), rank));
    // Row o of the kernel holds in-channel × kernel-row × kernel-column: ONNX's row-major W.
    let values: Vec<f64> = (0..s.out_channels)
        .flat_map(|o| c.kernel.row(o).iter().copied().collect::<Vec<_>>())
        .collect();
    let weights = graph.tensor(format!("layer{i}.kernel"), &dims, &values);
    let bias = graph.tensor(
        format!("layer{i}.bias"),
        &[s.out_channels],
        c.bias.as_slice(),
    );
    let attributes: Vec<AttributeProto> = vec![
        ints("dilations", &per_axis(s.dilation, rank)),
        int("group", 1),
        ints(
            "kernel_shape",
            &per_axis((s.kernel_height, s.kernel_width), rank),
        ),
        ints("pads", &pads(s.padding, rank)),
        ints("strides", &per_axis(s.stride, rank)),
    ];
    graph.node(
        "Conv",
        &format!("layer{i}_conv"),
        &[input, &weights, &bias],
        output,
        attributes,
    );
    let (height, width) = s.output_size().expect("validated geometry");
    Shape {
        channels: s.out_channels,
        height,
        width,
        spatial_rank: rank,
    }
}

fn pool(graph: &mut Graph, i: usize, p: &Pool, rank: usize, input: &str, output: &str) -> Shape {
    let mut attributes = vec![
        int("ceil_mode", 0),
        ints("kernel_shape", &per_axis(p.kernel, rank)),
        ints("pads", &pads(p.padding, rank)),
        ints("strides", &per_axis(p.stride, rank)),
    ];
    let op = match p.op {
        PoolOp::Max => "MaxPool",
        PoolOp::Average => {
            attributes.push(int("count_include_pad", 0));
            "AveragePool"
        }
    };
    graph.node(
        op,
        &format!("layer{i}_{}", op.to_lowercase()),
        &[input],
        output,
        attributes,
    );
    let (height, width) = p.output_size().expect("validated geometry");
    Shape {
        channels: p.channels,
        height,
        width,
        spatial_rank: rank,
    }
}
