//! The batched stages of the pipeline: each takes every open (sample, epsilon) task at once and returns
//! those it could not decide.
//!
//! Guarantees: a task becomes `certified` only on a sound bound above
//! [`crate::bound::CERTIFY_TOLERANCE`] for every forbidden class (or a completed search proof); a
//! counterexample is recorded only after [`crate::attack::validate`] accepted it (plain forward pass,
//! inside the region, a forbidden class wins). A stage's time is shared equally among its tasks.

use std::collections::BTreeMap;
use std::time::{Duration, Instant};

use rayon::prelude::*;

use super::pipeline::Context;
use super::report::{CounterexampleRecord, Stage, Status};
use super::CertifyError;
use crate::attack::{self, AttackOutcome, AttackProblem, AttackSettings};
use crate::bound::batch::{self, Request};
use crate::bound::{Method, CERTIFY_TOLERANCE};
use crate::engine::slopes::SlopeSettings;
use crate::model::deployed::{self, DeployedError, ErrorBox};
use crate::model::predicted_class;
use crate::threat::Region;

/// Tasks per engine batch in the bound stages.
const TASKS_PER_BATCH: usize = 16;
/// Boxes per deployed-error product (one column each).
const ERROR_BOXES_PER_BATCH: usize = 32;

/// The outcome of one (sample, epsilon) task once decided, or its state while open.
#[derive(Debug, Clone)]
pub(crate) struct Attempt {
    pub status: Status,
    pub stage: Stage,
    pub margin_lower: Option<f64>,
    pub counterexample: Option<CounterexampleRecord>,
}

/// Everything known about one sample while the stages run.
#[derive(Debug, Clone)]
pub(crate) struct SampleState {
    pub index: usize,
    pub label: usize,
    pub predicted: usize,
    pub forbidden: Vec<usize>,
    /// Per epsilon: the decided attempt, or `None` while open.
    pub attempts: Vec<Option<Attempt>>,
    /// Per epsilon: best sound margin lower bound so far.
    pub margins: Vec<Option<f64>>,
    /// Per epsilon: the last stage that ran.
    pub last_stage: Vec<Stage>,
    pub stage_seconds: BTreeMap<Stage, f64>,
}

/// One open (sample, epsilon) problem.
#[derive(Debug, Clone)]
pub(crate) struct Task {
    /// Position of the sample in the state list.
    pub slot: usize,
    /// Epsilon position in the sweep.
    pub k: usize,
    /// Ball ∩ input range.
    pub region: Region,
    /// Largest bound on the deployed arithmetic's error of a forbidden margin over the region (set by
    /// the bound stages; a search proof must exceed it).
    pub deployed_error: f64,
}

fn best(a: Option<f64>, b: f64) -> Option<f64> {
    if !b.is_finite() {
        return a;
    }
    Some(a.map_or(b, |a| a.max(b)))
}

/// Re-validates a candidate point and turns it into a record (`None` if it is not a counterexample):
/// the folded network's forward pass and the region check of [`crate::attack::validate`], then the
/// model evaluated as written in its deployed arithmetic, where a forbidden class must win by more
/// than the bound on that evaluation's error (so the answer changes both as deployed and exactly).
pub(crate) fn checked(
    context: &Context,
    region: &Region,
    label: usize,
    forbidden: &[usize],
    x: &[f64],
) -> Option<CounterexampleRecord> {
    let c = attack::validate(&context.network, region, label, forbidden, x)?;
    let raw = deployed::forward(context.model, x);
    let logits = if raw.len() == 1 {
        vec![0.0, raw[0]]
    } else {
        raw
    };
    let winner = predicted_class(&logits);
    if !forbidden.contains(&winner) {
        return None;
    }
    let errors = context.deployed.bound(x, x, &[]);
    let margin = logits[label] - logits[winner];
    if margin + DeployedError::margin_error(&errors, label, winner) >= 0.0 {
        return None;
    }
    Some(CounterexampleRecord {
        new_class: winner,
        distance: c.distance,
        features: c.input,
    })
}

fn share(states: &mut [SampleState], tasks: &[Task], stage: Stage, since: Instant) {
    if tasks.is_empty() {
        return;
    }
    let each = since.elapsed().as_secs_f64() / tasks.len() as f64;
    for t in tasks {
        *states[t.slot].stage_seconds.entry(stage).or_insert(0.0) += each;
        states[t.slot].last_stage[t.k] = stage;
    }
}

