//! The bridge from the bound API (one sample or sub-domain, its label and forbidden classes) to the
//! batched engine ([`crate::engine`]): every method of this module's parent runs here, on many
//! requests at once.
//!
//! Guarantee: inherited from the engine — every margin bound is a lower bound on the real-number
//! network's margin over the request's region and splits, rounding and fold errors included.

use nalgebra::{DMatrix, DVector};

use super::{Domain, LayerBounds, MarginBounds, Method, SplitState, CERTIFY_TOLERANCE};
use crate::engine::backward::{self, Choices, Keep, Objectives};
use crate::engine::intermediate::{self, Given, HiddenBounds, Tightness};
use crate::engine::slopes::{self, SlopeSettings};
use crate::engine::{Domains, Engine};
use crate::threat::Region;

/// One bound request.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Request<'a> {
    /// The input region.
    pub region: &'a Region,
    /// The sample's class.
    pub label: usize,
    /// The forbidden classes.
    pub targets: &'a [usize],
    /// Optional split constraints.
    pub splits: Option<&'a SplitState>,
}

/// Pre-activation bounds to reuse for every request (all must have them): layers below `start` are
/// kept, later ones recomputed and intersected.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Reuse<'a> {
    /// Per request, sound bounds per hidden layer.
    pub bounds: &'a [&'a [LayerBounds]],
    /// First layer to recompute.
    pub start: usize,
}

fn to_matrices(
    bounds: &[&[LayerBounds]],
    hidden: &[usize],
) -> (Vec<DMatrix<f64>>, Vec<DMatrix<f64>>) {
    let count = bounds.len();
    let lower = hidden
        .iter()
        .enumerate()
        .map(|(k, &n)| DMatrix::from_fn(n, count, |i, d| bounds[d][k].lower[i]))
        .collect();
    let upper = hidden
        .iter()
        .enumerate()
        .map(|(k, &n)| DMatrix::from_fn(n, count, |i, d| bounds[d][k].upper[i]))
        .collect();
    (lower, upper)
}

/// The margin objectives `e_label − e_target` on the logits, one column per (request, target).
pub(crate) fn margin_objectives(engine: &Engine, requests: &[Request]) -> Objectives {
    let classes = engine.output_dim();
    let columns: usize = requests.iter().map(|r| r.targets.len()).sum();
    let mut coefficients = DMatrix::zeros(classes, columns);
    let mut domain = Vec::with_capacity(columns);
    let mut j = 0;
    for (d, r) in requests.iter().enumerate() {
        for &t in r.targets {
            coefficients[(r.label, j)] = 1.0;
            coefficients[(t, j)] = -1.0;
            domain.push(d);
            j += 1;
        }
    }
    Objectives {
        top: engine.depth() - 1,
        coefficients,
        constant: DVector::zeros(columns),
        domain,
    }
}

/// Margin bounds for every request by `method` (network in classifier form, requests validated).
pub(crate) fn margin_bounds(
    engine: &Engine,
    requests: &[Request],
    method: Method,
    reuse: Option<Reuse>,
    slope_settings: &SlopeSettings,
) -> Vec<MarginBounds> {
    if requests.is_empty() {
        return Vec::new();
    }
    let hidden_sizes = engine.hidden_sizes();
    let regions: Vec<&Region> = requests.iter().map(|r| r.region).collect();
    let splits: Vec<Option<&SplitState>> = requests.iter().map(|r| r.splits).collect();
    let domains = Domains::new(regions, &splits, &hidden_sizes);
    let tightness = match method {
        Method::Interval => Tightness::Interval,
        _ => Tightness::Linear,
    };
    let given = reuse.map(|r| to_matrices(r.bounds, &hidden_sizes));
    let hidden = intermediate::compute(
        engine,
        &domains,
        tightness,
        given.as_ref().zip(reuse).map(|((lower, upper), r)| Given {
            lower,
            upper,
            start: r.start,
        }),
    );
    let objectives = margin_objectives(engine, requests);
    let interval = backward::over_last_box(engine, &hidden, &domains, &objectives);
    let (linear, minimiser) = match method {
        Method::Interval => (None, None),
        Method::Linear => {
            let result = backward::run(
                engine,
                &hidden,
                &domains,
                objectives.clone(),
                Choices::default(),
                Keep::Minimisers,
            );
            (Some(result.lower), Some(result.minimiser))
        }
        Method::OptimisedLinear => {
            let threshold = vec![CERTIFY_TOLERANCE; objectives.domain.len()];
            let result = slopes::optimise(
                engine,
                &hidden,
                &domains,
                &objectives,
                &threshold,
                slope_settings,
            );
            (Some(result.lower), Some(result.minimiser))
        }
    };
    let mut out = Vec::with_capacity(requests.len());
    let mut j = 0;
    for (d, r) in requests.iter().enumerate() {
        let mut bounds = hidden.layer_bounds(d);
        if let Some((layer, unit)) = hidden.empty[d] {
            bounds.truncate(layer + 1);
            out.push(MarginBounds::empty(method, r.targets, bounds, layer, unit));
            j += r.targets.len();
            continue;
        }
        let mut lower = Vec::with_capacity(r.targets.len());
        let mut minimisers = Vec::with_capacity(r.targets.len());
        for _ in r.targets {
            let value = match &linear {
                Some(l) => l[j].max(interval[j]),
                None => interval[j],
            };
            lower.push(value);
            minimisers.push(
                minimiser
                    .as_ref()
                    .map(|m| m.column(j).iter().copied().collect()),
            );
            j += 1;
        }
        out.push(MarginBounds {
            method,
            targets: r.targets.to_vec(),
            lower,
            minimisers,
            pre_activation: bounds,
            domain: Domain::Feasible,
        });
    }
    out
}

/// Pre-activation bounds of every hidden layer for one region (and optional splits).
pub(crate) fn hidden_bounds(
    engine: &Engine,
    region: &Region,
    splits: Option<&SplitState>,
    tightness: Tightness,
) -> (Vec<LayerBounds>, Domain) {
    let domains = Domains::new(vec![region], &[splits], &engine.hidden_sizes());
    let hidden = intermediate::compute(engine, &domains, tightness, None);
    let mut bounds = hidden.layer_bounds(0);
    match hidden.empty[0] {
        Some((layer, unit)) => {
            bounds.truncate(layer + 1);
            (bounds, Domain::Empty { layer, unit })
        }
        None => (bounds, Domain::Feasible),
    }
}

/// Interval margin bounds per request (`[request][target]`) from computed hidden bounds.
pub(crate) fn interval_margins(
    engine: &Engine,
    hidden: &HiddenBounds,
    domains: &Domains,
    requests: &[Request],
) -> Vec<Vec<f64>> {
    let objectives = margin_objectives(engine, requests);
    let values = backward::over_last_box(engine, hidden, domains, &objectives);
    let mut j = 0;
    requests
        .iter()
        .map(|r| {
            let row = values[j..j + r.targets.len()].to_vec();
            j += r.targets.len();
            row
        })
        .collect()
}

/// One sample's margin bounds by `method`: validates, builds the engine and runs a batch of one.
pub(crate) fn one(
    network: &crate::model::Network,
    request: Request,
    method: Method,
    settings: &SlopeSettings,
) -> Result<MarginBounds, super::BoundError> {
    let network = super::validate(
        network,
        request.region,
        request.label,
        request.targets,
        request.splits,
    )?;
    let engine = Engine::new(&network);
    Ok(margin_bounds(&engine, &[request], method, None, settings).remove(0))
}
