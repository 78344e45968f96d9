//! LP relaxation with the triangle relaxation of every unstable ReLU (Ehlers, 2017).
//!
//! Given sound pre-activation bounds `[l, u]` for every hidden unit, the LP has one variable per input
//! feature (held in the region's box) and one per hidden unit that is not known to be zero. A unit with
//! `l ≥ 0` (or forced active) is `h = z`, one with `u ≤ 0` (or forced inactive) is `h = 0`, and an
//! unstable unit is relaxed to its convex hull on `[l, u]`: `h ≥ 0`, `h ≥ z`, `h ≤ u (z − l) / (u − l)`.
//! A split constraint also adds its own inequality (`z ≥ 0` or `z ≤ 0`). Minimising the margin over this
//! polytope gives a lower bound, since every region input with its true activations is a feasible point.
//! For L2 regions the LP holds the box around the ball plus, per target, the cut `a·x ≥ min_region a·x`
//! of the linear relaxation's input function, so it is never looser than [`super::linear`] on the same
//! bounds. With the same intermediate bounds, the LP optimum is ≥ every linear-relaxation bound with any
//! slopes in `[0, 1]` (each of those is a feasible dual point of this LP).
//!
//! Soundness caveat: the value is the solver's optimum, exact up to its feasibility tolerances (see
//! docs/bounds.md). If the solver reports the LP infeasible (which in exact arithmetic means the split
//! constraints leave no input), the linear-relaxation bound is returned instead of pruning on the
//! solver's word; likewise if the reported optimum exceeds the true margin at the solver's own input
//! point (which a sound bound never does), the linear bound is used.

use super::linear::{backward, intermediate_bounds, margin_rows, prepare_given, GivenBounds};
use super::linear::{Relaxation, Unit};
use super::solver::{self, LinearProgram, Outcome, Sense};
use super::{
    concretise, validate, BoundError, Domain, LayerBounds, MarginBounds, Method, ReluSplit,
    SplitState,
};
use crate::model::Network;
use crate::threat::{Norm, Region};

/// Relative slack for the solver sanity check (solver optimum versus the margin at its own point).
const SOLVER_SLACK: f64 = 1e-9;

/// LP lower bounds on `logit_label − logit_j` for every `j` in `targets`, on linear-relaxation
/// intermediate bounds; each is the larger of the LP optimum and the linear-relaxation bound.
pub fn margin_lower_bounds(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    let network = validate(network, region, label, targets, splits)?;
    let (bounds, relaxations, domain, _) = intermediate_bounds(&network, region, splits);
    if let Domain::Empty { layer, unit } = domain {
        return Ok(MarginBounds::empty(
            Method::Lp,
            targets,
            bounds,
            layer,
            unit,
        ));
    }
    let linear = super::linear::final_pass(
        &network,
        region,
        label,
        targets,
        bounds.clone(),
        &relaxations,
    )
    .0;
    let mut result = solve(
        &network,
        region,
        label,
        targets,
        bounds,
        &relaxations,
        splits,
    )?;
    for t in 0..targets.len() {
        if linear.lower[t] > result.lower[t] {
            result.lower[t] = linear.lower[t];
        }
    }
    Ok(result)
}

/// The LP optimum per target on given sound pre-activation bounds (one per hidden layer, e.g. interval
/// bounds, or bounds cached by branch and bound); split constraints clip them and add their inequalities.
pub fn margin_lower_bounds_from(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    pre_activation: &[LayerBounds],
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    match prepare_given(
        network,
        region,
        label,
        targets,
        pre_activation,
        splits,
        Method::Lp,
    )? {
        GivenBounds::Empty(result) => Ok(result),
        GivenBounds::Ready {
            network,
            bounds,
            relaxations,
        } => solve(
            &network,
            region,
            label,
            targets,
            bounds,
            &relaxations,
            splits,
        ),
    }
}

