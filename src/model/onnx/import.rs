//! Conversion of a decoded ONNX graph into the `ballast.model/1` layout.
//!
//! The converter picks the score output (the one floating-point graph output, looking through a
//! ZipMap; `--output` chooses when there are several), walks back to find the nodes it depends on, and
//! evaluates exactly those nodes in file order on symbolic values: constants, or "the data input after
//! these layers" ([`DataPath`]). Each affine step becomes its own `dense` or `normalize` layer, so the
//! model computes with the graph's operations and the deployed-arithmetic bound covers the graph as an
//! inference engine runs it (merges only where the operations stay the same; see `path`). Final
//! argmax-preserving steps (Softmax, LogSoftmax, a LinearClassifier post-transform, then Normalizer) are
//! dropped and recorded in the provenance. It never guesses: any other operation on the score path is
//! an error naming the node.

use std::collections::{HashMap, HashSet};

use nalgebra::{DMatrix, DVector};
use prost::Message;
use serde_json::json;

use super::path::DataPath;
use super::schema::{
    tensor_proto::DataType, tensor_shape_proto::dimension, type_proto, GraphProto, ModelProto,
    NodeProto,
};
use super::tensor::{
    attribute, decode_tensor, float_attribute, floats_attribute, int_attribute, ints_attribute,
    string_attribute, strings_attribute, Constant,
};
use super::OnnxError;
use crate::engine::Arithmetic;
use crate::model::{InputSpec, Layer, Model, ModelError};

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
    /// The arithmetic the model is deployed in (default: float32 when the graph computes in float32,
    /// i.e. its data input is FLOAT or a Cast to FLOAT lies on the score path; float64 otherwise).
    pub arithmetic: Option<Arithmetic>,
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
    let converted = Converter::new(graph, opset)?.convert(options.score_output.as_deref())?;
    assemble(&proto, graph, converted, &metadata, options)
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
    input_name: String,
    score_name: String,
    dropped: Vec<String>,
    graph_labels: Option<Vec<String>>,
}

struct Converter<'a> {
    graph: &'a GraphProto,
    opset: i64,
    producer: HashMap<&'a str, usize>,
}

