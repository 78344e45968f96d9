//! Backward linear relaxation: linear-bound propagation (Zhang et al., 2018), the dual view of
//! Wong & Kolter (2018), run on the batched engine ([`crate::engine`]).
//!
//! Pre-activation bounds come from the same procedure, layer by layer (objectives `±e_i` for every unit
//! the interval bound leaves unstable), each the elementwise tighter of that and the interval bound.
//! Margin bounds are never below the interval margin bound. Under split constraints the constrained
//! units use the identity or zero line and their bounds are clipped; the bound then holds for every
//! region input meeting the constraints. Every bound includes the engine's rounding allowance.

use rayon::prelude::*;

use super::batch::{self, Request, Reuse};
use super::{
    validate, validate_batch, BoundError, Domain, LayerBounds, MarginBounds, Method, SplitState,
};
use crate::engine::intermediate::Tightness;
use crate::engine::slopes::SlopeSettings;
use crate::engine::Engine;
use crate::model::Network;
use crate::threat::Region;

/// Samples per engine batch in [`batch_margin_lower_bounds`].
const SAMPLES_PER_BATCH: usize = 16;

/// Linear-relaxation pre-activation bounds of every hidden layer under optional split constraints, with
/// the domain status (on an empty domain the list stops at the emptied layer).
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
        Tightness::Linear,
    ))
}

/// Linear-relaxation lower bounds on `logit_label − logit_j` for every `j` in `targets`.
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
    batch::one(network, request, Method::Linear, &SlopeSettings::default())
}

/// Linear-relaxation margin bounds reusing given sound pre-activation bounds (one per hidden layer, e.g.
/// a parent sub-domain's): they are intersected with freshly computed ones, and split constraints clip
/// them.
pub fn margin_lower_bounds_from(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    pre_activation: &[LayerBounds],
    splits: Option<&SplitState>,
) -> Result<MarginBounds, BoundError> {
    let network = validate(network, region, label, targets, splits)?;
    check_layer_bounds(&network, pre_activation)?;
    let engine = Engine::new(&network);
    let request = Request {
        region,
        label,
        targets,
        splits,
    };
    let given = [pre_activation];
    let mut out = batch::margin_bounds(
        &engine,
        &[request],
        Method::Linear,
        Some(Reuse {
            bounds: &given,
            start: 0,
        }),
        &SlopeSettings::default(),
    );
    Ok(out.remove(0))
}

/// Checks that given pre-activation bounds match the hidden layers and are finite.
pub(crate) fn check_layer_bounds(
    network: &Network,
    pre_activation: &[LayerBounds],
) -> Result<(), BoundError> {
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
    Ok(())
}

/// Linear-relaxation bounds for many samples (no split constraints).
#[derive(Debug, Clone, PartialEq)]
pub struct BatchLinearBounds {
    /// Per sample, its margin bounds and pre-activation bounds.
    pub samples: Vec<MarginBounds>,
}

/// [`margin_lower_bounds`] for many samples; `regions[s]`, `labels[s]` and `targets[s]` describe sample
/// `s`. Samples are bounded together in engine batches (matrix products over all their sub-problems).
pub fn batch_margin_lower_bounds(
    network: &Network,
    regions: &[Region],
    labels: &[usize],
    targets: &[Vec<usize>],
) -> Result<BatchLinearBounds, BoundError> {
    let network = network.as_classifier();
    validate_batch(&network, regions, labels, targets)?;
    let engine = Engine::new(&network);
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
    let samples = requests
        .par_chunks(SAMPLES_PER_BATCH)
        .flat_map_iter(|chunk| {
            batch::margin_bounds(
                &engine,
                chunk,
                Method::Linear,
                None,
                &SlopeSettings::default(),
            )
        })
        .collect();
    Ok(BatchLinearBounds { samples })
}
