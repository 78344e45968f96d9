//! Margin bounds of many sub-domains of one sample at once, on the batched engine
//! ([`crate::engine`]): the seam between the trees and the bound algorithms.
//!
//! A [`Job`] is one sub-domain: its split constraints and, for a child, its parent's pre-activation
//! bounds with the first layer that the split can change. Jobs with the same first layer share one
//! [`Domains`] batch; each batch is cut into chunks of [`DOMAINS_PER_TASK`] domains that run in
//! parallel (rayon), and every chunk computes its intermediate bounds
//! ([`intermediate::compute`], reusing the parent's bounds below the first changed layer) and its
//! margin bounds (one backward pass, or optimised slopes and split multipliers by
//! [`slopes::optimise`]) as matrix products over all its columns. A column's result does not depend on
//! the other columns of its chunk (up to the summation order of the products).
//!
//! Guarantee: every bound returned holds for every input of the region that meets the job's splits,
//! for the real-number network (the engine's guarantee); the parent's bounds are only reused on a
//! child, whose domain lies inside the parent's. A job reported `empty` has no such input.

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;

use super::SearchSettings;
use crate::bound::{LayerBounds, Method, SplitState};
use crate::engine::backward::{self, Choices, Keep, Objectives};
use crate::engine::intermediate::{self, Given, HiddenBounds, Tightness};
use crate::engine::slopes::{self, SlopeSettings, Warm};
use crate::engine::{Domains, Engine};
use crate::threat::Region;

/// Domains per parallel task (enough columns for efficient products, enough tasks for two cores).
pub(crate) const DOMAINS_PER_TASK: usize = 16;

/// One sub-domain to bound.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Job<'a> {
    /// Split constraints (`None` = none).
    pub splits: Option<&'a SplitState>,
    /// Sound bounds on a domain containing this one (the parent's), and the first hidden layer to
    /// recompute; layers below it are taken as given (clipped by the splits).
    pub given: Option<(&'a [LayerBounds], usize)>,
    /// Slopes and split multipliers to start the ascent from, one per target (a parent's best).
    pub warm: Option<&'a [Warm]>,
}

/// What the margin objectives are: `logit_label − logit_t` for every `t` of `targets`.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Margins<'a> {
    /// The sample's class.
    pub label: usize,
    /// The classes bounded against.
    pub targets: &'a [usize],
}

/// How to bound.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Settings {
    /// Interval, linear (one backward pass) or optimised (slopes and split multipliers).
    pub method: Method,
    /// The ascent of the optimised method.
    pub slopes: SlopeSettings,
    /// Optimisation of a column stops once its bound exceeds this.
    pub threshold: f64,
}

impl Settings {
    /// The search's bound method and ascent, stopping columns at `threshold`.
    pub fn of(search: &SearchSettings, threshold: f64) -> Settings {
        Settings {
            method: search.bound_method,
            slopes: SlopeSettings {
                iterations: search.slope_options.iterations,
                step: search.slope_options.step,
            },
            threshold,
        }
    }
}

/// The bounds of one job.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Bounded {
    /// Sound lower bound per target (`+∞` for an empty domain).
    pub lower: Vec<f64>,
    /// Per target, the region point minimising the final linear bound (`None` for interval bounds or
    /// an empty domain).
    pub minimisers: Vec<Option<Vec<f64>>>,
    /// Sound pre-activation bounds per hidden layer (after split clipping; empty for an empty domain).
    pub bounds: Vec<LayerBounds>,
    /// No region input meets the splits.
    pub empty: bool,
    /// Per target, the slopes and multipliers of its best optimised bound (`None` unless optimised).
    pub warm: Vec<Option<Warm>>,
}

/// Bounds every job on `region` (the network behind `engine` in classifier form, problem validated).
pub(crate) fn bound(
    engine: &Engine,
    region: &Region,
    margins: Margins,
    jobs: &[Job],
    settings: &Settings,
) -> Vec<Bounded> {
    let layers = engine.depth() - 1;
    // Tasks: runs of jobs with the same first recomputed layer, cut into chunks.
    let mut order: Vec<usize> = (0..jobs.len()).collect();
    let start_of = |job: &Job| job.given.map_or(0, |(_, start)| start.min(layers));
    order.sort_by_key(|&j| (jobs[j].given.is_some(), start_of(&jobs[j])));
    let mut tasks: Vec<&[usize]> = Vec::new();
    let mut rest = &order[..];
    while let Some(&first) = rest.first() {
        let key = (jobs[first].given.is_some(), start_of(&jobs[first]));
        let same = rest
            .iter()
            .take_while(|&&j| (jobs[j].given.is_some(), start_of(&jobs[j])) == key)
            .count();
        let (run, tail) = rest.split_at(same);
        tasks.extend(run.chunks(DOMAINS_PER_TASK));
        rest = tail;
    }
    let results: Vec<Vec<(usize, Bounded)>> = tasks
        .par_iter()
        .map(|task| {
            let chunk: Vec<Job> = task.iter().map(|&j| jobs[j]).collect();
            let bounded = bound_chunk(engine, region, margins, &chunk, settings);
            task.iter().copied().zip(bounded).collect()
        })
        .collect();
    let mut out: Vec<Option<Bounded>> = vec![None; jobs.len()];
    for (j, b) in results.into_iter().flatten() {
        out[j] = Some(b);
    }
    out.into_iter().flatten().collect()
}

