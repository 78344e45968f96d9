//! The nodes on channel data (`[batch, C, L]` or `[batch, C, H, W]`): Conv, BatchNormalization,
//! MaxPool, AveragePool, GlobalMaxPool and GlobalAveragePool, each written as the layout's `conv`,
//! `batchnorm`, `maxpool` or `averagepool` layer with the same numbers.
//!
//! Guarantee: a node is imported only when the layer computes exactly the operator's definition:
//! Conv with `group = 1` and explicit padding (`auto_pad` NOTSET or VALID); pooling with `ceil_mode = 0`
//! and dilation 1, max pooling without its Indices output, average pooling with `count_include_pad = 0`
//! (or 1 without padding, which is the same); BatchNormalization in inference form. Every other
//! attribute value is refused with an error naming the node, the attribute and what is supported.
//! Kernels are copied in ONNX's `[out][in][k…]` order, which is the layout's; sizes are checked
//! before anything is built from them.

use nalgebra::{DMatrix, DVector};

use super::super::tensor::{attribute, int_attribute, ints_attribute, string_attribute};
use super::evaluate::Operands;
use super::path::DataPath;
use super::{join, Converter, OnnxError};
use crate::model::pool::{Pool, PoolOp};
use crate::model::{Conv, ConvShape, Layer};

/// Per spatial axis (height first; height 1 for 1-D): the window geometry a node asks for.
struct Geometry {
    stride: (usize, usize),
    dilation: (usize, usize),
    /// (top, left, bottom, right).
    padding: (usize, usize, usize, usize),
}

/// `[C, L]` or `[C, H, W]` as (channels, height, width).
fn extent(shape: &[usize]) -> (usize, usize, usize) {
    match shape {
        [c, l] => (*c, 1, *l),
        [c, h, w] => (*c, *h, *w),
        _ => unreachable!("begin_spatial checked the rank"),
    }
}

/// Values per spatial axis, widened to (height, width).
fn pair(values: &[usize]) -> (usize, usize) {
    match values {
        [w] => (1, *w),
        [h, w] => (*h, *w),
        _ => unreachable!("checked against the rank"),
    }
}

/// The output shape `[C, L']` or `[C, H', W']` for `channels` and (height, width).
fn shape_of(rank: usize, channels: usize, (h, w): (usize, usize)) -> Vec<usize> {
    if rank == 1 {
        vec![channels, w]
    } else {
        vec![channels, h, w]
    }
}

