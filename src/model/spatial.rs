//! The spatial layer kinds of the `ballast.model/1` layout — `conv`, `batchnorm`, `averagepool`,
//! `maxpool`, `flatten` — parsed and validated against the running feature shape, and written back.
//!
//! Features are flattened row-major as channel × height × width (`input.shape` `[C, L]` for 1-D
//! signals, `[C, H, W]` for images; a flat `[n]` otherwise). Every error names the layer and field and
//! what was expected, as for the other kinds; sizes are checked before anything is allocated from them.

use nalgebra::{DMatrix, DVector};
use serde_json::{json, Value};

use super::conv::{Conv, ConvShape};
use super::layout::Layer;
use super::pool::{Pool, PoolOp};
use super::ModelError;

/// The layer kinds this module reads.
pub const SPATIAL_KINDS: [&str; 5] = ["conv", "batchnorm", "averagepool", "maxpool", "flatten"];

/// The running shape: `[C, H, W]` with `H = 1` for 1-D signals; `spatial_rank` 1 or 2, 0 when flat.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shape {
    /// Channels (the feature count when flat).
    pub channels: usize,
    /// Height (1 for 1-D and flat).
    pub height: usize,
    /// Width (1 when flat).
    pub width: usize,
    /// 0 flat, 1 for `[C, L]`, 2 for `[C, H, W]`.
    pub spatial_rank: usize,
}

impl Shape {
    /// A flat vector of `n` features.
    pub fn flat(n: usize) -> Shape {
        Shape {
            channels: n,
            height: 1,
            width: 1,
            spatial_rank: 0,
        }
    }

    /// The shape `input.shape` states (its product must be `dim`).
    pub fn from_dims(dims: &[usize], dim: usize) -> Result<Shape, ModelError> {
        let shape = match dims {
            [n] => Shape::flat(*n),
            [c, l] => Shape {
                channels: *c,
                height: 1,
                width: *l,
                spatial_rank: 1,
            },
            [c, h, w] => Shape {
                channels: *c,
                height: *h,
                width: *w,
                spatial_rank: 2,
            },
            _ => {
                return Err(invalid(
                    "input.shape",
                    format!(
                        "has {} entries, expected 1, 2 ([C, L]) or 3 ([C, H, W])",
                        dims.len()
                    ),
                ))
            }
        };
        let product = dims.iter().try_fold(1usize, |a, b| a.checked_mul(*b));
        if product != Some(dim) || dims.contains(&0) {
            return Err(invalid(
                "input.shape",
                format!("{dims:?} holds {product:?} features, expected input.dim = {dim}"),
            ));
        }
        Ok(shape)
    }

    /// Number of features.
    pub fn size(&self) -> usize {
        self.channels * self.height * self.width
    }

    /// The shape as written in a file.
    pub fn dims(&self) -> Vec<usize> {
        match self.spatial_rank {
            0 => vec![self.channels],
            1 => vec![self.channels, self.width],
            _ => vec![self.channels, self.height, self.width],
        }
    }
}

fn invalid(place: &str, message: String) -> ModelError {
    ModelError::Invalid {
        place: place.into(),
        message,
    }
}

/// Reads `[a]` or `[a, b]` (one entry per spatial axis; height first) into (height, width) pairs, with
/// `default` when absent.
fn per_axis(
    value: Option<&Value>,
    shape: &Shape,
    default: usize,
    place: &str,
) -> Result<(usize, usize), ModelError> {
    let Some(value) = value else {
        return Ok((default, default));
    };
    let numbers = read_counts(value, place)?;
    match (shape.spatial_rank, numbers.as_slice()) {
        (1, [w]) => Ok((1, *w)),
        (2, [h, w]) => Ok((*h, *w)),
        (rank, _) => Err(invalid(
            place,
            format!(
                "has {} entries, expected {rank} (one per spatial axis)",
                numbers.len()
            ),
        )),
    }
}