impl<'a> Converter<'a> {
    fn new(graph: &'a GraphProto, opset: i64) -> Result<Converter<'a>, OnnxError> {
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

    /// Chooses the score tensor: returns (tensor name, graph output name, labels from a ZipMap).
    fn score_tensor(
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
        let shape = input_shape(input)?;
        let input_dim = shape.iter().product();
        symbols.insert(
            input_name.clone(),
            Symbol::Data(Box::new(DataPath::input(shape))),
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
            input_name,
            score_name: score_output,
            dropped,
            graph_labels,
        })
    }

    /// Labels of an `ArrayFeatureExtractor(classes, ArgMax(t))` label branch whose `t` is on the path.
    fn argmax_labels(&self, data_names: &[String]) -> Option<Vec<String>> {
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

    fn evaluate(
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
        let constant = constant.map(|c| match c {
            Symbol::Constant(c) => c,
            Symbol::Data(_) => unreachable!("handled above"),
        });
        let finished = path.finished_by.clone();
        let after_final = |what: &str| -> OnnxError {
            self.unsupported(
                index,
                format!(
                    "{what} after {}; only shape-keeping steps may follow the final activation",
                    finished.clone().unwrap_or_default()
                ),
            )
        };
        let is_final = path.finished_by.is_some();
        let extra_outputs = node.output.iter().skip(1).any(|o| !o.is_empty());
        if extra_outputs && !matches!(op, "Dropout" | "LinearClassifier") {
            return Err(self.unsupported(index, "extra outputs (training mode) are not supported"));
        }

        match (ml, op) {
            (false, "Identity") => {}
            (false, "Dropout") => {
                // Inference-mode dropout is the identity; a training_mode input must be constant false.
                if let Some(Some(Symbol::Constant(c))) = rest.first() {
                    if c.values.iter().any(|v| *v != 0.0) {
                        return Err(self.unsupported(index, "training_mode is true"));
                    }
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
                path.float32_cast |= to == DataType::Float as i64;
            }
            (false, "Flatten") => {
                let axis = int_attribute(node, "axis", 1);
                if axis != 1 && axis != -(path.shape.len() as i64) {
                    return Err(self.unsupported(index, format!("axis {axis} would merge the batch dimension; expected 1")));
                }
                path.shape = vec![path.width()];
            }
            (false, "Reshape") => {
                let target = constant.ok_or_else(|| self.unsupported(index, "the shape is not a constant"))?;
                path.shape = self.reshape(index, &path.shape, &target, int_attribute(node, "allowzero", 0))?;
            }
            (false, "Relu") => {
                if is_final {
                    return Err(after_final("Relu"));
                }
                path.flush();
                if !matches!(path.layers.last(), Some(Layer::Relu)) {
                    path.layers.push(Layer::Relu);
                }
            }
            (false, "Softmax") | (false, "LogSoftmax") => {
                self.check_feature_axis(index, &path, int_attribute(node, "axis", if self.opset >= 13 { -1 } else { 1 }))?;
                if path.single_logit {
                    return Err(self.unsupported(index, "a softmax over a single logit is not a classifier"));
                }
                if !is_final {
                    path.finished_by = Some(format!("{op} '{}'", self.node_label(index)));
                }
                path.positive = op == "Softmax";
                dropped.push(format!("{op} '{}'", self.node_label(index)));
            }
            (false, "Gemm") => {
                if is_final {
                    return Err(after_final("Gemm"));
                }
                if !data_first {
                    return Err(self.unsupported(index, "the data must be input A; a constant A is not supported"));
                }
                if int_attribute(node, "transA", 0) != 0 {
                    return Err(self.unsupported(index, "transA=1 on the data input is not supported"));
                }
                self.require_vector_shape(index, &path)?;
                let b = constant.ok_or_else(|| self.unsupported(index, "input B is missing"))?;
                let c = match rest.first() {
                    Some(Some(Symbol::Constant(c))) => Some(c.clone()),
                    _ => None,
                };
                let alpha = float_attribute(node, "alpha", 1.0);
                let beta = float_attribute(node, "beta", 1.0);
                let trans_b = int_attribute(node, "transB", 0) != 0;
                let d = path.width();
                if b.dims.len() != 2 {
                    return Err(self.unsupported(index, format!("B has shape {:?}, expected a matrix", b.dims)));
                }
                let (k, inner) = if trans_b { (b.dims[0], b.dims[1]) } else { (b.dims[1], b.dims[0]) };
                if inner != d {
                    return Err(self.unsupported(index, format!("B has shape {:?}, which does not fit {d} input features", b.dims)));
                }
                self.require_finite(index, "B", &b.values)?;
                let weights = DMatrix::from_fn(k, d, |r, col| {
                    let v = if trans_b { b.values[r * d + col] } else { b.values[col * k + r] };
                    alpha * v
                });
                let (bias, bias_set) = match c {
                    Some(c) => {
                        self.require_finite(index, "C", &c.values)?;
                        (self.broadcast(index, &c, &[k], "C")?.map(|v| beta * v), true)
                    }
                    None => (DVector::zeros(k), false),
                };
                path.linear(weights, bias, bias_set);
            }
            (false, "MatMul") => {
                if is_final {
                    return Err(after_final("MatMul"));
                }
                if !data_first {
                    return Err(self.unsupported(index, "the data must be the first operand; constant · data is not supported"));
                }
                self.require_vector_shape(index, &path)?;
                let b = constant.ok_or_else(|| self.unsupported(index, "the weight operand is missing"))?;
                let d = path.width();
                if b.dims.len() != 2 || b.dims[0] != d {
                    return Err(self.unsupported(index, format!("weights have shape {:?}, expected [{d}, outputs]", b.dims)));
                }
                self.require_finite(index, "weights", &b.values)?;
                let k = b.dims[1];
                let weights = DMatrix::from_fn(k, d, |r, col| b.values[col * k + r]);
                path.linear(weights, DVector::zeros(k), false);
            }
            (false, "Sigmoid") => {
                if is_final || path.pending_width() != 1 {
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
            }
            (false, "Sub") if matches!(path.sigmoid, Some((_, false))) && !data_first => {
                // 1 − σ(z): the probability of class 0, kept only to pair it with σ(z) in a Concat.
                let one = constant.ok_or_else(|| self.unsupported(index, "the constant operand is missing"))?;
                if one.values.len() != 1 || one.values[0] != 1.0 {
                    return Err(self.unsupported(index, "only 1 − sigmoid is supported after a final Sigmoid"));
                }
                path.sigmoid = path.sigmoid.map(|(node, _)| (node, true));
            }
            (false, "Add") | (false, "Sub") | (false, "Mul") | (false, "Div") => {
                if is_final {
                    return Err(after_final(op));
                }
                if op == "Div" && !data_first {
                    return Err(self.unsupported(index, "constant / data is not affine"));
                }
                let c = constant.ok_or_else(|| self.unsupported(index, "the constant operand is missing"))?;
                self.require_finite(index, "constant operand", &c.values)?;
                let shape = path.shape.clone();
                let c = self.broadcast(index, &c, &shape, "constant operand")?;
                match (op, data_first) {
                    ("Add", _) => path.add(c),
                    ("Sub", true) => path.add(-c),
                    ("Sub", false) => path.subtract_from(c),
                    ("Mul", _) => path.multiply(c),
                    ("Div", true) => {
                        if c.iter().any(|v| *v == 0.0) {
                            return Err(self.unsupported(index, "divides by zero"));
                        }
                        path.divide(c);
                    }
                    _ => return Err(self.unsupported(index, "constant / data is not affine")),
                }
            }
            (false, "BatchNormalization") => {
                if is_final {
                    return Err(after_final("BatchNormalization"));
                }
                if int_attribute(node, "training_mode", 0) != 0 {
                    return Err(self.unsupported(index, "training_mode=1; only the inference form folds into an affine map"));
                }
                self.require_vector_shape(index, &path)?;
                let d = path.width();
                let mut params = Vec::new();
                for (i, what) in ["scale", "B", "mean", "var"].iter().enumerate() {
                    let c = if i == 0 {
                        constant.clone()
                    } else {
                        match rest.get(i - 1).cloned().flatten() {
                            Some(Symbol::Constant(c)) => Some(c),
                            _ => None,
                        }
                    };
                    let c = c.ok_or_else(|| self.unsupported(index, format!("input {what} is missing")))?;
                    self.require_finite(index, what, &c.values)?;
                    params.push(self.broadcast(index, &c, &[d], what)?);
                }
                let epsilon = float_attribute(node, "epsilon", 1e-5);
                let mut deviation = DVector::zeros(d);
                for i in 0..d {
                    let denominator = params[3][i] + epsilon;
                    if denominator <= 0.0 {
                        return Err(self.unsupported(index, format!("var + epsilon of feature {i} is {denominator}, expected > 0")));
                    }
                    deviation[i] = denominator.sqrt();
                }
                // (x − mean) / sqrt(var + epsilon) · scale + B, step by step as the operator reads.
                path.add(-&params[2]);
                path.divide(deviation);
                path.multiply(params[0].clone());
                path.add(params[1].clone());
            }
            (true, "Scaler") => {
                if is_final {
                    return Err(after_final("Scaler"));
                }
                self.require_vector_shape(index, &path)?;
                let d = path.width();
                let offset = floats_attribute(node, "offset");
                let scale = floats_attribute(node, "scale");
                let expand = |v: Vec<f64>, default: f64, what: &str| -> Result<DVector<f64>, OnnxError> {
                    match v.len() {
                        0 => Ok(DVector::from_element(d, default)),
                        1 => Ok(DVector::from_element(d, v[0])),
                        n if n == d => Ok(DVector::from_vec(v)),
                        n => Err(self.unsupported(index, format!("{what} has {n} values, expected 1 or {d}"))),
                    }
                };
                let offset = expand(offset, 0.0, "offset")?;
                let scale = expand(scale, 1.0, "scale")?;
                self.require_finite(index, "offset", offset.as_slice())?;
                self.require_finite(index, "scale", scale.as_slice())?;
                // (x − offset) · scale, as the operator reads.
                path.add(-offset);
                path.multiply(scale);
            }
            (true, "LinearClassifier") => {
                if is_final {
                    return Err(after_final("LinearClassifier"));
                }
                self.linear_classifier(index, &mut path, dropped)?;
                return Ok(vec![(out(1), Symbol::Data(Box::new(path)))]);
            }
            (true, "Normalizer") => {
                if !(is_final && path.positive) {
                    return Err(self.unsupported(
                        index,
                        "a Normalizer keeps the argmax only on positive scores, after a final Softmax or logistic post-transform",
                    ));
                }
                dropped.push(format!("Normalizer '{}'", self.node_label(index)));
            }
            _ => {
                return Err(self.unsupported(
                    index,
                    "this operation is not supported on the score path (supported: Gemm, MatMul, Add, Sub, Mul, Div, BatchNormalization, Relu, Flatten, Reshape, Identity, Cast, Dropout, final Softmax, final Sigmoid on one logit; ai.onnx.ml Scaler, LinearClassifier, Normalizer)",
                ))
            }
        }
        Ok(vec![(out(0), Symbol::Data(Box::new(path)))])
    }

    /// `Concat([1 − σ(z), σ(z)], axis=1)` after a final Sigmoid: the usual two-column probabilities of
    /// a binary classifier, whose argmax is class 1 iff `z > 0` (ties at `z = 0` go to class 0 in
    /// both), so the model stays the single logit `z`.
    fn binary_pair(
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

    fn linear_classifier(
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
        path.linear(weights, DVector::from_vec(intercepts), true);
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

    fn require_vector_shape(&self, index: usize, path: &DataPath) -> Result<(), OnnxError> {
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

    fn require_finite(&self, index: usize, what: &str, values: &[f64]) -> Result<(), OnnxError> {
        if let Some(i) = values.iter().position(|v| !v.is_finite()) {
            return Err(self.unsupported(index, format!("{what} entry {i} is not a finite number")));
        }
        Ok(())
    }

    /// Broadcasts a constant (numpy rules, leading batch dimension of size 1 allowed) to `shape`.
    fn broadcast(
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

fn join(shape: &[usize]) -> String {
    shape
        .iter()
        .map(|d| d.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}

fn labels_of(node: &NodeProto) -> Option<Vec<String>> {
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

fn input_shape(input: &super::schema::ValueInfoProto) -> Result<Vec<usize>, OnnxError> {
    let name = input.name.clone().unwrap_or_default();
    let tensor = match input.r#type.as_ref().and_then(|t| t.value.as_ref()) {
        Some(type_proto::Value::TensorType(t)) => t,
        _ => return Err(graph_error(format!("data input '{name}' is not a tensor"))),
    };
    let element = tensor.elem_type.unwrap_or(0);
    if element != DataType::Float as i32 && element != DataType::Double as i32 {
        return Err(graph_error(format!(
            "data input '{name}' has element type {element}; expected FLOAT or DOUBLE"
        )));
    }
    let dims = tensor.shape.as_ref().ok_or_else(|| {
        graph_error(format!(
            "data input '{name}' has no shape; expected [batch, features]"
        ))
    })?;
    if dims.dim.len() < 2 {
        return Err(graph_error(format!(
            "data input '{name}' has rank {}; expected [batch, features]",
            dims.dim.len()
        )));
    }
    let mut shape = Vec::new();
    for (i, d) in dims.dim.iter().enumerate().skip(1) {
        match d.value {
            Some(dimension::Value::DimValue(v)) if v > 0 => shape.push(v as usize),
            _ => {
                return Err(graph_error(format!(
                    "data input '{name}': dimension {i} is dynamic or not positive; only the batch dimension may be dynamic"
                )))
            }
        }
    }
    if shape
        .iter()
        .try_fold(1usize, |a, d| a.checked_mul(*d))
        .is_none()
    {
        return Err(graph_error(format!(
            "data input '{name}': the feature count overflows"
        )));
    }
    Ok(shape)
}

fn parse_metadata<T: serde::de::DeserializeOwned>(
    metadata: &HashMap<&str, &str>,
    key: &str,
) -> Result<Option<T>, OnnxError> {
    match metadata.get(key) {
        None => Ok(None),
        Some(text) => serde_json::from_str(text)
            .map(Some)
            .map_err(|e| graph_error(format!("metadata '{key}': {e}"))),
    }
}

fn assemble(
    proto: &ModelProto,
    graph: &GraphProto,
    converted: Converted,
    metadata: &HashMap<&str, &str>,
    options: &ImportOptions,
) -> Result<Model, OnnxError> {
    let Converted {
        mut path,
        input_dim: dim,
        input_name,
        score_name,
        dropped,
        graph_labels,
    } = converted;
    // The graph evaluates in the element type of its data input (float32 unless it is DOUBLE), and in
    // float32 from any Cast to FLOAT on the score path on.
    let float32 = path.float32_cast
        || graph
            .input
            .iter()
            .filter(|i| i.name.as_deref() == Some(input_name.as_str()))
            .filter_map(|i| match i.r#type.as_ref().and_then(|t| t.value.as_ref()) {
                Some(type_proto::Value::TensorType(t)) => t.elem_type,
                _ => None,
            })
            .any(|e| e == DataType::Float as i32);
    let arithmetic = options.arithmetic.unwrap_or(if float32 {
        Arithmetic::Float32
    } else {
        Arithmetic::Float64
    });
    path.flush();
    if path.layers.is_empty() {
        return Err(graph_error(
            "the score path holds no layer (the scores equal the input)".into(),
        ));
    }
    let layers = path.layers;
    let nan_or_inf = |l: &Layer| match l {
        Layer::Dense { weights, bias } => weights.iter().chain(bias.iter()).any(|v| !v.is_finite()),
        Layer::Normalize { mean, std } => mean.iter().chain(std.iter()).any(|v| !v.is_finite()),
        Layer::Relu => false,
    };
    if layers.iter().any(nan_or_inf) {
        return Err(graph_error(
            "converting the affine steps overflowed to a non-finite number".into(),
        ));
    }
    let range =
        |given: &Option<Vec<f64>>, key: &str, default: f64| -> Result<Vec<f64>, OnnxError> {
            let values = match given {
                Some(v) => Some(v.clone()),
                None => parse_metadata::<Vec<Option<f64>>>(metadata, key)?
                    .map(|v| v.into_iter().map(|x| x.unwrap_or(default)).collect()),
            };
            let values = values.unwrap_or_else(|| vec![default; dim]);
            if values.len() != dim {
                return Err(graph_error(format!(
                    "input range has {} values, the model has {dim} features",
                    values.len()
                )));
            }
            Ok(values)
        };
    let lower = range(&options.lower, META_LOWER, f64::NEG_INFINITY)?;
    let upper = range(&options.upper, META_UPPER, f64::INFINITY)?;
    let names = match &options.feature_names {
        Some(n) => Some(n.clone()),
        None => parse_metadata::<Vec<String>>(metadata, META_NAMES)?,
    };
    let classes = match &options.classes {
        Some(c) => Some(c.clone()),
        None => graph_labels.or(parse_metadata::<Vec<String>>(metadata, META_CLASSES)?),
    };
    let name = options
        .name
        .clone()
        .or_else(|| graph.name.clone().filter(|n| !n.is_empty()));
    let provenance = json!({
        "imported_from": "onnx",
        "producer": format!("{} {}", proto.producer_name.clone().unwrap_or_default(),
                            proto.producer_version.clone().unwrap_or_default()).trim().to_owned(),
        "ir_version": proto.ir_version,
        "input": input_name,
        "score_output": score_name,
        "dropped_final_steps": dropped,
    });
    for i in 0..dim {
        if lower[i].is_nan()
            || upper[i].is_nan()
            || lower[i] > upper[i]
            || lower[i] == f64::INFINITY
            || upper[i] == f64::NEG_INFINITY
        {
            return Err(graph_error(format!(
                "input range of feature {i} is [{}, {}], expected lower ≤ upper",
                lower[i], upper[i]
            )));
        }
    }
    let model = Model {
        name,
        input: InputSpec {
            dim,
            names,
            lower,
            upper,
        },
        classes,
        layers,
        provenance: Some(provenance),
        arithmetic,
    };
    validate(&model)?;
    Ok(model)
}

/// The layout's rules for a converted model: sizes chain, every layer non-empty, std > 0, classes and
/// feature names fit (finiteness is checked before).
fn validate(model: &Model) -> Result<(), OnnxError> {
    let invalid =
        |place: String, message: String| OnnxError::Model(ModelError::Invalid { place, message });
    let mut width = model.input.dim;
    for (i, layer) in model.layers.iter().enumerate() {
        match layer {
            Layer::Normalize { mean, std } => {
                if mean.len() != width || std.len() != width || std.iter().any(|s| *s <= 0.0) {
                    return Err(invalid(
                        format!("layers[{i}]"),
                        format!("normalize must have {width} entries with std > 0"),
                    ));
                }
            }
            Layer::Dense { weights, bias } => {
                if weights.ncols() != width || weights.nrows() == 0 || bias.len() != weights.nrows()
                {
                    return Err(invalid(
                        format!("layers[{i}]"),
                        format!(
                            "dense is {}x{}, expected at least one row of {width} inputs",
                            weights.nrows(),
                            weights.ncols()
                        ),
                    ));
                }
                width = weights.nrows();
            }
            Layer::Relu => {}
        }
    }
    if let Some(classes) = &model.classes {
        let expected = if width == 1 { 2 } else { width };
        if classes.len() != expected {
            return Err(invalid(
                "classes".into(),
                format!(
                    "has {} names, expected {expected} (the model has {width} output{})",
                    classes.len(),
                    if width == 1 {
                        ", a binary classifier"
                    } else {
                        "s"
                    }
                ),
            ));
        }
    }
    if let Some(names) = &model.input.names {
        let distinct: HashSet<&String> = names.iter().collect();
        if names.len() != model.input.dim || distinct.len() != names.len() {
            return Err(invalid(
                "input.names".into(),
                format!("expected {} distinct names", model.input.dim),
            ));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::onnx::schema::{
        tensor_shape_proto::Dimension, AttributeProto, OperatorSetIdProto, TensorProto,
        TensorShapeProto, TypeProto, ValueInfoProto,
    };

    fn value_info(name: &str, dims: &[i64]) -> ValueInfoProto {
        let mut dim = vec![Dimension {
            value: Some(dimension::Value::DimParam("N".into())),
            ..Default::default()
        }];
        dim.extend(dims.iter().map(|d| Dimension {
            value: Some(dimension::Value::DimValue(*d)),
            ..Default::default()
        }));
        ValueInfoProto {
            name: Some(name.into()),
            r#type: Some(TypeProto {
                value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                    elem_type: Some(DataType::Float as i32),
                    shape: Some(TensorShapeProto { dim }),
                })),
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    fn constant(name: &str, dims: &[i64], values: &[f32]) -> TensorProto {
        TensorProto {
            name: Some(name.into()),
            dims: dims.to_vec(),
            data_type: Some(DataType::Float as i32),
            float_data: values.to_vec(),
            ..Default::default()
        }
    }

    fn node(
        op: &str,
        name: &str,
        inputs: &[&str],
        output: &str,
        attribute: Vec<AttributeProto>,
    ) -> NodeProto {
        NodeProto {
            input: inputs.iter().map(|s| (*s).to_owned()).collect(),
            output: vec![output.to_owned()],
            name: Some(name.into()),
            op_type: Some(op.into()),
            attribute,
            ..Default::default()
        }
    }

    fn int(name: &str, value: i64) -> AttributeProto {
        AttributeProto {
            name: Some(name.into()),
            i: Some(value),
            ..Default::default()
        }
    }

    fn import(
        nodes: Vec<NodeProto>,
        initializer: Vec<TensorProto>,
        width: i64,
        output: &str,
    ) -> Result<Model, OnnxError> {
        let graph = GraphProto {
            node: nodes,
            name: Some("t".into()),
            initializer,
            input: vec![value_info("x", &[width])],
            output: vec![value_info(output, &[1])],
            ..Default::default()
        };
        let proto = ModelProto {
            ir_version: Some(8),
            opset_import: vec![OperatorSetIdProto {
                domain: Some(String::new()),
                version: Some(15),
            }],
            graph: Some(graph),
            ..Default::default()
        };
        import_model(&proto.encode_to_vec(), &ImportOptions::default())
    }

    #[test]
    fn constant_minus_data_times_and_divided_compose_exactly() {
        // y = ((c − x) · m) / d, elementwise, then a 2 → 1 MatMul; checked against the formula by hand.
        let inits = vec![
            constant("c", &[2], &[1.0, 2.0]),
            constant("m", &[1, 2], &[3.0, -1.0]),
            constant("d", &[], &[2.0]),
            constant("w", &[2, 1], &[1.0, 1.0]),
        ];
        let nodes = vec![
            node("Sub", "sub", &["c", "x"], "a", vec![]),
            node("Mul", "mul", &["a", "m"], "b", vec![]),
            node("Div", "div", &["b", "d"], "e", vec![]),
            node("MatMul", "mm", &["e", "w"], "y", vec![]),
        ];
        let model = import(nodes, inits, 2, "y").unwrap();
        let x = [0.5, -4.0];
        let expected = (1.0 - x[0]) * 3.0 / 2.0 + -(2.0 - x[1]) / 2.0;
        let y = model.network().forward(&x);
        approx::assert_abs_diff_eq!(y[0], expected, epsilon = 1e-12);
    }

    #[test]
    fn operations_that_are_not_affine_or_not_final_are_refused_by_name() {
        let w = || constant("w", &[2, 2], &[1.0, 0.0, 0.0, 1.0]);
        let cases: Vec<(Vec<NodeProto>, &str)> = vec![
            (
                vec![
                    node("Softmax", "sm", &["x"], "p", vec![]),
                    node("MatMul", "late", &["p", "w"], "y", vec![]),
                ],
                "node 'late' (MatMul): MatMul after Softmax 'sm'",
            ),
            (
                vec![node("Gemm", "g", &["x", "w"], "y", vec![int("transA", 1)])],
                "transA=1",
            ),
            (
                vec![node("Add", "twice", &["x", "x"], "y", vec![])],
                "both operands",
            ),
            (
                vec![node("Div", "inv", &["w", "x"], "y", vec![])],
                "not affine",
            ),
            (
                vec![node("MatMul", "left", &["w", "x"], "y", vec![])],
                "constant · data",
            ),
            (
                vec![node("Tanh", "squash", &["x"], "y", vec![])],
                "node 'squash' (Tanh)",
            ),
            (
                vec![node("Sigmoid", "two", &["x"], "y", vec![])],
                "only as the final step on a single logit",
            ),
            (
                vec![node(
                    "Concat",
                    "cat",
                    &["x", "x"],
                    "y",
                    vec![int("axis", 1)],
                )],
                "Concat is supported only as [1 − sigmoid(z), sigmoid(z)]",
            ),
        ];
        for (nodes, expected) in cases {
            let e = import(nodes, vec![w()], 2, "y").unwrap_err().to_string();
            assert!(e.contains(expected), "expected '{expected}' in: {e}");
        }
    }

    #[test]
    fn reshape_must_keep_the_batch_and_broadcasts_must_fit() {
        let shape = TensorProto {
            name: Some("s".into()),
            dims: vec![2],
            data_type: Some(DataType::Int64 as i32),
            int64_data: vec![1, -1],
            ..Default::default()
        };
        let e = import(
            vec![node("Reshape", "r", &["x", "s"], "y", vec![])],
            vec![shape],
            3,
            "y",
        )
        .unwrap_err();
        assert!(e.to_string().contains("keep the batch"), "{e}");
        let e = import(
            vec![node("Add", "add", &["x", "b"], "y", vec![])],
            vec![constant("b", &[2], &[1.0, 2.0])],
            3,
            "y",
        )
        .unwrap_err();
        assert!(e.to_string().contains("does not broadcast"), "{e}");
        let e = import(
            vec![node("Div", "div", &["x", "b"], "y", vec![])],
            vec![constant("b", &[1], &[0.0])],
            3,
            "y",
        )
        .unwrap_err();
        assert!(e.to_string().contains("divides by zero"), "{e}");
    }
}
