//! Backward linear relaxation: linear-bound propagation (Zhang et al., 2018), the dual view of
//! Wong & Kolter (2018).
//!
//! Given sound pre-activation bounds `[l, u]` of a hidden unit, its ReLU `h = max(z, 0)` is enclosed by
//! two lines: stable units are exact (`h = z` when `l ≥ 0`, `h = 0` when `u ≤ 0`, and likewise when a split
//! forces the unit), an unstable unit satisfies `α z ≤ h ≤ s (z − l)` with `s = u / (u − l)` and any
//! `α ∈ [0, 1]` (here the adaptive choice `α = 1` when `u ≥ −l`, else `0`). A linear objective on the
//! output is pushed backwards through each affine map; at each ReLU a positive coefficient takes the lower
//! line and a negative one the upper line, so the result is a linear function of the input that is
//! everywhere ≤ the objective on the region. Minimising it over the region ([`super::concretise`], exact
//! for L-inf ∩ box, Lagrangian dual for L2 ∩ box) gives the bound.
//!
//! Pre-activation bounds come from the same procedure, layer by layer (objectives `±e_i`), and each is
//! the elementwise tighter of that and the interval bound of the layer, so every layer is at least as
//! tight as interval propagation. Margin bounds are also never below the interval margin bound (the
//! larger of two sound bounds is sound). Under split constraints, the constrained units use the identity
//! or zero line and their bounds are clipped; the bound then holds for every region input meeting the
//! constraints.

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;

use super::interval::{activation_box, affine_box, margin_over_box};
use super::{
    clip_to_splits, concretise, validate, validate_batch, BoundError, Domain, LayerBounds,
    MarginBounds, Method, ReluSplit, SplitState,
};
use crate::model::Network;
use crate::threat::{Norm, Region};

/// How one hidden unit is relaxed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Unit {
    /// `h = 0` on the domain.
    Zero,
    /// `h = z` on the domain.
    Identity,
    /// `lower_slope · z ≤ h ≤ upper_slope · z + upper_intercept`.
    Unstable {
        lower_slope: f64,
        upper_slope: f64,
        upper_intercept: f64,
    },
}

/// The relaxation of every unit of one hidden layer.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Relaxation {
    pub(crate) units: Vec<Unit>,
}

impl Relaxation {
    /// The relaxation for sound bounds and optional splits, with adaptive lower slopes.
    pub(crate) fn new(bounds: &LayerBounds, splits: Option<&[ReluSplit]>) -> Relaxation {
        let units = (0..bounds.len())
            .map(|i| {
                let split = splits.map(|s| s[i]).unwrap_or_default();
                let (l, u) = (bounds.lower[i], bounds.upper[i]);
                match split {
                    ReluSplit::Active => Unit::Identity,
                    ReluSplit::Inactive => Unit::Zero,
                    ReluSplit::Free if l >= 0.0 => Unit::Identity,
                    ReluSplit::Free if u <= 0.0 => Unit::Zero,
                    ReluSplit::Free => {
                        let upper_slope = u / (u - l);
                        Unit::Unstable {
                            lower_slope: if u >= -l { 1.0 } else { 0.0 },
                            upper_slope,
                            upper_intercept: -upper_slope * l,
                        }
                    }
                }
            })
            .collect();
        Relaxation { units }
    }
}