/// Per-layer matrices (units × domains) of the given bounds of `jobs`.
fn given_matrices(jobs: &[Job], hidden: &[usize]) -> (Vec<DMatrix<f64>>, Vec<DMatrix<f64>>) {
    let of = |d: usize| {
        jobs[d]
            .given
            .expect("every job of a chunk has given bounds")
            .0
    };
    let lower = hidden
        .iter()
        .enumerate()
        .map(|(k, &n)| DMatrix::from_fn(n, jobs.len(), |i, d| of(d)[k].lower[i]))
        .collect();
    let upper = hidden
        .iter()
        .enumerate()
        .map(|(k, &n)| DMatrix::from_fn(n, jobs.len(), |i, d| of(d)[k].upper[i]))
        .collect();
    (lower, upper)
}

/// The hidden bounds of `jobs` (all with given bounds and the same start, or none with given bounds).
pub(crate) fn hidden_bounds<'r>(
    engine: &Engine,
    region: &'r Region,
    jobs: &[Job],
    tightness: Tightness,
) -> (Domains<'r>, HiddenBounds) {
    let hidden_sizes = engine.hidden_sizes();
    let splits: Vec<Option<&SplitState>> = jobs.iter().map(|j| j.splits).collect();
    let domains = Domains::new(vec![region; jobs.len()], &splits, &hidden_sizes);
    let given = jobs
        .first()
        .and_then(|j| j.given)
        .map(|(_, start)| (given_matrices(jobs, &hidden_sizes), start));
    let hidden = intermediate::compute(
        engine,
        &domains,
        tightness,
        given.as_ref().map(|((lower, upper), start)| Given {
            lower,
            upper,
            start: *start,
        }),
    );
    (domains, hidden)
}

/// The margin objectives, one column per (domain, target), domain-major.
pub(crate) fn margin_objectives(engine: &Engine, margins: Margins, domains: usize) -> Objectives {
    let per = margins.targets.len();
    let columns = domains * per;
    let mut coefficients = DMatrix::zeros(engine.output_dim(), columns);
    let mut domain = Vec::with_capacity(columns);
    for d in 0..domains {
        for (t, &target) in margins.targets.iter().enumerate() {
            coefficients[(margins.label, d * per + t)] = 1.0;
            coefficients[(target, d * per + t)] = -1.0;
            domain.push(d);
        }
    }
    Objectives {
        top: engine.depth() - 1,
        coefficients,
        constant: DVector::zeros(columns),
        domain,
    }
}

fn bound_chunk(
    engine: &Engine,
    region: &Region,
    margins: Margins,
    jobs: &[Job],
    settings: &Settings,
) -> Vec<Bounded> {
    let tightness = match settings.method {
        Method::Interval => Tightness::Interval,
        Method::Linear | Method::OptimisedLinear => Tightness::Linear,
    };
    let (domains, hidden) = hidden_bounds(engine, region, jobs, tightness);
    let objectives = margin_objectives(engine, margins, jobs.len());
    let interval = backward::over_last_box(engine, &hidden, &domains, &objectives);
    let per = margins.targets.len();
    let (linear, mut warm) = match settings.method {
        Method::Interval => (None, Vec::new()),
        Method::Linear => (
            Some(backward::run(
                engine,
                &hidden,
                &domains,
                objectives.clone(),
                Choices::default(),
                Keep::Minimisers,
            )),
            Vec::new(),
        ),
        Method::OptimisedLinear => {
            let threshold = vec![settings.threshold; objectives.domain.len()];
            let start: Vec<Option<&Warm>> = (0..objectives.domain.len())
                .map(|j| jobs[j / per].warm.and_then(|w| w.get(j % per)))
                .collect();
            let (result, warm) = slopes::optimise_from(
                engine,
                &hidden,
                &domains,
                &objectives,
                &threshold,
                &settings.slopes,
                &start,
            );
            (Some(result), warm.into_iter().map(Some).collect())
        }
    };
    if warm.is_empty() {
        warm = vec![None; objectives.domain.len()];
    }
    (0..jobs.len())
        .map(|d| {
            if hidden.empty[d].is_some() {
                return Bounded {
                    lower: vec![f64::INFINITY; per],
                    minimisers: vec![None; per],
                    bounds: Vec::new(),
                    empty: true,
                    warm: vec![None; per],
                };
            }
            let columns = d * per..(d + 1) * per;
            let lower = columns
                .clone()
                .map(|j| match &linear {
                    Some(result) => result.lower[j].max(interval[j]),
                    None => interval[j],
                })
                .collect();
            let choices = columns.clone().map(|j| warm[j].take()).collect();
            let minimisers = columns
                .map(|j| {
                    linear
                        .as_ref()
                        .map(|result| result.minimiser.column(j).iter().copied().collect())
                })
                .collect();
            Bounded {
                lower,
                minimisers,
                bounds: hidden.layer_bounds(d),
                empty: false,
                warm: choices,
            }
        })
        .collect()
}

#[cfg(test)]
#[path = "bounding_tests.rs"]
mod tests;