fn decide(states: &mut [SampleState], task: &Task, status: Status, stage: Stage) {
    let state = &mut states[task.slot];
    state.attempts[task.k] = Some(Attempt {
        status,
        stage,
        margin_lower: state.margins[task.k],
        counterexample: None,
    });
}

fn found(states: &mut [SampleState], task: &Task, stage: Stage, record: CounterexampleRecord) {
    let state = &mut states[task.slot];
    state.attempts[task.k] = Some(Attempt {
        status: Status::Counterexample,
        stage,
        margin_lower: state.margins[task.k],
        counterexample: Some(record),
    });
}

/// A counterexample of a smaller epsilon lies in this (larger) region too; re-validated.
pub(crate) fn reuse_stage(
    context: &Context,
    states: &mut [SampleState],
    tasks: Vec<Task>,
) -> Vec<Task> {
    let mut open = Vec::with_capacity(tasks.len());
    for task in tasks {
        let state = &states[task.slot];
        let earlier = (0..task.k).rev().find_map(|k| {
            state.attempts[k]
                .as_ref()
                .and_then(|a| a.counterexample.clone())
        });
        let reused = earlier.and_then(|c| {
            checked(
                context,
                &task.region,
                state.label,
                &state.forbidden,
                &c.features,
            )
        });
        match reused {
            Some(record) => found(states, &task, Stage::Reused, record),
            None => open.push(task),
        }
    }
    open
}

fn requests<'a>(states: &'a [SampleState], tasks: &'a [Task]) -> Vec<Request<'a>> {
    tasks
        .iter()
        .map(|t| Request {
            region: &t.region,
            label: states[t.slot].label,
            targets: &states[t.slot].forbidden,
            splits: None,
        })
        .collect()
}

/// Sound bounds by `method` for every task, in engine batches; certifies or finds counterexamples at
/// the bounds' minimisers.
pub(crate) fn bound_stage(
    context: &Context,
    states: &mut [SampleState],
    tasks: Vec<Task>,
    method: Method,
) -> Vec<Task> {
    if tasks.is_empty() {
        return tasks;
    }
    let start = Instant::now();
    let results: Vec<_> = {
        let all = requests(states, &tasks);
        let chunk = if method == Method::Interval {
            256
        } else {
            TASKS_PER_BATCH
        };
        all.par_chunks(chunk)
            .flat_map_iter(|c| {
                batch::margin_bounds(&context.engine, c, method, None, &SlopeSettings::default())
            })
            .collect()
    };
    // The bounds hold for the exact network; the deployed arithmetic's error is subtracted below so
    // that the margin kept is a bound on the margin the deployed model computes.
    let boxes: Vec<ErrorBox> = tasks
        .iter()
        .zip(&results)
        .map(|(task, bounds)| ErrorBox {
            lower: &task.region.outer_lower,
            upper: &task.region.outer_upper,
            hidden: &bounds.pre_activation,
        })
        .collect();
    let all_errors: Vec<Vec<f64>> = boxes
        .par_chunks(ERROR_BOXES_PER_BATCH)
        .flat_map_iter(|c| context.deployed.bound_many(c))
        .collect();
    let stage = stage_of(method);
    share(states, &tasks, stage, start);
    let mut open = Vec::new();
    for ((mut task, mut bounds), errors) in tasks.into_iter().zip(results).zip(all_errors) {
        let state = &mut states[task.slot];
        let mut largest: f64 = 0.0;
        for (t, &target) in state.forbidden.iter().enumerate() {
            let e = DeployedError::margin_error(&errors, state.label, target);
            bounds.lower[t] -= e;
            largest = largest.max(e);
        }
        // Each stage's value is a valid bound; later stages' tighter hidden bounds give smaller ones.
        task.deployed_error = task.deployed_error.min(largest);
        state.margins[task.k] = best(state.margins[task.k], bounds.worst());
        if bounds.certified() {
            decide(states, &task, Status::Certified, stage);
            continue;
        }
        let (label, forbidden) = (state.label, state.forbidden.clone());
        let record = bounds
            .minimisers
            .iter()
            .flatten()
            .find_map(|p| checked(context, &task.region, label, &forbidden, p));
        match record {
            Some(r) => found(states, &task, stage, r),
            None => open.push(task),
        }
    }
    open
}