/// Pushes linear lower-bound objectives backwards to the input.
///
/// `a` (rows × inputs of `layers[top]`) holds coefficients on the input of `layers[top]` and `constant`
/// the constants; on return `a` holds coefficients on the network input such that for every domain input
/// `a·x + constant ≤` the objective. Returns the multiply-add count of the matrix products (for
/// benchmarks).
pub(crate) fn backward(
    network: &Network,
    top: usize,
    a: &mut DMatrix<f64>,
    constant: &mut DVector<f64>,
    relaxations: &[Relaxation],
) -> u64 {
    let mut work = 0u64;
    for k in (0..top).rev() {
        for (i, unit) in relaxations[k].units.iter().enumerate() {
            let mut column = a.column_mut(i);
            match *unit {
                Unit::Identity => {}
                Unit::Zero => column.fill(0.0),
                Unit::Unstable {
                    lower_slope,
                    upper_slope,
                    upper_intercept,
                } => {
                    for (r, v) in column.iter_mut().enumerate() {
                        if *v >= 0.0 {
                            *v *= lower_slope;
                        } else {
                            constant[r] += *v * upper_intercept;
                            *v *= upper_slope;
                        }
                    }
                }
            }
        }
        let layer = &network.layers[k];
        *constant += &*a * &layer.bias;
        *a = &*a * &layer.weights;
        work += (a.nrows() * layer.weights.nrows() * layer.weights.ncols()) as u64;
    }
    work
}

/// Linear-relaxation pre-activation bounds, each layer the elementwise tighter of linear and interval.
pub(crate) fn intermediate_bounds(
    network: &Network,
    region: &Region,
    splits: Option<&SplitState>,
) -> (Vec<LayerBounds>, Vec<Relaxation>, Domain, u64) {
    let hidden = network.layers.len() - 1;
    let mut bounds: Vec<LayerBounds> = Vec::with_capacity(hidden);
    let mut relaxations: Vec<Relaxation> = Vec::with_capacity(hidden);
    let mut work = 0u64;
    for m in 0..hidden {
        let layer = &network.layers[m];
        let (lo, hi) = match bounds.last() {
            Some(previous) => activation_box(previous),
            None => (region.outer_lower.clone(), region.outer_upper.clone()),
        };
        let mut best = affine_box(layer, &lo, &hi);
        // For the first layer over an L-inf box the interval bound is already exact.
        let exact = m == 0 && region.norm == Norm::Linf;
        let refine: Vec<usize> = (0..best.len())
            .filter(|&i| !exact && best.is_unstable(i))
            .collect();
        if !refine.is_empty() {
            let count = refine.len();
            let width = layer.input_dim();
            let mut a = DMatrix::zeros(2 * count, width);
            let mut constant = DVector::zeros(2 * count);
            for (r, &i) in refine.iter().enumerate() {
                for j in 0..width {
                    a[(r, j)] = layer.weights[(i, j)];
                    a[(count + r, j)] = -layer.weights[(i, j)];
                }
                constant[r] = layer.bias[i];
                constant[count + r] = -layer.bias[i];
            }
            work += backward(network, m, &mut a, &mut constant, &relaxations);
            let values = concretise::minimum_of_rows(region, &a, &constant);
            for (r, &i) in refine.iter().enumerate() {
                best.lower[i] = best.lower[i].max(values[r]);
                best.upper[i] = best.upper[i].min(-values[count + r]);
            }
        }
        let emptied = clip_to_splits(&mut best, splits.map(|s| s.layers[m].as_slice()));
        if let Some(unit) = emptied {
            bounds.push(best);
            return (bounds, relaxations, Domain::Empty { layer: m, unit }, work);
        }
        relaxations.push(Relaxation::new(
            &best,
            splits.map(|s| s.layers[m].as_slice()),
        ));
        bounds.push(best);
    }
    (bounds, relaxations, Domain::Feasible, work)
}

/// The margin specification rows `W_y − W_j` on the input of the last affine map, with constants.
pub(crate) fn margin_rows(
    network: &Network,
    label: usize,
    targets: &[usize],
) -> (DMatrix<f64>, DVector<f64>) {
    let last = network.layers.last().expect("non-empty network");
    let width = last.input_dim();
    let mut a = DMatrix::zeros(targets.len(), width);
    let mut constant = DVector::zeros(targets.len());
    for (t, &j) in targets.iter().enumerate() {
        for c in 0..width {
            a[(t, c)] = last.weights[(label, c)] - last.weights[(j, c)];
        }
        constant[t] = last.bias[label] - last.bias[j];
    }
    (a, constant)
}

