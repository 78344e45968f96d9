//! The affine nodes on flat features: Gemm, MatMul, elementwise Add / Sub / Mul / Div with a
//! constant, BatchNormalization on `[batch, features]`, and the `ai.onnx.ml` Scaler. Each becomes a
//! step of the pending affine map ([`DataPath`]), composed in f64.
//!
//! Guarantee: the composed map is the node's definition applied to the data, up to the f64 rounding of
//! the composition (a subtraction followed by a division is kept exactly). Constants are broadcast by
//! numpy rules and refused, naming the node, when they do not fit.

use nalgebra::{DMatrix, DVector};

use super::super::tensor::{float_attribute, floats_attribute, int_attribute, Constant};
use super::evaluate::Operands;
use super::path::DataPath;
use super::{join, Converter, OnnxError};

/// ONNX's default `epsilon` of BatchNormalization (a float attribute: 1e-5 rounded to float32).
pub(super) const DEFAULT_EPSILON: f32 = 1e-5;

impl Converter<'_> {
    pub(super) fn gemm(&self, operands: &Operands, path: &mut DataPath) -> Result<(), OnnxError> {
        let index = operands.index;
        let node = &self.graph.node[index];
        self.refuse_after_final(index, path, "Gemm")?;
        if !operands.data_first {
            return Err(self.unsupported(
                index,
                "the data must be input A; a constant A is not supported",
            ));
        }
        if int_attribute(node, "transA", 0) != 0 {
            return Err(self.unsupported(index, "transA=1 on the data input is not supported"));
        }
        self.require_vector_shape(index, path)?;
        let b = operands
            .constant
            .as_ref()
            .ok_or_else(|| self.unsupported(index, "input B is missing"))?;
        let alpha = float_attribute(node, "alpha", 1.0);
        let beta = float_attribute(node, "beta", 1.0);
        let trans_b = int_attribute(node, "transB", 0) != 0;
        let d = path.width();
        if b.dims.len() != 2 {
            return Err(self.unsupported(
                index,
                format!("B has shape {:?}, expected a matrix", b.dims),
            ));
        }
        let (k, inner) = if trans_b {
            (b.dims[0], b.dims[1])
        } else {
            (b.dims[1], b.dims[0])
        };
        if inner != d {
            return Err(self.unsupported(
                index,
                format!(
                    "B has shape {:?}, which does not fit {d} input features",
                    b.dims
                ),
            ));
        }
        self.require_finite(index, "B", &b.values)?;
        let weights = DMatrix::from_fn(k, d, |r, col| {
            let v = if trans_b {
                b.values[r * d + col]
            } else {
                b.values[col * k + r]
            };
            alpha * v
        });
        let bias = match operands.constant_at(2) {
            Some(c) => {
                self.require_finite(index, "C", &c.values)?;
                self.broadcast(index, &c, &[k], "C")?.map(|v| beta * v)
            }
            None => DVector::zeros(k),
        };
        path.linear(weights, bias);
        Ok(())
    }

    pub(super) fn matmul(&self, operands: &Operands, path: &mut DataPath) -> Result<(), OnnxError> {
        let index = operands.index;
        self.refuse_after_final(index, path, "MatMul")?;
        if !operands.data_first {
            return Err(self.unsupported(
                index,
                "the data must be the first operand; constant · data is not supported",
            ));
        }
        self.require_vector_shape(index, path)?;
        let b = operands
            .constant
            .as_ref()
            .ok_or_else(|| self.unsupported(index, "the weight operand is missing"))?;
        let d = path.width();
        if b.dims.len() != 2 || b.dims[0] != d {
            return Err(self.unsupported(
                index,
                format!("weights have shape {:?}, expected [{d}, outputs]", b.dims),
            ));
        }
        self.require_finite(index, "weights", &b.values)?;
        let k = b.dims[1];
        let weights = DMatrix::from_fn(k, d, |r, col| b.values[col * k + r]);
        path.linear(weights, DVector::zeros(k));
        Ok(())
    }

    /// Add, Sub, Mul or Div of the data and a constant (either order; Div only as data / constant).
    pub(super) fn arithmetic(
        &self,
        operands: &Operands,
        path: &mut DataPath,
    ) -> Result<(), OnnxError> {
        let index = operands.index;
        let op = self.graph.node[index]
            .op_type
            .as_deref()
            .unwrap_or_default();
        self.refuse_after_final(index, path, op)?;
        if op == "Div" && !operands.data_first {
            return Err(self.unsupported(index, "constant / data is not affine"));
        }
        let c = operands
            .constant
            .as_ref()
            .ok_or_else(|| self.unsupported(index, "the constant operand is missing"))?;
        self.require_finite(index, "constant operand", &c.values)?;
        let shape = path.shape.clone();
        let c = self.broadcast(index, c, &shape, "constant operand")?;
        let n = c.len();
        match (op, operands.data_first) {
            ("Add", _) => path.elementwise(DVector::from_element(n, 1.0), c),
            ("Sub", true) => path.subtract(c),
            ("Sub", false) => path.elementwise(DVector::from_element(n, -1.0), c),
            ("Mul", _) => path.elementwise(c, DVector::zeros(n)),
            _ => {
                if c.iter().any(|v| *v == 0.0) {
                    return Err(self.unsupported(index, "divides by zero"));
                }
                path.divide(c);
            }
        }
        Ok(())
    }

    /// The four parameter inputs of a BatchNormalization broadcast to `channels` values each
    /// (scale, bias, mean, variance) and its epsilon, after checking the inference form.
    pub(super) fn batch_norm_parameters(
        &self,
        operands: &Operands,
        path: &DataPath,
        channels: usize,
    ) -> Result<([DVector<f64>; 4], f64), OnnxError> {
        let index = operands.index;
        let node = &self.graph.node[index];
        self.refuse_after_final(index, path, "BatchNormalization")?;
        if !operands.data_first {
            return Err(self.unsupported(index, "the data must be input X"));
        }
        if int_attribute(node, "training_mode", 0) != 0 {
            return Err(self.unsupported(
                index,
                "training_mode=1; only the inference form (running mean and variance) is supported",
            ));
        }
        let mut params = Vec::with_capacity(4);
        for (k, what) in ["scale", "B", "input_mean", "input_var"].iter().enumerate() {
            let c = operands
                .constant_at(k + 1)
                .ok_or_else(|| self.unsupported(index, format!("input {what} is missing")))?;
            self.require_finite(index, what, &c.values)?;
            params.push(self.broadcast(index, &c, &[channels], what)?);
        }
        let epsilon = float_attribute(node, "epsilon", f64::from(DEFAULT_EPSILON));
        if !(epsilon.is_finite() && epsilon >= 0.0) {
            return Err(self.unsupported(
                index,
                format!("epsilon is {epsilon}, expected a number ≥ 0"),
            ));
        }
        if let Some(c) = (0..channels).find(|c| params[3][*c] + epsilon <= 0.0) {
            return Err(self.unsupported(
                index,
                format!(
                    "input_var + epsilon of channel {c} is {}, expected > 0",
                    params[3][c] + epsilon
                ),
            ));
        }
        let [scale, shift, mean, variance]: [DVector<f64>; 4] =
            params.try_into().expect("four parameters");
        Ok(([scale, shift, mean, variance], epsilon))
    }

    /// BatchNormalization on `[batch, features]`: one affine step per feature.
    pub(super) fn flat_batch_norm(
        &self,
        operands: &Operands,
        path: &mut DataPath,
    ) -> Result<(), OnnxError> {
        self.require_vector_shape(operands.index, path)?;
        let d = path.width();
        let ([gamma, beta, mean, variance], epsilon) =
            self.batch_norm_parameters(operands, path, d)?;
        let scale = DVector::from_fn(d, |i, _| gamma[i] / (variance[i] + epsilon).sqrt());
        let shift = DVector::from_fn(d, |i, _| beta[i] - mean[i] * scale[i]);
        path.elementwise(scale, shift);
        Ok(())
    }

    pub(super) fn scaler(&self, index: usize, path: &mut DataPath) -> Result<(), OnnxError> {
        let node = &self.graph.node[index];
        self.refuse_after_final(index, path, "Scaler")?;
        self.require_vector_shape(index, path)?;
        let d = path.width();
        let offset = floats_attribute(node, "offset");
        let scale = floats_attribute(node, "scale");
        let expand =
            |v: Vec<f64>, default: f64, what: &str| -> Result<DVector<f64>, OnnxError> {
                match v.len() {
                    0 => Ok(DVector::from_element(d, default)),
                    1 => Ok(DVector::from_element(d, v[0])),
                    n if n == d => Ok(DVector::from_vec(v)),
                    n => Err(self
                        .unsupported(index, format!("{what} has {n} values, expected 1 or {d}"))),
                }
            };
        let offset = expand(offset, 0.0, "offset")?;
        let scale = expand(scale, 1.0, "scale")?;
        self.require_finite(index, "offset", offset.as_slice())?;
        self.require_finite(index, "scale", scale.as_slice())?;
        let shift = -offset.component_mul(&scale);
        path.elementwise(scale, shift);
        Ok(())
    }

    /// Broadcasts a constant (numpy rules, leading batch dimension of size 1 allowed) to `shape`.
    pub(super) fn broadcast(
        &self,
        index: usize,
        c: &Constant,
        shape: &[usize],
        what: &str,
    ) -> Result<DVector<f64>, OnnxError> {
        let fail = || {
            self.unsupported(
                index,
                format!(
                    "{what} has shape {:?}, which does not broadcast over [batch, {}]",
                    c.dims,
                    join(shape)
                ),
            )
        };
        if c.dims.len() > shape.len() + 1 || (c.dims.len() == shape.len() + 1 && c.dims[0] != 1) {
            return Err(fail());
        }
        let dims: Vec<usize> = c
            .dims
            .iter()
            .rev()
            .take(shape.len())
            .rev()
            .copied()
            .collect();
        let offset = shape.len() - dims.len();
        for (k, d) in dims.iter().enumerate() {
            if *d != 1 && *d != shape[offset + k] {
                return Err(fail());
            }
        }
        let total: usize = shape.iter().product();
        let mut out = DVector::zeros(total);
        let mut position = vec![0usize; shape.len()];
        for slot in out.iter_mut() {
            let mut flat = 0;
            for (k, d) in dims.iter().enumerate() {
                let p = if *d == 1 { 0 } else { position[offset + k] };
                flat = flat * d + p;
            }
            *slot = c.values[flat];
            for axis in (0..shape.len()).rev() {
                position[axis] += 1;
                if position[axis] < shape[axis] {
                    break;
                }
                position[axis] = 0;
            }
        }
        Ok(out)
    }
}