/// The quick attack on every task at once.
pub(crate) fn attack_stage(
    context: &Context,
    states: &mut [SampleState],
    tasks: Vec<Task>,
) -> Result<Vec<Task>, CertifyError> {
    if tasks.is_empty() {
        return Ok(tasks);
    }
    let start = Instant::now();
    let settings = quick_attack_settings(context.options.seed);
    let problems: Vec<AttackProblem> = tasks
        .iter()
        .map(|t| AttackProblem {
            index: states[t.slot].index,
            region: t.region.clone(),
            label: states[t.slot].label,
            forbidden: states[t.slot].forbidden.clone(),
            extra_starts: Vec::new(),
        })
        .collect();
    let outcomes = attack::attack_batch(&context.network, &problems, &settings).map_err(|e| {
        CertifyError::Attack {
            index: problems[0].index,
            message: e.to_string(),
        }
    })?;
    share(states, &tasks, Stage::Attack, start);
    let mut open = Vec::new();
    for (task, outcome) in tasks.into_iter().zip(outcomes) {
        let state = &states[task.slot];
        let record = match outcome {
            AttackOutcome::Found(c) => checked(
                context,
                &task.region,
                state.label,
                &state.forbidden,
                &c.input,
            ),
            AttackOutcome::NotFound { .. } => None,
        };
        match record {
            Some(r) => found(states, &task, Stage::Attack, r),
            None => open.push(task),
        }
    }
    Ok(open)
}

/// Branch and bound on one sample's open tasks (ascending epsilon) within the per-task budget.
pub(crate) fn search_sample(
    context: &Context,
    state: &mut SampleState,
    tasks: Vec<Task>,
) -> Result<(), CertifyError> {
    for task in tasks {
        if state.attempts[task.k].is_some() {
            continue;
        }
        let t = Instant::now();
        let deadline = t + Duration::from_secs_f64(context.options.budget_seconds);
        let seed = attack::sample_seed(context.options.seed, state.index);
        let outcome = super::search_stage::run(
            &context.network,
            &task.region,
            state.label,
            &state.forbidden,
            deadline,
            seed,
            state.index,
        )?;
        *state.stage_seconds.entry(Stage::Search).or_insert(0.0) += t.elapsed().as_secs_f64();
        state.last_stage[task.k] = Stage::Search;
        let k = task.k;
        match outcome {
            super::search_stage::Found::Proved(proven)
                if proven - task.deployed_error > CERTIFY_TOLERANCE =>
            {
                let proven = proven - task.deployed_error;
                state.margins[k] = best(state.margins[k], proven);
                state.attempts[k] = Some(Attempt {
                    status: Status::Certified,
                    stage: Stage::Search,
                    margin_lower: state.margins[k],
                    counterexample: None,
                });
            }
            super::search_stage::Found::Counterexample(point) => {
                let record = checked(context, &task.region, state.label, &state.forbidden, &point);
                if let Some(r) = record {
                    state.attempts[k] = Some(Attempt {
                        status: Status::Counterexample,
                        stage: Stage::Search,
                        margin_lower: state.margins[k],
                        counterexample: Some(r),
                    });
                }
            }
            super::search_stage::Found::Proved(_) => {}
            super::search_stage::Found::Open(found) => {
                if let Some(found) = found {
                    state.margins[k] = best(state.margins[k], found - task.deployed_error);
                }
            }
        }
        propagate(state);
    }
    Ok(())
}

/// Certified at a larger epsilon ⇒ certified at every smaller one (the region is a subset).
pub(crate) fn propagate(state: &mut SampleState) {
    for k in (0..state.attempts.len().saturating_sub(1)).rev() {
        let larger = state.attempts[k + 1]
            .as_ref()
            .filter(|a| a.status == Status::Certified)
            .map(|a| a.margin_lower);
        if let (Some(m), None) = (larger, &state.attempts[k]) {
            state.attempts[k] = Some(Attempt {
                status: Status::Certified,
                stage: Stage::Reused,
                margin_lower: match m {
                    Some(m) => best(state.margins[k], m),
                    None => state.margins[k],
                },
                counterexample: None,
            });
        }
    }
}

/// The stage credited for a bounding method.
pub(crate) fn stage_of(method: Method) -> Stage {
    match method {
        Method::Interval => Stage::Interval,
        Method::Linear => Stage::Linear,
        Method::OptimisedLinear => Stage::OptimisedLinear,
    }
}

/// The quick attack: FGSM then one short PGD run and targeted runs (the strong search is branch and
/// bound, which also finds counterexamples).
fn quick_attack_settings(seed: u64) -> AttackSettings {
    AttackSettings {
        steps: 30,
        restarts: 2,
        seed,
        ..AttackSettings::default()
    }
}
