//! Conversion of a decoded ONNX graph into the `ballast.model/1` layout.
//!
//! The converter picks the score output (the one floating-point graph output, looking through a
//! ZipMap; `--output` chooses when there are several), walks back to find the nodes it depends on, and
//! evaluates exactly those nodes in file order on symbolic values: constants, or "the data input after
//! these layers" ([`path::DataPath`]). Affine steps on flat features are composed in f64 and written as
//! a `dense` (or a leading `normalize`) layer at each Relu; convolutions, pooling and batch
//! normalisation on channel data become the layout's `conv`, `maxpool` / `averagepool` and `batchnorm`
//! layers one for one. Final argmax-preserving steps (Softmax, LogSoftmax, a LinearClassifier
//! post-transform, then Normalizer) are dropped and recorded in the provenance. It never guesses: any
//! other operation or attribute on the score path is an error naming the node and its op type.
//!
//! One concept per submodule: [`path`] (the symbolic data value), [`evaluate`] (dispatch and the
//! shape-only steps), [`affine`] (Gemm, MatMul, elementwise arithmetic, flat batch norm, Scaler),
//! [`spatial`] (Conv, pooling, batch norm on channels), [`classifier`] (final activations and the
//! `ai.onnx.ml` classifier nodes), [`outputs`] (the score output and class labels), [`assemble`] (the
//! validated [`Model`]).

mod affine;
mod assemble;
mod classifier;
mod evaluate;
mod outputs;
mod path;
mod spatial;
#[cfg(test)]
mod tests;

use std::collections::{HashMap, HashSet};

use prost::Message;

use super::schema::{GraphProto, ModelProto, NodeProto};
use super::tensor::{attribute, decode_tensor, floats_attribute, ints_attribute, Constant};
use super::OnnxError;
use crate::model::Model;
use path::DataPath;

/// What the caller adds to or overrides in an imported model.
#[derive(Debug, Clone, Default)]
pub struct ImportOptions {
    /// Model name (default: the graph name).
    pub name: Option<String>,
    /// Class names (default: labels found in the graph or its metadata).
    pub classes: Option<Vec<String>>,
    /// Lower end of the valid input range, one per feature (default: from metadata, else unbounded).
    pub lower: Option<Vec<f64>>,
    /// Upper end of the valid input range, one per feature (default: from metadata, else unbounded).
    pub upper: Option<Vec<f64>>,
    /// Feature names, one per feature (default: from metadata, else none).
    pub feature_names: Option<Vec<String>>,
    /// Name of the graph output that holds the scores, when the graph has several.
    pub score_output: Option<String>,
    /// Lift the size limit: by default a data input with more than
    /// [`MAX_PARAMETERS`](crate::limits::MAX_PARAMETERS) features, or a convolution or pooling layer
    /// that unfolds into more window entries than that, is refused (the graph only claims these
    /// sizes; no tensor in the file backs them).
    pub allow_large: bool,
}

/// Metadata keys ballast writes on export and reads back on import.
pub(crate) const META_CLASSES: &str = "ballast.classes";
pub(crate) const META_NAMES: &str = "ballast.input.names";
pub(crate) const META_LOWER: &str = "ballast.input.lower";
pub(crate) const META_UPPER: &str = "ballast.input.upper";

/// Decodes ONNX bytes and converts the score path into a validated [`Model`].
pub fn import_model(bytes: &[u8], options: &ImportOptions) -> Result<Model, OnnxError> {
    let proto = ModelProto::decode(bytes).map_err(|e| OnnxError::Decode {
        message: e.to_string(),
    })?;
    let graph = proto
        .graph
        .as_ref()
        .ok_or_else(|| graph_error("the file holds no graph".into()))?;
    let opset = proto
        .opset_import
        .iter()
        .filter(|o| matches!(o.domain.as_deref(), None | Some("") | Some("ai.onnx")))
        .filter_map(|o| o.version)
        .max()
        .unwrap_or(1);
    let metadata: HashMap<&str, &str> = proto
        .metadata_props
        .iter()
        .filter_map(|p| Some((p.key.as_deref()?, p.value.as_deref()?)))
        .collect();
    let size_limit = if options.allow_large {
        usize::MAX
    } else {
        crate::limits::MAX_PARAMETERS
    };
    let converted =
        Converter::new(graph, opset, size_limit)?.convert(options.score_output.as_deref())?;
    assemble::assemble(&proto, graph, converted, &metadata, options)
}