fn read_counts(value: &Value, place: &str) -> Result<Vec<usize>, ModelError> {
    let list = value
        .as_array()
        .ok_or_else(|| invalid(place, "expected a list of non-negative integers".into()))?;
    list.iter()
        .map(|v| {
            v.as_u64()
                .map(|n| n as usize)
                .ok_or_else(|| invalid(place, format!("{v} is not a non-negative integer")))
        })
        .collect()
}

/// Padding `[before, after]` per axis: `[l, r]` for 1-D, `[top, left, bottom, right]` for 2-D.
fn padding(
    value: Option<&Value>,
    shape: &Shape,
    place: &str,
) -> Result<(usize, usize, usize, usize), ModelError> {
    let Some(value) = value else {
        return Ok((0, 0, 0, 0));
    };
    let numbers = read_counts(value, place)?;
    match (shape.spatial_rank, numbers.as_slice()) {
        (1, [l, r]) => Ok((0, *l, 0, *r)),
        (2, [t, l, b, r]) => Ok((*t, *l, *b, *r)),
        (rank, _) => Err(invalid(
            place,
            format!(
                "has {} entries, expected {} (before and after each spatial axis)",
                numbers.len(),
                2 * rank
            ),
        )),
    }
}

fn numbers(value: &Value, place: &str) -> Result<Vec<f64>, ModelError> {
    let list = value
        .as_array()
        .ok_or_else(|| invalid(place, "expected a list of numbers".into()))?;
    list.iter()
        .enumerate()
        .map(|(i, v)| {
            v.as_f64()
                .filter(|x| x.is_finite())
                .ok_or_else(|| invalid(place, format!("entry {i} is not a finite number")))
        })
        .collect()
}

fn vector(
    object: &Value,
    field: &str,
    len: usize,
    place: &str,
) -> Result<DVector<f64>, ModelError> {
    let place = format!("{place}.{field}");
    let value = object
        .get(field)
        .ok_or_else(|| invalid(&place, "is missing".into()))?;
    let v = numbers(value, &place)?;
    if v.len() != len {
        return Err(invalid(
            &place,
            format!("has {} values, expected {len}", v.len()),
        ));
    }
    Ok(DVector::from_vec(v))
}

fn require_spatial(shape: &Shape, place: &str, kind: &str) -> Result<(), ModelError> {
    if shape.spatial_rank == 0 {
        return Err(invalid(
            place,
            format!(
                "{kind} needs spatial features, found a flat vector of {} (state input.shape, e.g. \
                 [channels, length], and put {kind} before any flatten or dense layer)",
                shape.size()
            ),
        ));
    }
    Ok(())
}

fn check_fields(object: &Value, allowed: &[&str], place: &str) -> Result<(), ModelError> {
    if let Some(map) = object.as_object() {
        for key in map.keys() {
            if key != "kind" && !allowed.contains(&key.as_str()) {
                return Err(invalid(
                    place,
                    format!("unknown field \"{key}\", expected one of {allowed:?}"),
                ));
            }
        }
    }
    Ok(())
}

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

/// Refuses a layer whose window table (`out_h · out_w · entries`) or input would exceed the parameter
/// limit: sizes claimed by `input.shape` are not backed by any number in the file, so they are checked
/// before anything is allocated from them.
fn check_unfolded(
    h: usize,
    w: usize,
    entries: usize,
    shape: &Shape,
    place: &str,
) -> Result<(), ModelError> {
    let limit = crate::limits::MAX_PARAMETERS;
    let table = h.checked_mul(w).and_then(|p| p.checked_mul(entries));
    if table.is_none_or(|t| t > limit) || shape.size() > limit {
        return Err(invalid(
            place,
            format!(
                "an input of {:?} unfolds into more than {limit} window entries (the size limit)",
                shape.dims()
            ),
        ));
    }
    Ok(())
}

