//! Interval bound propagation (Gowal et al., 2018): push a box through the network layer by layer.
//!
//! The input box is the region's bounding box (for L-inf it is the region; for L2 it contains it). An
//! affine layer maps the box with centre `m` and radius `r` onto the box with centre `W m + b` and radius
//! `|W| r`, which contains the image; a ReLU maps `[l, u]` to `[max(l, 0), max(u, 0)]`. The margin
//! specification `e_y − e_j` is folded into the last affine map before its box is minimised (common
//! practice: it is never looser than subtracting separate logit bounds). Every bound is sound in exact
//! arithmetic. Split constraints clip the pre-activation bounds they act on.
//!
//! [`batch_margin_lower_bounds`] does the same for many samples at once in matrix form (one column per
//! sample), so the work is a few dense matrix products.

use nalgebra::DMatrix;
use rayon::prelude::*;

use super::{
    clip_to_splits, validate, validate_batch, BoundError, Domain, LayerBounds, MarginBounds,
    Method, SplitState,
};
use crate::model::{Dense, Network};
use crate::threat::Region;

/// Interval bounds for many samples: per hidden layer one matrix (units × samples) of lower and upper
/// pre-activation bounds, and per sample the margin lower bounds for its targets.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchIntervalBounds {
    /// `lower[k][(i, s)]` ≤ pre-activation `i` of hidden layer `k` for sample `s`.
    pub lower: Vec<DMatrix<f64>>,
    /// `upper[k][(i, s)]` ≥ pre-activation `i` of hidden layer `k` for sample `s`.
    pub upper: Vec<DMatrix<f64>>,
    /// `margins[s][t]` ≤ `logit_label − logit_target` for target `t` of sample `s`.
    pub margins: Vec<Vec<f64>>,
}

/// `min over the box [lower, upper] of a·h` (exact per coordinate).
pub(crate) fn box_minimum(a: impl Iterator<Item = f64>, lower: &[f64], upper: &[f64]) -> f64 {
    a.zip(lower.iter().zip(upper))
        .map(|(w, (l, u))| if w > 0.0 { w * l } else { w * u })
        .sum()
}

/// The box image of `[lower, upper]` under `dense` (exact per coordinate: each weight takes the end
/// of its input interval that minimises, resp. maximises, its term).
pub(crate) fn affine_box(dense: &Dense, lower: &[f64], upper: &[f64]) -> LayerBounds {
    let mut lo: Vec<f64> = dense.bias.iter().copied().collect();
    let mut hi = lo.clone();
    for (j, column) in dense.weights.column_iter().enumerate() {
        let (l, u) = (lower[j], upper[j]);
        let column = column.as_slice();
        for ((w, a), b) in column.iter().zip(lo.iter_mut()).zip(hi.iter_mut()) {
            let (positive, negative) = (w.max(0.0), w.min(0.0));
            *a += positive * l + negative * u;
            *b += positive * u + negative * l;
        }
    }
    LayerBounds {
        lower: lo,
        upper: hi,
    }
}

/// The box of ReLU outputs for pre-activation bounds.
pub(crate) fn activation_box(bounds: &LayerBounds) -> (Vec<f64>, Vec<f64>) {
    (
        bounds.lower.iter().map(|v| v.max(0.0)).collect(),
        bounds.upper.iter().map(|v| v.max(0.0)).collect(),
    )
}

/// Interval margin bound `min over the box of (W_y − W_j)·h + b_y − b_j` for the last affine map.
pub(crate) fn margin_over_box(
    last: &Dense,
    label: usize,
    target: usize,
    lower: &[f64],
    upper: &[f64],
) -> f64 {
    let row = last
        .weights
        .row(label)
        .iter()
        .zip(last.weights.row(target).iter())
        .map(|(a, b)| a - b)
        .collect::<Vec<_>>();
    box_minimum(row.into_iter(), lower, upper) + last.bias[label] - last.bias[target]
}

/// Interval pre-activation bounds of every hidden layer under optional split constraints, with the
/// domain status (on an empty domain the list stops at the emptied layer).
pub fn pre_activation_bounds(
    network: &Network,
    region: &Region,
    splits: Option<&SplitState>,
) -> Result<(Vec<LayerBounds>, Domain), BoundError> {
    let network = validate(network, region, 0, &[], splits)?;
    Ok(propagate(&network, region, splits))
}

