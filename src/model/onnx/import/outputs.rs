//! Where the scores and the class labels come from: the one floating-point graph output (looking
//! through a ZipMap, or the output `--output` names), and the labels of a ZipMap, a classifier node or
//! an `ArrayFeatureExtractor(classes, ArgMax(scores))` label branch.
//!
//! Nothing here changes the model; a label branch that does not match exactly is ignored.

use std::collections::HashSet;

use super::super::schema::{tensor_proto::DataType, type_proto, NodeProto};
use super::super::tensor::{decode_tensor, ints_attribute, strings_attribute};
use super::{graph_error, Converter, OnnxError};

impl Converter<'_> {
    /// Chooses the score tensor: returns (tensor name, graph output name, labels from a ZipMap).
    pub(super) fn score_tensor(
        &self,
        wanted: Option<&str>,
    ) -> Result<(String, String, Option<Vec<String>>), OnnxError> {
        let mut candidates = Vec::new();
        for output in &self.graph.output {
            let name = output.name.clone().unwrap_or_default();
            if let Some(&i) = self.producer.get(name.as_str()) {
                let node = &self.graph.node[i];
                if node.op_type.as_deref() == Some("ZipMap") {
                    let labels = labels_of(node);
                    let input = node.input.first().cloned().unwrap_or_default();
                    candidates.push((input, name, labels));
                    continue;
                }
            }
            let element = match output.r#type.as_ref().and_then(|t| t.value.as_ref()) {
                Some(type_proto::Value::TensorType(t)) => t.elem_type.unwrap_or(0),
                _ => 0,
            };
            if element == DataType::Float as i32 || element == DataType::Double as i32 {
                candidates.push((name.clone(), name, None));
            }
        }
        if let Some(w) = wanted {
            return candidates
                .into_iter()
                .find(|(tensor, output, _)| output == w || tensor == w)
                .ok_or_else(|| {
                    let names: Vec<String> = self
                        .graph
                        .output
                        .iter()
                        .map(|o| o.name.clone().unwrap_or_default())
                        .collect();
                    graph_error(format!(
                        "no floating-point output named '{w}' (graph outputs: {})",
                        names.join(", ")
                    ))
                });
        }
        match candidates.len() {
            0 => Err(graph_error(
                "the graph has no floating-point output to take scores from".into(),
            )),
            1 => Ok(candidates.pop().expect("one candidate")),
            _ => Err(graph_error(format!(
                "the graph has several floating-point outputs ({}); choose the scores with --output NAME",
                candidates.iter().map(|c| c.1.as_str()).collect::<Vec<_>>().join(", ")
            ))),
        }
    }

    /// Labels of an `ArrayFeatureExtractor(classes, ArgMax(t))` label branch whose `t` is on the path.
    pub(super) fn argmax_labels(&self, data_names: &[String]) -> Option<Vec<String>> {
        let data: HashSet<&str> = data_names.iter().map(String::as_str).collect();
        for node in &self.graph.node {
            if node.op_type.as_deref() != Some("ArrayFeatureExtractor") || node.input.len() != 2 {
                continue;
            }
            let argmax = self
                .producer
                .get(node.input[1].as_str())
                .map(|&i| &self.graph.node[i]);
            let from_path = argmax.is_some_and(|a| {
                a.op_type.as_deref() == Some("ArgMax")
                    && a.input.first().is_some_and(|t| data.contains(t.as_str()))
            });
            if !from_path {
                continue;
            }
            let classes = self
                .graph
                .initializer
                .iter()
                .find(|t| t.name.as_deref() == Some(node.input[0].as_str()))?;
            let constant = decode_tensor(classes).ok()?;
            return Some(match constant.strings {
                Some(s) => s,
                None => constant.values.iter().map(|v| format_label(*v)).collect(),
            });
        }
        None
    }
}

/// Class labels a classifier or ZipMap node carries (strings, or integers written as text).
pub(super) fn labels_of(node: &NodeProto) -> Option<Vec<String>> {
    let strings = strings_attribute(node, "classlabels_strings");
    if !strings.is_empty() {
        return Some(strings);
    }
    let mut ints = ints_attribute(node, "classlabels_ints");
    if ints.is_empty() {
        ints = ints_attribute(node, "classlabels_int64s");
    }
    if ints.is_empty() {
        None
    } else {
        Some(ints.iter().map(|v| v.to_string()).collect())
    }
}

fn format_label(v: f64) -> String {
    if v.fract() == 0.0 && v.abs() < 1e15 {
        format!("{}", v as i64)
    } else {
        v.to_string()
    }
}