fn parse_conv(object: &Value, shape: &mut Shape, place: &str) -> Result<Layer, ModelError> {
    check_fields(
        object,
        &["kernel", "bias", "stride", "padding", "dilation"],
        place,
    )?;
    require_spatial(shape, place, "conv")?;
    let kernel_place = format!("{place}.kernel");
    let outer = object
        .get("kernel")
        .and_then(Value::as_array)
        .ok_or_else(|| invalid(&kernel_place, "expected nested lists [out][in][k…]".into()))?;
    let out_channels = outer.len();
    if out_channels == 0 {
        return Err(invalid(&kernel_place, "has no output channels".into()));
    }
    // Flatten out × in × (kh ×) kw, checking each level's length against the first.
    let mut dims: Vec<usize> = Vec::new();
    let mut probe = &object["kernel"];
    while let Some(list) = probe.as_array() {
        dims.push(list.len());
        match list.first() {
            Some(first) => probe = first,
            None => break,
        }
    }
    let expected_rank = 2 + shape.spatial_rank;
    if dims.len() != expected_rank {
        return Err(invalid(
            &kernel_place,
            format!(
                "is nested {} deep, expected {expected_rank} ([out][in]{}) for {}-D features",
                dims.len(),
                if shape.spatial_rank == 1 {
                    "[k]"
                } else {
                    "[kh][kw]"
                },
                shape.spatial_rank
            ),
        ));
    }
    let (in_channels, kh, kw) = if shape.spatial_rank == 1 {
        (dims[1], 1, dims[2])
    } else {
        (dims[1], dims[2], dims[3])
    };
    if in_channels != shape.channels {
        return Err(invalid(
            &kernel_place,
            format!(
                "has {in_channels} input channels, expected {}",
                shape.channels
            ),
        ));
    }
    let patch = in_channels * kh * kw;
    let mut values = Vec::with_capacity(out_channels.saturating_mul(patch).min(1 << 24));
    collect(&object["kernel"], &dims, 0, &kernel_place, &mut values)?;
    let kernel = DMatrix::from_row_slice(out_channels, patch, &values);
    let bias = vector(object, "bias", out_channels, place)?;
    let conv_shape = ConvShape {
        in_channels,
        in_height: shape.height,
        in_width: shape.width,
        out_channels,
        kernel_height: kh,
        kernel_width: kw,
        stride: per_axis(object.get("stride"), shape, 1, &format!("{place}.stride"))?,
        padding: padding(object.get("padding"), shape, &format!("{place}.padding"))?,
        dilation: per_axis(
            object.get("dilation"),
            shape,
            1,
            &format!("{place}.dilation"),
        )?,
    };
    let (h, w) = conv_shape.output_size().ok_or_else(|| {
        invalid(
            place,
            format!(
                "kernel {kh} × {kw} (stride {:?}, dilation {:?}, padding {:?}) does not fit an \
                 input of {} × {}",
                conv_shape.stride,
                conv_shape.dilation,
                conv_shape.padding,
                shape.height,
                shape.width
            ),
        )
    })?;
    check_unfolded(h, w, patch, shape, place)?;
    *shape = Shape {
        channels: out_channels,
        height: h,
        width: w,
        spatial_rank: shape.spatial_rank,
    };
    Ok(Layer::Conv(Conv::new(conv_shape, kernel, bias)))
}

fn collect(
    value: &Value,
    dims: &[usize],
    depth: usize,
    place: &str,
    out: &mut Vec<f64>,
) -> Result<(), ModelError> {
    if depth == dims.len() {
        let v = value
            .as_f64()
            .filter(|x| x.is_finite())
            .ok_or_else(|| invalid(place, format!("{value} is not a finite number")))?;
        out.push(v);
        return Ok(());
    }
    let list = value
        .as_array()
        .filter(|l| l.len() == dims[depth])
        .ok_or_else(|| {
            invalid(
                place,
                format!(
                    "a list at depth {depth} does not have {} entries",
                    dims[depth]
                ),
            )
        })?;
    for item in list {
        collect(item, dims, depth + 1, place, out)?;
    }
    Ok(())
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
