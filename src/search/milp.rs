//! The same question as a mixed-integer linear program: the big-M encoding of every unstable ReLU
//! (Tjeng et al., 2019), solved by the search's LP seam (good_lp's microlp backend, with integer
//! variables).
//!
//! For a hidden unit with sound pre-activation bounds `l < 0 < u` the encoding is
//! `a ≥ z, a ≥ 0, a ≤ u·d, a ≤ z − l·(1 − d), d ∈ {0, 1}`; stable units are exact (`a = z` or `a = 0`).
//! The bounds are the bound module's linear-relaxation bounds over the region, so the program's feasible
//! set projected on the input is exactly the region and its optimum is the exact minimum margin. Only
//! L-inf regions (boxes) are encoded. This is a cross-check for tests: its value comes straight from the
//! MILP solver (no sound rounding) and nothing in ballast certifies with it.

use super::solver::{minimise, LinearProgram, LpOutcome, Row};
use super::SearchError;
use crate::bound::{linear, Domain};
use crate::model::Network;
use crate::threat::{Norm, Region};

/// The MILP's answer for one forbidden class.
#[derive(Debug, Clone, PartialEq)]
pub struct MilpMinimum {
    /// Minimum of `logit_label − logit_target` over the region (as reported by the solver).
    pub value: f64,
    /// The input where the solver found it.
    pub point: Vec<f64>,
    /// Number of binary variables (unstable units).
    pub binaries: usize,
}

/// The exact minimum of `logit_label − logit_target` over an L-inf `region`, by MILP. `None` when the
/// region holds no input. A 1-logit network is treated in its classifier form.
pub fn minimum_margin(
    network: &Network,
    region: &Region,
    label: usize,
    target: usize,
) -> Result<Option<MilpMinimum>, SearchError> {
    if region.norm != Norm::Linf {
        return Err(SearchError::Unsupported(
            "the MILP cross-check encodes L-inf regions only".into(),
        ));
    }
    let network = network.as_classifier();
    let classes = network.output_dim();
    if label >= classes || target >= classes || label == target {
        return Err(SearchError::Settings(format!(
            "label {label} and target {target} must be different classes below {classes}"
        )));
    }
    let (bounds, domain) = linear::pre_activation_bounds(&network, region, None)?;
    if let Domain::Empty { .. } = domain {
        return Ok(None);
    }
    let mut program = LinearProgram::default();
    let inputs: Vec<usize> = (0..region.dim())
        .map(|i| program.add_variable(0.0, region.outer_lower[i], region.outer_upper[i]))
        .collect();
    let last = network.layers.len() - 1;
    let mut previous = inputs.clone();
    let mut binaries = 0;
    for (k, layer) in network.layers[..last].iter().enumerate() {
        let layer = layer.to_dense();
        let mut outputs = Vec::with_capacity(layer.output_dim());
        for i in 0..layer.output_dim() {
            let (l, u) = (bounds[k].lower[i], bounds[k].upper[i]);
            // z − W prev = b, as a variable for readability of the rows below
            let z = program.add_variable(0.0, l.min(u), u.max(l));
            let mut coefficients = vec![(z, 1.0)];
            for (j, p) in previous.iter().enumerate() {
                let w = layer.weights[(i, j)];
                if w != 0.0 {
                    coefficients.push((*p, -w));
                }
            }
            program.rows.push(Row {
                coefficients,
                lower: layer.bias[i],
                upper: layer.bias[i],
            });
            let a = program.add_variable(0.0, 0.0, u.max(0.0));
            if l >= 0.0 {
                program.rows.push(equal(vec![(a, 1.0), (z, -1.0)], 0.0));
            } else if u <= 0.0 {
                program.upper[a] = 0.0;
            } else {
                binaries += 1;
                let d = program.add_binary(0.0);
                program.rows.push(at_least(vec![(a, 1.0), (z, -1.0)], 0.0));
                program.rows.push(at_most(vec![(a, 1.0), (d, -u)], 0.0));
                program
                    .rows
                    .push(at_most(vec![(a, 1.0), (z, -1.0), (d, -l)], -l));
            }
            outputs.push(a);
        }
        previous = outputs;
    }
    let final_layer = network.layers[last].to_dense();
    for (j, p) in previous.iter().enumerate() {
        program.objective[*p] = final_layer.weights[(label, j)] - final_layer.weights[(target, j)];
    }
    let constant = final_layer.bias[label] - final_layer.bias[target];
    match minimise(&program, None)? {
        LpOutcome::Optimal { value, point } => Ok(Some(MilpMinimum {
            value: value + constant,
            point: inputs.iter().map(|i| point[*i]).collect(),
            binaries,
        })),
        LpOutcome::Infeasible => Ok(None),
        LpOutcome::Unbounded => Err(SearchError::Internal(
            "the MILP over a bounded region cannot be unbounded".into(),
        )),
    }
}

fn equal(coefficients: Vec<(usize, f64)>, value: f64) -> Row {
    Row {
        coefficients,
        lower: value,
        upper: value,
    }
}

fn at_least(coefficients: Vec<(usize, f64)>, value: f64) -> Row {
    Row {
        coefficients,
        lower: value,
        upper: f64::INFINITY,
    }
}

fn at_most(coefficients: Vec<(usize, f64)>, value: f64) -> Row {
    Row {
        coefficients,
        lower: f64::NEG_INFINITY,
        upper: value,
    }
}