/// Final margin pass given intermediate bounds and relaxations of a feasible domain.
pub(crate) fn final_pass(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    bounds: Vec<LayerBounds>,
    relaxations: &[Relaxation],
) -> (MarginBounds, u64) {
    let top = network.layers.len() - 1;
    let (mut a, mut constant) = margin_rows(network, label, targets);
    let work = backward(network, top, &mut a, &mut constant, relaxations);
    let (lo, hi) = match bounds.last() {
        Some(last) => activation_box(last),
        None => (region.outer_lower.clone(), region.outer_upper.clone()),
    };
    let last = &network.layers[top];
    let mut lower = Vec::with_capacity(targets.len());
    let mut minimisers = Vec::with_capacity(targets.len());
    for (t, &j) in targets.iter().enumerate() {
        let row: Vec<f64> = a.row(t).iter().copied().collect();
        let (value, point) = concretise::minimum_with_point(region, &row);
        let interval = margin_over_box(last, label, j, &lo, &hi);
        lower.push((value + constant[t]).max(interval));
        minimisers.push(Some(point));
    }
    let bounds = MarginBounds {
        method: Method::Linear,
        targets: targets.to_vec(),
        lower,
        minimisers,
        pre_activation: bounds,
        domain: Domain::Feasible,
    };
    (bounds, work)
}

/// Linear-relaxation pre-activation bounds of every hidden layer under optional split constraints, with
/// the domain status (on an empty domain the list stops at the emptied layer).
pub fn pre_activation_bounds(
    network: &Network,
    region: &Region,
    splits: Option<&SplitState>,
) -> Result<(Vec<LayerBounds>, Domain), BoundError> {
    let network = validate(network, region, 0, &[], splits)?;
    let (bounds, _, domain, _) = intermediate_bounds(&network, region, splits);
    Ok((bounds, domain))
}

/// Linear-relaxation lower bounds on `logit_label − logit_j` for every `j` in `targets`, with
/// intermediate bounds computed by the same method (see the module docs).
pub fn margin_lower_bounds(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    let network = validate(network, region, label, targets, splits)?;
    Ok(bounds_checked(&network, region, label, targets, splits).0)
}

/// [`margin_lower_bounds`] for a validated classifier-form network, with the multiply-add count.
pub(crate) fn bounds_checked(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
) -> (MarginBounds, u64) {
    let (bounds, relaxations, domain, work) = intermediate_bounds(network, region, splits);
    if let Domain::Empty { layer, unit } = domain {
        return (
            MarginBounds::empty(Method::Linear, targets, bounds, layer, unit),
            work,
        );
    }
    let (result, more) = final_pass(network, region, label, targets, bounds, &relaxations);
    (result, work + more)
}

/// Linear-relaxation margin bounds from given sound pre-activation bounds (one per hidden layer, e.g.
/// cached by branch and bound, or interval bounds); split constraints clip them and pick the relaxation.
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
        Method::Linear,
    )? {
        GivenBounds::Empty(result) => Ok(result),
        GivenBounds::Ready {
            network,
            bounds,
            relaxations,
        } => Ok(final_pass(&network, region, label, targets, bounds, &relaxations).0),
    }
}

/// The start of every bound computed on given pre-activation bounds: the checked network, the bounds
/// clipped by the split constraints with their relaxations, or the result for an empty domain.
pub(crate) enum GivenBounds<'a> {
    /// The split constraints leave inputs: bound them with these.
    Ready {
        /// The checked classifier network.
        network: std::borrow::Cow<'a, Network>,
        /// Pre-activation bounds clipped by the splits.
        bounds: Vec<LayerBounds>,
        /// The ReLU relaxation of every hidden layer.
        relaxations: Vec<Relaxation>,
    },
    /// The split constraints contradict the bounds: the finished (prunable) result.
    Empty(MarginBounds),
}