fn propagate(
    network: &Network,
    region: &Region,
    splits: Option<&SplitState>,
) -> (Vec<LayerBounds>, Domain) {
    let hidden = network.layers.len() - 1;
    let mut bounds = Vec::with_capacity(hidden);
    let (mut lo, mut hi) = (region.outer_lower.clone(), region.outer_upper.clone());
    for k in 0..hidden {
        let mut layer = affine_box(&network.layers[k], &lo, &hi);
        let emptied = clip_to_splits(&mut layer, splits.map(|s| s.layers[k].as_slice()));
        (lo, hi) = activation_box(&layer);
        bounds.push(layer);
        if let Some(unit) = emptied {
            return (bounds, Domain::Empty { layer: k, unit });
        }
    }
    (bounds, Domain::Feasible)
}

/// Interval lower bounds on `logit_label − logit_j` for every `j` in `targets` (see the module docs).
pub fn margin_lower_bounds(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    let network = validate(network, region, label, targets, splits)?;
    let (bounds, domain) = propagate(&network, region, splits);
    if let Domain::Empty { layer, unit } = domain {
        return Ok(MarginBounds::empty(
            Method::Interval,
            targets,
            bounds,
            layer,
            unit,
        ));
    }
    let (lo, hi) = match bounds.last() {
        Some(last) => activation_box(last),
        None => (region.outer_lower.clone(), region.outer_upper.clone()),
    };
    let last = network.layers.last().expect("non-empty network");
    let lower = targets
        .iter()
        .map(|&j| margin_over_box(last, label, j, &lo, &hi))
        .collect();
    Ok(MarginBounds {
        method: Method::Interval,
        targets: targets.to_vec(),
        lower,
        minimisers: vec![None; targets.len()],
        pre_activation: bounds,
        domain: Domain::Feasible,
    })
}

/// Interval bounds for many samples at once (no split constraints), in matrix form: the boxes of all
/// samples are propagated together with one product by `W` (centres) and one by `|W|` (radii) per
/// layer. `regions[s]`, `labels[s]` and `targets[s]` describe sample `s`.
pub fn batch_margin_lower_bounds(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
) -> Result<BatchIntervalBounds, BoundError> {
    let network = network.as_classifier();
    let samples = regions.len();
    validate_batch(&network, regions, labels, targets)?;
    let dim = network.input_dim();
    let mut last_lower = DMatrix::zeros(dim, samples);
    let mut last_upper = DMatrix::zeros(dim, samples);
    for (s, region) in regions.iter().enumerate() {
        last_lower
            .column_mut(s)
            .copy_from_slice(&region.outer_lower);
        last_upper
            .column_mut(s)
            .copy_from_slice(&region.outer_upper);
    }
    let mut centre = (&last_lower + &last_upper) * 0.5;
    let mut radius = (&last_upper - &last_lower) * 0.5;
    let hidden = network.layers.len() - 1;
    let mut lower = Vec::with_capacity(hidden);
    let mut upper = Vec::with_capacity(hidden);
    for layer in &network.layers[..hidden] {
        let magnitude = layer.weights.abs();
        let c = layer.apply_batch(&centre);
        let r = &magnitude * &radius;
        let lo = &c - &r;
        let hi = &c + &r;
        let h_lo = lo.map(|v| v.max(0.0));
        let h_hi = hi.map(|v| v.max(0.0));
        centre = (&h_lo + &h_hi) * 0.5;
        radius = (&h_hi - &h_lo) * 0.5;
        last_lower = h_lo;
        last_upper = h_hi;
        lower.push(lo);
        upper.push(hi);
    }
    let last = network.layers.last().expect("non-empty network");
    let margins = (0..samples)
        .into_par_iter()
        .map(|s| {
            let lo: Vec<f64> = last_lower.column(s).iter().copied().collect();
            let hi: Vec<f64> = last_upper.column(s).iter().copied().collect();
            targets[s]
                .iter()
                .map(|&j| margin_over_box(last, labels[s], j, &lo, &hi))
                .collect()
        })
        .collect();
    Ok(BatchIntervalBounds {
        lower,
        upper,
        margins,
    })
}
