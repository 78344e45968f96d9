//! The final steps of a classifier and the `ai.onnx.ml` classifier nodes: a final Softmax or
//! LogSoftmax, a final Sigmoid on one logit with the `[1 − σ(z), σ(z)]` pair skl2onnx writes, the
//! LinearClassifier (coefficients, labels, post-transform) and a Normalizer after positive scores.
//!
//! Guarantee: a step is dropped only when it keeps the argmax of the scores (the imported model's
//! outputs are then logits whose argmax is the graph's decision); each dropped step is recorded in
//! the provenance. A classifier's labels become the model's classes.

use nalgebra::{DMatrix, DVector};

use super::super::tensor::{floats_attribute, int_attribute, string_attribute};
use super::evaluate::Operands;
use super::outputs::labels_of;
use super::path::DataPath;
use super::{Converter, OnnxError, Symbol};

impl Converter<'_> {
    pub(super) fn softmax(
        &self,
        index: usize,
        path: &mut DataPath,
        dropped: &mut Vec<String>,
    ) -> Result<(), OnnxError> {
        let node = &self.graph.node[index];
        let op = node.op_type.as_deref().unwrap_or_default();
        let default_axis = if self.opset >= 13 { -1 } else { 1 };
        self.check_feature_axis(index, path, int_attribute(node, "axis", default_axis))?;
        if path.single_logit {
            return Err(
                self.unsupported(index, "a softmax over a single logit is not a classifier")
            );
        }
        if path.finished_by.is_none() {
            path.finished_by = Some(format!("{op} '{}'", self.node_label(index)));
        }
        path.positive = op == "Softmax";
        dropped.push(format!("{op} '{}'", self.node_label(index)));
        Ok(())
    }

    pub(super) fn sigmoid(
        &self,
        index: usize,
        path: &mut DataPath,
        dropped: &mut Vec<String>,
    ) -> Result<(), OnnxError> {
        if path.finished_by.is_some() || path.pending_width() != 1 {
            return Err(self.unsupported(
                index,
                "Sigmoid is supported only as the final step on a single logit (binary: class 1 iff the logit > 0)",
            ));
        }
        path.finished_by = Some(format!("Sigmoid '{}'", self.node_label(index)));
        path.positive = true;
        path.single_logit = true;
        path.sigmoid = Some((index, false));
        dropped.push(format!("Sigmoid '{}'", self.node_label(index)));
        Ok(())
    }

    /// `1 − σ(z)`: the probability of class 0, kept only to pair it with `σ(z)` in a Concat.
    pub(super) fn one_minus_sigmoid(
        &self,
        operands: &Operands,
        path: &mut DataPath,
    ) -> Result<(), OnnxError> {
        let index = operands.index;
        let one = operands
            .constant
            .as_ref()
            .ok_or_else(|| self.unsupported(index, "the constant operand is missing"))?;
        if one.values.len() != 1 || one.values[0] != 1.0 {
            return Err(
                self.unsupported(index, "only 1 − sigmoid is supported after a final Sigmoid")
            );
        }
        path.sigmoid = path.sigmoid.map(|(node, _)| (node, true));
        Ok(())
    }

    pub(super) fn normalizer(
        &self,
        index: usize,
        path: &DataPath,
        dropped: &mut Vec<String>,
    ) -> Result<(), OnnxError> {
        if !(path.finished_by.is_some() && path.positive) {
            return Err(self.unsupported(
                index,
                "a Normalizer keeps the argmax only on positive scores, after a final Softmax or logistic post-transform",
            ));
        }
        dropped.push(format!("Normalizer '{}'", self.node_label(index)));
        Ok(())
    }

    /// `Concat([1 − σ(z), σ(z)], axis=1)` after a final Sigmoid: the usual two-column probabilities of
    /// a binary classifier, whose argmax is class 1 iff `z > 0` (ties at `z = 0` go to class 0 in
    /// both), so the model stays the single logit `z`.
    pub(super) fn binary_pair(
        &self,
        index: usize,
        first: Option<Symbol>,
        second: Option<Symbol>,
        more: usize,
        dropped: &mut Vec<String>,
    ) -> Result<DataPath, OnnxError> {
        let axis = int_attribute(&self.graph.node[index], "axis", 1);
        let refuse = || {
            self.unsupported(
                index,
                "Concat is supported only as [1 − sigmoid(z), sigmoid(z)] along axis 1 after a final Sigmoid",
            )
        };
        match (first, second) {
            (Some(Symbol::Data(low)), Some(Symbol::Data(high)))
                if more == 0 && (axis == 1 || axis == -1) =>
            {
                match (low.sigmoid, high.sigmoid) {
                    (Some((a, true)), Some((b, false))) if a == b => {
                        dropped.push(format!("Concat '{}'", self.node_label(index)));
                        Ok(*high)
                    }
                    _ => Err(refuse()),
                }
            }
            _ => Err(refuse()),
        }
    }

    pub(super) fn linear_classifier(
        &self,
        index: usize,
        path: &mut DataPath,
        dropped: &mut Vec<String>,
    ) -> Result<(), OnnxError> {
        let node = &self.graph.node[index];
        if node.output.first().is_some_and(|o| o.is_empty()) && node.output.len() < 2 {
            return Err(self.unsupported(index, "has no scores output"));
        }
        self.require_vector_shape(index, path)?;
        let d = path.width();
        let coefficients = floats_attribute(node, "coefficients");
        if coefficients.is_empty() || !coefficients.len().is_multiple_of(d) {
            return Err(self.unsupported(
                index,
                format!(
                    "has {} coefficients, expected a multiple of the {d} input features",
                    coefficients.len()
                ),
            ));
        }
        let rows = coefficients.len() / d;
        let mut intercepts = floats_attribute(node, "intercepts");
        if intercepts.is_empty() {
            intercepts = vec![0.0; rows];
        }
        if intercepts.len() != rows {
            return Err(self.unsupported(
                index,
                format!("has {} intercepts, expected {rows}", intercepts.len()),
            ));
        }
        self.require_finite(index, "coefficients", &coefficients)?;
        self.require_finite(index, "intercepts", &intercepts)?;
        let labels = labels_of(node);
        if let Some(l) = &labels {
            let ok = l.len() == rows || (rows == 1 && l.len() == 2);
            if !ok {
                return Err(self.unsupported(
                    index,
                    format!("has {rows} coefficient rows but {} class labels", l.len()),
                ));
            }
        }
        if rows == 1 && labels.as_ref().map(Vec::len) != Some(2) {
            return Err(self.unsupported(
                index,
                "a single coefficient row needs exactly two class labels (binary)",
            ));
        }
        let weights = DMatrix::from_fn(rows, d, |r, c| coefficients[r * d + c]);
        path.linear(weights, DVector::from_vec(intercepts));
        path.labels = labels;
        path.single_logit = rows == 1;
        let transform = string_attribute(node, "post_transform").unwrap_or_else(|| "NONE".into());
        if rows == 1 && !matches!(transform.as_str(), "NONE" | "LOGISTIC") {
            // Only these two were checked against onnxruntime's one-row binary convention.
            return Err(self.unsupported(
                index,
                format!("a single coefficient row with post_transform {transform} is not supported (expected NONE or LOGISTIC)"),
            ));
        }
        match transform.as_str() {
            "NONE" => {}
            "LOGISTIC" | "SOFTMAX" | "PROBIT" => {
                path.finished_by = Some(format!("LinearClassifier '{}' post_transform {transform}", self.node_label(index)));
                path.positive = transform != "PROBIT";
                dropped.push(format!("post_transform {transform} of LinearClassifier '{}'", self.node_label(index)));
            }
            other => {
                return Err(self.unsupported(
                    index,
                    format!("post_transform {other} does not keep the argmax of the scores; expected NONE, LOGISTIC, SOFTMAX or PROBIT"),
                ))
            }
        }
        Ok(())
    }

    fn check_feature_axis(
        &self,
        index: usize,
        path: &DataPath,
        axis: i64,
    ) -> Result<(), OnnxError> {
        self.require_vector_shape(index, path)?;
        if axis != 1 && axis != -1 {
            return Err(self.unsupported(index, format!("axis {axis} is not the feature axis")));
        }
        Ok(())
    }
}