/// The triangle-relaxation LP without objective, with the variable index (if any) of each unit of the
/// last hidden layer (for a network without hidden layers, the inputs).
fn build(
    network: &Network,
    region: &Region,
    relaxations: &[Relaxation],
    splits: Option<&SplitState>,
) -> (LinearProgram, Vec<Option<usize>>) {
    let mut program = LinearProgram::default();
    let mut previous: Vec<Option<usize>> = (0..region.dim())
        .map(|i| Some(program.variable(region.outer_lower[i], region.outer_upper[i])))
        .collect();
    for (k, relaxation) in relaxations.iter().enumerate() {
        let layer = &network.layers[k];
        let mut current = Vec::with_capacity(relaxation.units.len());
        for (i, unit) in relaxation.units.iter().enumerate() {
            // z = Σ_j W_ij h_j + b_i, as terms over the previous variables.
            let z: Vec<(usize, f64)> = previous
                .iter()
                .enumerate()
                .filter_map(|(j, v)| {
                    let w = layer.weights[(i, j)];
                    v.filter(|_| w != 0.0).map(|v| (v, w))
                })
                .collect();
            let b = layer.bias[i];
            let negated = |factor: f64| -> Vec<(usize, f64)> {
                z.iter().map(|&(v, w)| (v, -factor * w)).collect()
            };
            match splits.map(|s| s.layers[k][i]).unwrap_or_default() {
                ReluSplit::Active => program.constrain(z.clone(), Sense::AtLeast, -b),
                ReluSplit::Inactive => program.constrain(z.clone(), Sense::AtMost, -b),
                ReluSplit::Free => {}
            }
            match *unit {
                Unit::Zero => current.push(None),
                Unit::Identity => {
                    let h = program.variable(f64::NEG_INFINITY, f64::INFINITY);
                    let mut terms = negated(1.0);
                    terms.push((h, 1.0));
                    program.constrain(terms, Sense::Equal, b);
                    current.push(Some(h));
                }
                Unit::Unstable {
                    upper_slope,
                    upper_intercept,
                    ..
                } => {
                    let h = program.variable(0.0, f64::INFINITY);
                    // h − z ≥ 0
                    let mut terms = negated(1.0);
                    terms.push((h, 1.0));
                    program.constrain(terms, Sense::AtLeast, b);
                    // h − s z ≤ −s l
                    let mut terms = negated(upper_slope);
                    terms.push((h, 1.0));
                    program.constrain(terms, Sense::AtMost, upper_slope * b + upper_intercept);
                    current.push(Some(h));
                }
            }
        }
        previous = current;
    }
    (program, previous)
}

fn solve(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    bounds: Vec<LayerBounds>,
    relaxations: &[Relaxation],
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    let (program, last_units) = build(network, region, relaxations, splits);
    let (rows, constants) = margin_rows(network, label, targets);
    // The linear relaxation's input functions: fallback values and, for L2, the cuts.
    let (mut inputs, mut input_constants) = (rows.clone(), constants.clone());
    backward(
        network,
        network.layers.len() - 1,
        &mut inputs,
        &mut input_constants,
        relaxations,
    );
    let mut lower = Vec::with_capacity(targets.len());
    let mut minimisers = Vec::with_capacity(targets.len());
    for t in 0..targets.len() {
        let input_row: Vec<f64> = inputs.row(t).iter().copied().collect();
        let input_minimum = concretise::minimum(region, &input_row);
        let mut program = program.clone();
        if region.norm == Norm::L2 {
            let terms = input_row
                .iter()
                .enumerate()
                .filter(|(_, a)| **a != 0.0)
                .map(|(i, a)| (i, *a))
                .collect();
            // Loosened by a rounding slack so the cut never removes region points.
            let slack = SOLVER_SLACK * (1.0 + input_minimum.abs());
            program.constrain(terms, Sense::AtLeast, input_minimum - slack);
        }
        let objective: Vec<(usize, f64)> = last_units
            .iter()
            .enumerate()
            .filter_map(|(c, v)| v.map(|v| (v, rows[(t, c)])))
            .filter(|(_, w)| *w != 0.0)
            .collect();
        match solver::minimise(&program, &objective, constants[t])? {
            Outcome::Optimal { value, point } => {
                let mut x: Vec<f64> = point[..region.dim()].to_vec();
                region.project(&mut x);
                // Sanity check on the solver: a region point meeting the splits has a true margin no
                // lower than any sound bound. If the reported optimum exceeds it, distrust the solver
                // and keep the linear-relaxation bound.
                let fallback = input_minimum + input_constants[t];
                let logits = network.forward(&x);
                let pre: Vec<Vec<f64>> = network
                    .pre_activations(&x)
                    .iter()
                    .take(relaxations.len())
                    .map(|z| z.iter().copied().collect())
                    .collect();
                let admitted = splits.map(|s| s.admits(&pre)).unwrap_or(true);
                let observed = logits[label] - logits[targets[t]];
                let trusted =
                    !admitted || value <= observed + SOLVER_SLACK * (1.0 + observed.abs());
                lower.push(if trusted { value } else { fallback });
                minimisers.push(Some(x));
            }
            Outcome::Infeasible => {
                lower.push(input_minimum + input_constants[t]);
                minimisers.push(None);
            }
        }
    }
    Ok(MarginBounds {
        method: Method::Lp,
        targets: targets.to_vec(),
        lower,
        minimisers,
        pre_activation: bounds,
        domain: Domain::Feasible,
    })
}
