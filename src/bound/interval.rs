//! Interval bound propagation (Gowal et al., 2018): each layer's box image, the margin minimised over
//! the last hidden layer's box. Runs on the batched engine ([`crate::engine`]), with its rounding
//! allowance, so every bound is sound for the real-number network.

use nalgebra::DMatrix;

use super::batch::{self, Request};
use super::{
    validate, validate_batch, BoundError, Domain, LayerBounds, MarginBounds, Method, SplitState,
};
use crate::engine::intermediate::{self, Tightness};
use crate::engine::slopes::SlopeSettings;
use crate::engine::{Domains, Engine};
use crate::model::Network;
use crate::threat::Region;

/// Interval bounds for a batch of samples (no splits), in matrix form.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchIntervalBounds {
    /// `lower[k][(i, s)]` ≤ pre-activation `i` of hidden layer `k` for sample `s`.
    pub lower: Vec<DMatrix<f64>>,
    /// `upper[k][(i, s)]` ≥ pre-activation `i` of hidden layer `k` for sample `s`.
    pub upper: Vec<DMatrix<f64>>,
    /// `margins[s][t]` ≤ `logit_label − logit_target` for target `t` of sample `s`.
    pub margins: Vec<Vec<f64>>,
}

/// Interval pre-activation bounds of every hidden layer under optional split constraints, with the
/// domain status (on an empty domain the list stops at the emptied layer).
pub fn pre_activation_bounds(
    network: &Network,
    region: &Region,
    splits: Option<&SplitState>,
) -> Result<(Vec<LayerBounds>, Domain), BoundError> {
    let network = validate(network, region, 0, &[], splits)?;
    let engine = Engine::new(&network);
    Ok(batch::hidden_bounds(
        &engine,
        region,
        splits,
        Tightness::Interval,
    ))
}

/// Interval lower bounds on `logit_label − logit_j` for every `j` in `targets`.
pub fn margin_lower_bounds(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    let request = Request {
        region,
        label,
        targets,
        splits,
    };
    batch::one(
        network,
        request,
        Method::Interval,
        &SlopeSettings::default(),
    )
}

/// Interval bounds for many samples at once (no split constraints): one product per layer for the
/// whole batch. `regions[s]`, `labels[s]` and `targets[s]` describe sample `s`.
pub fn batch_margin_lower_bounds(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
) -> Result<BatchIntervalBounds, BoundError> {
    let network = network.as_classifier();
    validate_batch(&network, regions, labels, targets)?;
    let engine = Engine::new(&network);
    let refs: Vec<&Region> = regions.iter().collect();
    let domains = Domains::new(refs, &vec![None; regions.len()], &engine.hidden_sizes());
    let hidden = intermediate::compute(&engine, &domains, Tightness::Interval, None);
    let requests: Vec<Request> = regions
        .iter()
        .zip(labels.iter().zip(targets))
        .map(|(region, (&label, targets))| Request {
            region,
            label,
            targets,
            splits: None,
        })
        .collect();
    let margins = batch::interval_margins(&engine, &hidden, &domains, &requests);
    Ok(BatchIntervalBounds {
        lower: hidden.lower,
        upper: hidden.upper,
        margins,
    })
}
