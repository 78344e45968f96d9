//! One node on the score path: constants are folded, the one data operand is picked out, and the node
//! is handed to the module of its concept. The steps that only move values around (Identity, Dropout
//! in inference, Cast to a float type, Flatten, Reshape) and Relu live here.
//!
//! Guarantee: a node either maps onto the layout exactly or is refused with an error naming it, its op
//! type and the reason; nothing is approximated or skipped silently.

use super::super::schema::tensor_proto::DataType;
use super::super::tensor::{int_attribute, Constant};
use super::path::DataPath;
use super::{join, Converter, OnnxError, Symbol};
use crate::model::pool::PoolOp;
use crate::model::Layer;

/// The operands of a node with exactly one data operand.
pub(super) struct Operands {
    /// The node's position in the graph.
    pub index: usize,
    /// The other of the first two operands, when present (always a constant).
    pub constant: Option<Constant>,
    /// True when the data is the first operand.
    pub data_first: bool,
    /// The operands after the first two (none of them depends on the data).
    pub rest: Vec<Option<Symbol>>,
}

impl Operands {
    /// The constant operand at position `k` (0-based over all inputs; `k ≥ 1`).
    pub fn constant_at(&self, k: usize) -> Option<Constant> {
        if k == 1 {
            return self.constant.clone();
        }
        match self.rest.get(k - 2) {
            Some(Some(Symbol::Constant(c))) => Some(c.clone()),
            _ => None,
        }
    }
}

const SUPPORTED: &str = "Gemm, MatMul, Add, Sub, Mul, Div, BatchNormalization, Relu, Conv, \
    MaxPool, AveragePool, GlobalAveragePool, GlobalMaxPool, Flatten, Reshape, Identity, Cast, \
    Dropout, final Softmax, final Sigmoid on one logit; ai.onnx.ml Scaler, LinearClassifier, \
    Normalizer";

