//! The spatial layer kinds of the `ballast.model/1` layout — `conv`, `batchnorm`, `averagepool`,
//! `maxpool`, `flatten` — parsed and validated against the running feature shape, and written back.
//!
//! Features are flattened row-major as channel × height × width (`input.shape` `[C, L]` for 1-D
//! signals, `[C, H, W]` for images; a flat `[n]` otherwise). Every error names the layer and field and
//! what was expected, as for the other kinds; sizes are checked before anything is allocated from them.
//!
//! This module dispatches on the kind and writes layers back; the running [`Shape`] is in `shape`, the
//! checked field readers in `fields`, the convolution reader in `conv_layer`.

mod conv_layer;
mod fields;
mod shape;

use serde_json::{json, Value};

use super::layout::Layer;
use super::pool::{Pool, PoolOp};
use super::ModelError;
use conv_layer::parse_conv;
use fields::{check_fields, check_unfolded, invalid, padding, per_axis, require_spatial, vector};
pub use shape::Shape;

/// The layer kinds this module reads.
pub const SPATIAL_KINDS: [&str; 5] = ["conv", "batchnorm", "averagepool", "maxpool", "flatten"];

/// Parses one spatial layer at `place` (e.g. `layers[3]`) and updates `shape` to its output.
pub fn parse(
    object: &Value,
    kind: &str,
    shape: &mut Shape,
    place: &str,
) -> Result<Layer, ModelError> {
    match kind {
        "flatten" => {
            check_fields(object, &[], place)?;
            *shape = Shape::flat(shape.size());
            Ok(Layer::Flatten)
        }
        "batchnorm" => {
            check_fields(
                object,
                &["scale", "shift", "mean", "variance", "epsilon"],
                place,
            )?;
            require_spatial(shape, place, "batchnorm")?;
            let c = shape.channels;
            let scale = vector(object, "scale", c, place)?;
            let shift = vector(object, "shift", c, place)?;
            let mean = vector(object, "mean", c, place)?;
            let variance = vector(object, "variance", c, place)?;
            let epsilon = object.get("epsilon").map_or(Some(1e-5), Value::as_f64);
            let epsilon = epsilon
                .filter(|e| e.is_finite() && *e >= 0.0)
                .ok_or_else(|| {
                    invalid(&format!("{place}.epsilon"), "expected a number ≥ 0".into())
                })?;
            if let Some(i) = variance.iter().position(|v| *v + epsilon <= 0.0) {
                return Err(invalid(
                    &format!("{place}.variance"),
                    format!("entry {i} plus epsilon is not positive"),
                ));
            }
            Ok(Layer::BatchNorm {
                scale,
                shift,
                mean,
                variance,
                epsilon,
                positions: shape.height * shape.width,
            })
        }
        "averagepool" | "maxpool" => {
            check_fields(object, &["kernel", "stride", "padding"], place)?;
            require_spatial(shape, place, kind)?;
            let kernel_value = object
                .get("kernel")
                .ok_or_else(|| invalid(&format!("{place}.kernel"), "is missing".into()))?;
            let kernel = per_axis(Some(kernel_value), shape, 1, &format!("{place}.kernel"))?;
            let stride = match object.get("stride") {
                None => kernel,
                some => per_axis(some, shape, 1, &format!("{place}.stride"))?,
            };
            let pool = Pool {
                op: if kind == "maxpool" {
                    PoolOp::Max
                } else {
                    PoolOp::Average
                },
                channels: shape.channels,
                in_height: shape.height,
                in_width: shape.width,
                kernel,
                stride,
                padding: padding(object.get("padding"), shape, &format!("{place}.padding"))?,
            };
            let (h, w) = pool.output_size().ok_or_else(|| {
                invalid(
                    place,
                    format!(
                        "window {kernel:?} with stride {stride:?} and padding {:?} does not fit \
                         an input of {} × {} (padding must be smaller than the window)",
                        pool.padding, shape.height, shape.width
                    ),
                )
            })?;
            check_unfolded(h, w, shape.channels * kernel.0 * kernel.1, shape, place)?;
            shape.height = h;
            shape.width = w;
            Ok(Layer::Pool(pool))
        }
        _ => parse_conv(object, shape, place),
    }
}

/// A spatial layer as JSON (`None` for the other kinds); `rank` is the spatial rank of its input.
pub fn to_json(layer: &Layer, rank: usize) -> Option<Value> {
    let one = rank == 1;
    let pair = |(h, w): (usize, usize), rank_one: bool| {
        if rank_one {
            json!([w])
        } else {
            json!([h, w])
        }
    };
    match layer {
        Layer::Flatten => Some(json!({"kind": "flatten"})),
        Layer::BatchNorm {
            scale,
            shift,
            mean,
            variance,
            epsilon,
            ..
        } => Some(json!({
            "kind": "batchnorm",
            "scale": scale.as_slice(),
            "shift": shift.as_slice(),
            "mean": mean.as_slice(),
            "variance": variance.as_slice(),
            "epsilon": epsilon,
        })),
        Layer::Pool(p) => {
            let (t, l, b, r) = p.padding;
            Some(json!({
                "kind": if p.op == PoolOp::Max { "maxpool" } else { "averagepool" },
                "kernel": pair(p.kernel, one),
                "stride": pair(p.stride, one),
                "padding": if one { json!([l, r]) } else { json!([t, l, b, r]) },
            }))
        }
        Layer::Conv(c) => {
            let s = c.shape;
            let kernel: Vec<Value> = (0..s.out_channels)
                .map(|o| {
                    let channels: Vec<Value> = (0..s.in_channels)
                        .map(|i| {
                            let rows: Vec<Value> = (0..s.kernel_height)
                                .map(|y| {
                                    let start = (i * s.kernel_height + y) * s.kernel_width;
                                    json!((start..start + s.kernel_width)
                                        .map(|e| c.kernel[(o, e)])
                                        .collect::<Vec<f64>>())
                                })
                                .collect();
                            if one {
                                rows[0].clone()
                            } else {
                                Value::Array(rows)
                            }
                        })
                        .collect();
                    Value::Array(channels)
                })
                .collect();
            let (t, l, b, r) = s.padding;
            Some(json!({
                "kind": "conv",
                "kernel": kernel,
                "bias": c.bias.as_slice(),
                "stride": pair(s.stride, one),
                "padding": if one { json!([l, r]) } else { json!([t, l, b, r]) },
                "dilation": pair(s.dilation, one),
            }))
        }
        _ => None,
    }
}