/// Validates the inputs and relaxes the given pre-activation bounds under `splits` for `method`.
pub(crate) fn prepare_given<'a>(
    network: &'a Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    pre_activation: &[LayerBounds],
    splits: Option<&SplitState>,
    method: Method,
) -> Result<GivenBounds<'a>, BoundError> {
    let network = validate(network, region, label, targets, splits)?;
    let bounds = checked_layer_bounds(&network, pre_activation)?;
    let (bounds, relaxations, domain) = relax_given(bounds, splits);
    if let Domain::Empty { layer, unit } = domain {
        return Ok(GivenBounds::Empty(MarginBounds::empty(
            method, targets, bounds, layer, unit,
        )));
    }
    Ok(GivenBounds::Ready {
        network,
        bounds,
        relaxations,
    })
}

/// Checks that given pre-activation bounds match the hidden layers and are finite, and copies them.
pub(crate) fn checked_layer_bounds(
    network: &Network,
    pre_activation: &[LayerBounds],
) -> Result<Vec<LayerBounds>, BoundError> {
    let sizes = network.hidden_sizes();
    if pre_activation.len() != sizes.len() {
        return Err(BoundError::DimensionMismatch {
            what: "pre-activation bounds (hidden layers)".into(),
            expected: sizes.len(),
            found: pre_activation.len(),
        });
    }
    for (k, (b, n)) in pre_activation.iter().zip(&sizes).enumerate() {
        if b.lower.len() != *n || b.upper.len() != *n {
            return Err(BoundError::DimensionMismatch {
                what: format!("pre-activation bounds of hidden layer {k}"),
                expected: *n,
                found: b.lower.len().min(b.upper.len()),
            });
        }
        if let Some(v) = b.lower.iter().chain(&b.upper).find(|v| !v.is_finite()) {
            return Err(BoundError::NonFinite {
                what: format!("pre-activation bound of hidden layer {k}"),
                value: *v,
            });
        }
    }
    Ok(pre_activation.to_vec())
}

/// Clips given bounds to the splits and builds the relaxations.
pub(crate) fn relax_given(
    mut bounds: Vec<LayerBounds>,
    splits: Option<&SplitState>,
) -> (Vec<LayerBounds>, Vec<Relaxation>, Domain) {
    let mut relaxations = Vec::with_capacity(bounds.len());
    for (k, layer) in bounds.iter_mut().enumerate() {
        let layer_splits = splits.map(|s| s.layers[k].as_slice());
        if let Some(unit) = clip_to_splits(layer, layer_splits) {
            return (bounds, relaxations, Domain::Empty { layer: k, unit });
        }
        relaxations.push(Relaxation::new(layer, layer_splits));
    }
    (bounds, relaxations, Domain::Feasible)
}

/// Linear-relaxation bounds for many samples (no split constraints), in parallel over samples.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchLinearBounds {
    /// Per sample, its margin bounds and pre-activation bounds.
    pub samples: Vec<MarginBounds>,
    /// Multiply-adds spent in the matrix products (one multiply-add = two floating-point operations).
    pub multiply_adds: u64,
}

/// [`margin_lower_bounds`] for many samples; `regions[s]`, `labels[s]` and `targets[s]` describe sample
/// `s`. The work per sample is dense matrix products; samples run in parallel.
pub fn batch_margin_lower_bounds(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
) -> Result<BatchLinearBounds, BoundError> {
    let network = network.as_classifier();
    let samples = regions.len();
    validate_batch(&network, regions, labels, targets)?;
    let results: Vec<(MarginBounds, u64)> = (0..samples)
        .into_par_iter()
        .map(|s| bounds_checked(&network, &regions[s], labels[s], &targets[s], None))
        .collect();
    let multiply_adds = results.iter().map(|r| r.1).sum();
    Ok(BatchLinearBounds {
        samples: results.into_iter().map(|r| r.0).collect(),
        multiply_adds,
    })
}