impl Converter<'_> {
    pub(super) fn evaluate(
        &self,
        index: usize,
        args: Vec<Option<Symbol>>,
        dropped: &mut Vec<String>,
    ) -> Result<Vec<(String, Symbol)>, OnnxError> {
        let node = &self.graph.node[index];
        let op = node.op_type.as_deref().unwrap_or_default();
        let domain = node.domain.as_deref().unwrap_or_default();
        let out = |k: usize| node.output.get(k).cloned().unwrap_or_default();
        let all_constant = args.iter().all(|a| !matches!(a, Some(Symbol::Data(_))));
        if op == "Constant" {
            return Ok(vec![(out(0), Symbol::Constant(self.constant_node(index)?))]);
        }
        if all_constant {
            return self
                .fold_constant(index, args)
                .map(|c| vec![(out(0), Symbol::Constant(c))]);
        }
        let ml = domain == "ai.onnx.ml";
        if !(ml || domain.is_empty() || domain == "ai.onnx") {
            return Err(self.unsupported(
                index,
                format!("operators of domain '{domain}' are not supported"),
            ));
        }
        let mut inputs = args.into_iter();
        let first = inputs.next().flatten();
        let second = inputs.next().flatten();
        let rest: Vec<Option<Symbol>> = inputs.collect();

        if op == "Concat" && !ml {
            return self
                .binary_pair(index, first, second, rest.len(), dropped)
                .map(|p| vec![(out(0), Symbol::Data(Box::new(p)))]);
        }
        // Exactly one operand may depend on the data.
        let (mut path, constant, data_first) = match (first, second) {
            (Some(Symbol::Data(_)), Some(Symbol::Data(_))) => {
                return Err(self.unsupported(
                    index,
                    "both operands depend on the data input; only operations with constant operands are affine",
                ));
            }
            (Some(Symbol::Data(p)), c) => (*p, c, true),
            (c, Some(Symbol::Data(p))) => (*p, c, false),
            _ => {
                return Err(
                    self.unsupported(index, "the data input must be its first or second operand")
                )
            }
        };
        if rest.iter().any(|r| matches!(r, Some(Symbol::Data(_)))) {
            return Err(self.unsupported(index, "a parameter input depends on the data input"));
        }
        let operands = Operands {
            index,
            constant: constant.map(|c| match c {
                Symbol::Constant(c) => c,
                Symbol::Data(_) => unreachable!("handled above"),
            }),
            data_first,
            rest,
        };
        let extra_outputs = node.output.iter().skip(1).any(|o| !o.is_empty());
        if extra_outputs && op == "MaxPool" {
            return Err(self.unsupported(
                index,
                "the Indices output is not supported (expected only the pooled values)",
            ));
        }
        if extra_outputs && !matches!(op, "Dropout" | "LinearClassifier") {
            return Err(self.unsupported(index, "extra outputs (training mode) are not supported"));
        }
        let spatial = |path: &DataPath| path.shape.len() >= 2;

        match (ml, op) {
            (false, "Identity") => {}
            (false, "Dropout") => {
                // Inference-mode dropout is the identity; a training_mode input must be constant false.
                if operands
                    .constant_at(2)
                    .is_some_and(|c| c.values.iter().any(|v| *v != 0.0))
                {
                    return Err(self.unsupported(index, "training_mode is true"));
                }
            }
            (false, "Cast") => {
                let to = int_attribute(node, "to", 0);
                if to != DataType::Float as i64 && to != DataType::Double as i64 {
                    return Err(self.unsupported(
                        index,
                        format!("casts the scores to element type {to}; only FLOAT and DOUBLE keep them"),
                    ));
                }
            }
            (false, "Flatten") => {
                let axis = int_attribute(node, "axis", 1);
                if axis != 1 && axis != -(path.shape.len() as i64) {
                    return Err(self.unsupported(
                        index,
                        format!("axis {axis} would merge the batch dimension; expected 1"),
                    ));
                }
                path.flatten().map_err(|e| self.unsupported(index, e))?;
            }
            (false, "Reshape") => {
                let target = operands
                    .constant
                    .as_ref()
                    .ok_or_else(|| self.unsupported(index, "the shape is not a constant"))?;
                let shape = self.reshape(
                    index,
                    &path.shape,
                    target,
                    int_attribute(node, "allowzero", 0),
                )?;
                if shape.len() == 1 {
                    path.flatten().map_err(|e| self.unsupported(index, e))?;
                } else {
                    path.shape = shape;
                }
            }
            (false, "Relu") => {
                self.refuse_after_final(index, &path, "Relu")?;
                path.flush().map_err(|e| self.unsupported(index, e))?;
                if !matches!(path.layers.last(), Some(Layer::Relu)) {
                    path.layers.push(Layer::Relu);
                }
            }
            (false, "Softmax") | (false, "LogSoftmax") => {
                self.softmax(index, &mut path, dropped)?
            }
            (false, "Sigmoid") => self.sigmoid(index, &mut path, dropped)?,
            (false, "Sub") if matches!(path.sigmoid, Some((_, false))) && !data_first => {
                self.one_minus_sigmoid(&operands, &mut path)?
            }
            (false, "Gemm") => self.gemm(&operands, &mut path)?,
            (false, "MatMul") => self.matmul(&operands, &mut path)?,
            (false, "Add") | (false, "Sub") | (false, "Mul") | (false, "Div") => {
                self.arithmetic(&operands, &mut path)?
            }
            (false, "BatchNormalization") if spatial(&path) => {
                self.channel_batch_norm(&operands, &mut path)?
            }
            (false, "BatchNormalization") => self.flat_batch_norm(&operands, &mut path)?,
            (false, "Conv") => self.conv(&operands, &mut path)?,
            (false, "MaxPool") => self.pool(&operands, &mut path, PoolOp::Max)?,
            (false, "AveragePool") => self.pool(&operands, &mut path, PoolOp::Average)?,
            (false, "GlobalMaxPool") => self.global_pool(&operands, &mut path, PoolOp::Max)?,
            (false, "GlobalAveragePool") => {
                self.global_pool(&operands, &mut path, PoolOp::Average)?
            }
            (true, "Scaler") => self.scaler(index, &mut path)?,
            (true, "LinearClassifier") => {
                self.refuse_after_final(index, &path, "LinearClassifier")?;
                self.linear_classifier(index, &mut path, dropped)?;
                return Ok(vec![(out(1), Symbol::Data(Box::new(path)))]);
            }
            (true, "Normalizer") => self.normalizer(index, &path, dropped)?,
            _ => {
                return Err(self.unsupported(
                    index,
                    format!(
                        "this operation is not supported on the score path (supported: {SUPPORTED})"
                    ),
                ))
            }
        }
        Ok(vec![(out(0), Symbol::Data(Box::new(path)))])
    }

    /// Refuses `what` once a final argmax-preserving step has been applied.
    pub(super) fn refuse_after_final(
        &self,
        index: usize,
        path: &DataPath,
        what: &str,
    ) -> Result<(), OnnxError> {
        match &path.finished_by {
            Some(finished) => Err(self.unsupported(
                index,
                format!(
                    "{what} after {finished}; only shape-keeping steps may follow the final activation"
                ),
            )),
            None => Ok(()),
        }
    }

    /// Refuses data that is not `[batch, features]`.
    pub(super) fn require_vector_shape(
        &self,
        index: usize,
        path: &DataPath,
    ) -> Result<(), OnnxError> {
        if path.shape.len() != 1 {
            return Err(self.unsupported(
                index,
                format!(
                    "the data has shape [batch, {}] here; flatten it to [batch, features] first",
                    join(&path.shape)
                ),
            ));
        }
        Ok(())
    }

    /// The shape a constant `Reshape` target gives `shape` (batch dimension kept and dropped).
    fn reshape(
        &self,
        index: usize,
        shape: &[usize],
        target: &Constant,
        allow_zero: i64,
    ) -> Result<Vec<usize>, OnnxError> {
        let width: usize = shape.iter().product();
        let t: Vec<i64> = target.values.iter().map(|v| *v as i64).collect();
        let fail = |why: String| self.unsupported(index, format!("target shape {t:?}: {why}"));
        if t.is_empty() || !(t[0] == 0 || t[0] == -1) || (t[0] == 0 && allow_zero != 0) {
            return Err(fail(
                "the first dimension must keep the batch (0 or -1)".into(),
            ));
        }
        let mut out = Vec::new();
        let mut unknown = None;
        for (i, v) in t.iter().enumerate().skip(1) {
            match *v {
                -1 => {
                    if unknown.is_some() || t[0] == -1 {
                        return Err(fail("more than one -1".into()));
                    }
                    unknown = Some(out.len());
                    out.push(1);
                }
                0 if allow_zero == 0 => out.push(
                    *shape
                        .get(i - 1)
                        .ok_or_else(|| fail("0 copies a missing dimension".into()))?,
                ),
                v if v > 0 => out.push(v as usize),
                v => return Err(fail(format!("dimension {v} is not allowed"))),
            }
        }
        let known: usize = out.iter().product();
        if let Some(u) = unknown {
            if known == 0 || !width.is_multiple_of(known) {
                return Err(fail(format!("does not fit {width} features")));
            }
            out[u] = width / known;
        } else if known != width {
            return Err(fail(format!(
                "holds {known} features per sample, the data has {width}"
            )));
        }
        Ok(out)
    }
}
