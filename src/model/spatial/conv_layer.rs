//! Reading a `conv` layer: the nested kernel lists `[out][in][k…]` checked level by level against the
//! running shape, the bias, stride, padding and dilation, and the output shape. The kernel's nesting
//! and every list length are checked before the values are gathered.

use nalgebra::DMatrix;
use serde_json::Value;

use super::fields::{
    check_fields, check_unfolded, invalid, padding, per_axis, require_spatial, vector,
};
use super::Shape;
use crate::model::conv::{Conv, ConvShape};
use crate::model::layout::Layer;
use crate::model::ModelError;

pub(super) fn parse_conv(
    object: &Value,
    shape: &mut Shape,
    place: &str,
) -> Result<Layer, ModelError> {
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