impl Converter<'_> {
    /// Checks the data operand and the layout, and returns the spatial rank (1 or 2).
    fn spatial_input(&self, operands: &Operands, path: &mut DataPath) -> Result<usize, OnnxError> {
        let index = operands.index;
        let op = self.graph.node[index]
            .op_type
            .as_deref()
            .unwrap_or_default();
        self.refuse_after_final(index, path, op)?;
        if !operands.data_first {
            return Err(self.unsupported(index, "the data must be input X"));
        }
        path.begin_spatial()
            .map_err(|e| self.unsupported(index, e))?;
        Ok(path.shape.len() - 1)
    }

    /// An integer list attribute of `expected` entries, each at least `minimum`, or `default` for
    /// each when absent.
    fn counts(
        &self,
        index: usize,
        name: &str,
        expected: usize,
        default: usize,
        minimum: usize,
    ) -> Result<Vec<usize>, OnnxError> {
        let node = &self.graph.node[index];
        if attribute(node, name).is_none() {
            return Ok(vec![default; expected]);
        }
        let values = ints_attribute(node, name);
        if values.len() != expected || values.iter().any(|v| *v < minimum as i64) {
            return Err(self.unsupported(
                index,
                format!("{name} is {values:?}, expected {expected} integer(s), each ≥ {minimum}"),
            ));
        }
        Ok(values.iter().map(|v| *v as usize).collect())
    }

    /// Strides, dilations and pads of a Conv or pooling node on data of spatial rank `rank`.
    fn geometry(&self, index: usize, rank: usize) -> Result<Geometry, OnnxError> {
        let node = &self.graph.node[index];
        let auto_pad = string_attribute(node, "auto_pad").unwrap_or_else(|| "NOTSET".into());
        let pads = match auto_pad.as_str() {
            "NOTSET" => self.counts(index, "pads", 2 * rank, 0, 0)?,
            "VALID" => {
                if ints_attribute(node, "pads").iter().any(|p| *p != 0) {
                    return Err(self.unsupported(
                        index,
                        "pads together with auto_pad VALID (the operator allows only one of them)",
                    ));
                }
                vec![0; 2 * rank]
            }
            other => {
                return Err(self.unsupported(
                    index,
                    format!(
                        "auto_pad {other} is not supported (expected NOTSET with explicit pads, or VALID)"
                    ),
                ))
            }
        };
        // ONNX orders pads as all the starts, then all the ends.
        let padding = if rank == 1 {
            (0, pads[0], 0, pads[1])
        } else {
            (pads[0], pads[1], pads[2], pads[3])
        };
        Ok(Geometry {
            stride: pair(&self.counts(index, "strides", rank, 1, 1)?),
            dilation: pair(&self.counts(index, "dilations", rank, 1, 1)?),
            padding,
        })
    }

    /// Checks an optional `kernel_shape` attribute against the kernel the node uses.
    fn check_kernel_shape(&self, index: usize, kernel: &[usize]) -> Result<(), OnnxError> {
        let node = &self.graph.node[index];
        if attribute(node, "kernel_shape").is_none() {
            return Ok(());
        }
        let stated = ints_attribute(node, "kernel_shape");
        if stated.len() != kernel.len() || stated.iter().zip(kernel).any(|(a, b)| *a != *b as i64) {
            return Err(self.unsupported(
                index,
                format!(
                    "kernel_shape {stated:?} does not match the weights' spatial shape {kernel:?}"
                ),
            ));
        }
        Ok(())
    }

    pub(super) fn conv(&self, operands: &Operands, path: &mut DataPath) -> Result<(), OnnxError> {
        let index = operands.index;
        let node = &self.graph.node[index];
        let rank = self.spatial_input(operands, path)?;
        let group = int_attribute(node, "group", 1);
        if group != 1 {
            return Err(self.unsupported(
                index,
                format!("group = {group}: grouped and depthwise convolutions are not supported (expected group = 1)"),
            ));
        }
        let (channels, height, width) = extent(&path.shape);
        let w = operands
            .constant
            .as_ref()
            .ok_or_else(|| self.unsupported(index, "the weights W are missing or not constant"))?;
        if w.dims.len() != rank + 2 || w.dims[1] != channels || w.dims.contains(&0) {
            return Err(self.unsupported(
                index,
                format!(
                    "W has shape {:?}, expected [out channels, {channels}, {}] for data [batch, {}]",
                    w.dims,
                    if rank == 1 { "k" } else { "kh, kw" },
                    join(&path.shape)
                ),
            ));
        }
        self.require_finite(index, "W", &w.values)?;
        self.check_kernel_shape(index, &w.dims[2..])?;
        let out_channels = w.dims[0];
        let (kernel_height, kernel_width) = pair(&w.dims[2..]);
        let bias = match operands.constant_at(2) {
            Some(b) => {
                self.require_finite(index, "B", &b.values)?;
                if b.dims != [out_channels] {
                    return Err(self.unsupported(
                        index,
                        format!("B has shape {:?}, expected [{out_channels}]", b.dims),
                    ));
                }
                DVector::from_vec(b.values.clone())
            }
            None => DVector::zeros(out_channels),
        };
        let geometry = self.geometry(index, rank)?;
        let shape = ConvShape {
            in_channels: channels,
            in_height: height,
            in_width: width,
            out_channels,
            kernel_height,
            kernel_width,
            stride: geometry.stride,
            padding: geometry.padding,
            dilation: geometry.dilation,
        };
        let output = shape.output_size().ok_or_else(|| {
            self.unsupported(
                index,
                format!(
                    "the kernel {kernel_height} × {kernel_width} (dilations {:?}, pads {:?}) does not fit the data [batch, {}]",
                    geometry.dilation,
                    geometry.padding,
                    join(&path.shape)
                ),
            )
        })?;
        let (out_height, out_width) = output;
        self.check_size(index, out_height * out_width, shape.patch_len())?;
        // W is row-major [out][in][kh][kw]: row o holds in-channel × kernel-row × kernel-column.
        let kernel = DMatrix::from_row_slice(out_channels, shape.patch_len(), &w.values);
        path.push_spatial(
            Layer::Conv(Conv::new(shape, kernel, bias)),
            shape_of(rank, out_channels, output),
        );
        Ok(())
    }

    /// BatchNormalization on channel data: a `batchnorm` layer with the node's own parameters.
    pub(super) fn channel_batch_norm(
        &self,
        operands: &Operands,
        path: &mut DataPath,
    ) -> Result<(), OnnxError> {
        self.spatial_input(operands, path)?;
        let (channels, height, width) = extent(&path.shape);
        let ([scale, shift, mean, variance], epsilon) =
            self.batch_norm_parameters(operands, path, channels)?;
        let shape = path.shape.clone();
        path.push_spatial(
            Layer::BatchNorm {
                scale,
                shift,
                mean,
                variance,
                epsilon,
                positions: height * width,
            },
            shape,
        );
        Ok(())
    }

    pub(super) fn pool(
        &self,
        operands: &Operands,
        path: &mut DataPath,
        op: PoolOp,
    ) -> Result<(), OnnxError> {
        let index = operands.index;
        let node = &self.graph.node[index];
        let rank = self.spatial_input(operands, path)?;
        if int_attribute(node, "ceil_mode", 0) != 0 {
            return Err(self.unsupported(
                index,
                "ceil_mode = 1 is not supported (expected 0: windows that fit the padded input)",
            ));
        }
        let geometry = self.geometry(index, rank)?;
        if geometry.dilation != (1, 1) {
            return Err(self.unsupported(
                index,
                format!(
                    "dilations {:?} are not supported (expected 1)",
                    geometry.dilation
                ),
            ));
        }
        let (t, l, b, r) = geometry.padding;
        if op == PoolOp::Average
            && int_attribute(node, "count_include_pad", 0) != 0
            && (t, l, b, r) != (0, 0, 0, 0)
        {
            return Err(self.unsupported(
                index,
                "count_include_pad = 1 with padding is not supported (ballast's average pool divides by the number of in-range inputs, as count_include_pad = 0 does)",
            ));
        }
        if attribute(node, "kernel_shape").is_none() {
            return Err(self.unsupported(index, "kernel_shape is missing"));
        }
        let kernel = pair(&self.counts(index, "kernel_shape", rank, 1, 1)?);
        self.push_pool(index, path, op, kernel, geometry.stride, geometry.padding)
    }

    pub(super) fn global_pool(
        &self,
        operands: &Operands,
        path: &mut DataPath,
        op: PoolOp,
    ) -> Result<(), OnnxError> {
        self.spatial_input(operands, path)?;
        let (_, height, width) = extent(&path.shape);
        let window = (height, width);
        self.push_pool(operands.index, path, op, window, window, (0, 0, 0, 0))
    }

    /// Refuses a layer that unfolds into more than the size limit (`outputs` positions reading
    /// `window` inputs each), before anything is built from sizes the file only claims.
    fn check_size(&self, index: usize, outputs: usize, window: usize) -> Result<(), OnnxError> {
        let entries = outputs.saturating_mul(window);
        if entries > self.size_limit {
            return Err(self.unsupported(
                index,
                format!(
                    "unfolds into {entries} window entries, above the limit of {} (use --allow-large)",
                    self.size_limit
                ),
            ));
        }
        Ok(())
    }

    fn push_pool(
        &self,
        index: usize,
        path: &mut DataPath,
        op: PoolOp,
        kernel: (usize, usize),
        stride: (usize, usize),
        padding: (usize, usize, usize, usize),
    ) -> Result<(), OnnxError> {
        let rank = path.shape.len() - 1;
        let (channels, in_height, in_width) = extent(&path.shape);
        let pool = Pool {
            op,
            channels,
            in_height,
            in_width,
            kernel,
            stride,
            padding,
        };
        let output = pool.output_size().ok_or_else(|| {
            self.unsupported(
                index,
                format!(
                    "the window {kernel:?} with pads {padding:?} does not fit the data [batch, {}] (each pad must be smaller than the window)",
                    join(&path.shape)
                ),
            )
        })?;
        self.check_size(index, channels * output.0 * output.1, kernel.0 * kernel.1)?;
        path.push_spatial(Layer::Pool(pool), shape_of(rank, channels, output));
        Ok(())
    }
}