fn graph_error(message: String) -> OnnxError {
    OnnxError::Graph { message }
}

#[derive(Debug, Clone)]
enum Symbol {
    Constant(Constant),
    Data(Box<DataPath>),
}

/// The result of walking the score path.
struct Converted {
    path: DataPath,
    input_dim: usize,
    /// The data input's shape without the batch dimension.
    input_dims: Vec<usize>,
    input_name: String,
    score_name: String,
    dropped: Vec<String>,
    graph_labels: Option<Vec<String>>,
}

struct Converter<'a> {
    graph: &'a GraphProto,
    opset: i64,
    producer: HashMap<&'a str, usize>,
    /// Largest data input width and layer unfolding accepted (see [`ImportOptions::allow_large`]).
    size_limit: usize,
}

impl<'a> Converter<'a> {
    fn new(
        graph: &'a GraphProto,
        opset: i64,
        size_limit: usize,
    ) -> Result<Converter<'a>, OnnxError> {
        let mut producer = HashMap::new();
        for (i, node) in graph.node.iter().enumerate() {
            for out in &node.output {
                if !out.is_empty() && producer.insert(out.as_str(), i).is_some() {
                    return Err(graph_error(format!(
                        "tensor '{out}' is produced by more than one node"
                    )));
                }
            }
        }
        Ok(Converter {
            graph,
            opset,
            producer,
            size_limit,
        })
    }

    fn node_label(&self, index: usize) -> String {
        let node = &self.graph.node[index];
        match node.name.as_deref() {
            Some(n) if !n.is_empty() => n.to_owned(),
            _ => format!(
                "#{index} -> {}",
                node.output.first().map(String::as_str).unwrap_or("?")
            ),
        }
    }

    fn op_label(node: &NodeProto) -> String {
        let op = node.op_type.clone().unwrap_or_default();
        match node.domain.as_deref() {
            None | Some("") | Some("ai.onnx") => op,
            Some(domain) => format!("{domain}.{op}"),
        }
    }

    fn unsupported(&self, index: usize, reason: impl Into<String>) -> OnnxError {
        OnnxError::Unsupported {
            node: self.node_label(index),
            op_type: Self::op_label(&self.graph.node[index]),
            reason: reason.into(),
        }
    }

    fn convert(&self, wanted: Option<&str>) -> Result<Converted, OnnxError> {
        let graph = self.graph;
        let (score_name, score_output, zipmap_labels) = self.score_tensor(wanted)?;
        let mut symbols: HashMap<String, Symbol> = HashMap::new();
        for tensor in &graph.initializer {
            let name = tensor.name.clone().unwrap_or_default();
            symbols.insert(name, Symbol::Constant(decode_tensor(tensor)?));
        }
        if !graph.sparse_initializer.is_empty() {
            return Err(graph_error("sparse initializers are not supported".into()));
        }
        let data_inputs: Vec<_> = graph
            .input
            .iter()
            .filter(|i| !symbols.contains_key(i.name.as_deref().unwrap_or_default()))
            .collect();
        if data_inputs.len() != 1 {
            return Err(graph_error(format!(
                "expected exactly one data input, found {} ({})",
                data_inputs.len(),
                data_inputs
                    .iter()
                    .map(|i| i.name.clone().unwrap_or_default())
                    .collect::<Vec<_>>()
                    .join(", ")
            )));
        }
        let input = data_inputs[0];
        let input_name = input.name.clone().unwrap_or_default();
        let input_dims = assemble::input_shape(input)?;
        let input_dim: usize = input_dims.iter().product();
        if input_dim > self.size_limit {
            return Err(graph_error(format!(
                "data input '{input_name}' has {input_dim} features, above the limit of {} (use --allow-large)",
                self.size_limit
            )));
        }
        symbols.insert(
            input_name.clone(),
            Symbol::Data(Box::new(DataPath::new(input_dims.clone()))),
        );

        // Nodes the score depends on, found by walking back from it.
        let mut needed = vec![false; graph.node.len()];
        let mut stack = vec![score_name.clone()];
        let mut seen = HashSet::new();
        while let Some(name) = stack.pop() {
            if !seen.insert(name.clone()) {
                continue;
            }
            if let Some(&i) = self.producer.get(name.as_str()) {
                needed[i] = true;
                stack.extend(
                    graph.node[i]
                        .input
                        .iter()
                        .filter(|n| !n.is_empty())
                        .cloned(),
                );
            }
        }

        // Remaining uses of each tensor, so a value is moved (not copied) into its last consumer.
        let mut uses: HashMap<String, usize> = HashMap::new();
        *uses.entry(score_name.clone()).or_default() += 1;
        for (index, node) in graph.node.iter().enumerate() {
            if needed[index] {
                for name in node.input.iter().filter(|n| !n.is_empty()) {
                    *uses.entry(name.clone()).or_default() += 1;
                }
            }
        }
        let mut dropped = Vec::new();
        let mut data_names = vec![input_name.clone()];
        for (index, node) in graph.node.iter().enumerate() {
            if !needed[index] {
                continue;
            }
            let mut args = Vec::with_capacity(node.input.len());
            for name in &node.input {
                if name.is_empty() {
                    args.push(None);
                    continue;
                }
                let remaining = uses.get_mut(name).map(|u| {
                    *u = u.saturating_sub(1);
                    *u
                });
                let symbol = match remaining {
                    Some(0) => symbols.remove(name),
                    _ => symbols.get(name).cloned(),
                };
                match symbol {
                    Some(s) => args.push(Some(s)),
                    None => {
                        return Err(self.unsupported(
                            index,
                            format!("input '{name}' is not available (the graph is not in topological order, or it comes from an unsupported output)"),
                        ))
                    }
                }
            }
            let outputs = self.evaluate(index, args, &mut dropped)?;
            for (name, symbol) in outputs {
                if matches!(symbol, Symbol::Data(_)) {
                    data_names.push(name.clone());
                }
                symbols.insert(name, symbol);
            }
        }
        let path = match symbols.remove(&score_name) {
            Some(Symbol::Data(path)) => *path,
            Some(Symbol::Constant(_)) => {
                return Err(graph_error(format!(
                    "the score output '{score_output}' does not depend on the data input '{input_name}'"
                )))
            }
            None => return Err(graph_error(format!("no node produces the score output '{score_output}'"))),
        };
        let graph_labels = path
            .labels
            .clone()
            .or(zipmap_labels)
            .or_else(|| self.argmax_labels(&data_names));
        Ok(Converted {
            path,
            input_dim,
            input_dims,
            input_name,
            score_name: score_output,
            dropped,
            graph_labels,
        })
    }

    fn constant_node(&self, index: usize) -> Result<Constant, OnnxError> {
        let node = &self.graph.node[index];
        if let Some(t) = attribute(node, "value").and_then(|a| a.t.as_ref()) {
            return decode_tensor(t);
        }
        if let Some(v) = attribute(node, "value_float").and_then(|a| a.f) {
            return Ok(Constant::from_values(vec![], vec![f64::from(v)]));
        }
        if let Some(v) = attribute(node, "value_int").and_then(|a| a.i) {
            return Ok(Constant::from_values(vec![], vec![v as f64]));
        }
        if attribute(node, "value_floats").is_some() {
            let v = floats_attribute(node, "value_floats");
            return Ok(Constant::from_values(vec![v.len()], v));
        }
        if attribute(node, "value_ints").is_some() {
            let v: Vec<f64> = ints_attribute(node, "value_ints")
                .iter()
                .map(|v| *v as f64)
                .collect();
            return Ok(Constant::from_values(vec![v.len()], v));
        }
        Err(self.unsupported(index, "only tensor, float and int constants are supported"))
    }

    fn fold_constant(
        &self,
        index: usize,
        args: Vec<Option<Symbol>>,
    ) -> Result<Constant, OnnxError> {
        let node = &self.graph.node[index];
        let op = node.op_type.as_deref().unwrap_or_default();
        let first = match args.into_iter().next().flatten() {
            Some(Symbol::Constant(c)) => c,
            _ => {
                return Err(self.unsupported(
                    index,
                    "does not depend on the data input and has no constant input",
                ))
            }
        };
        match op {
            "Identity" | "Cast" => Ok(first),
            _ => Err(self.unsupported(
                index,
                "computes a constant with an operation ballast does not fold (only Constant, Identity and Cast)",
            )),
        }
    }

    fn require_finite(&self, index: usize, what: &str, values: &[f64]) -> Result<(), OnnxError> {
        if let Some(i) = values.iter().position(|v| !v.is_finite()) {
            return Err(self.unsupported(index, format!("{what} entry {i} is not a finite number")));
        }
        Ok(())
    }
}

fn join(shape: &[usize]) -> String {
    shape
        .iter()
        .map(|d| d.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}
