//! The pipeline: every (sample, epsilon) task goes through the stages cheapest first and stops at the
//! first that decides it. Each stage runs on all open tasks at once (`certify::stages`): the bounds as
//! engine batches (matrix products over many sub-problems), the attack as one batch.
//!
//! Order per epsilon (ascending): clean forward pass (misclassified, or nothing forbidden) → a smaller
//! epsilon's counterexample, re-validated → interval bounds → linear → quick attack → optimised
//! linear; then certificates of a larger epsilon carry over to smaller ones; then branch and bound
//! within the time budget, per sample in parallel. Running bounds before the attack changes only which
//! stage is credited, never an outcome: a task a sound bound certifies has no counterexample to find;
//! it spares the attack (the dearest stage on wide networks) the samples the bounds settle.
//!
//! Guarantees: a sample is `certified` only on a sound bound above the tolerance
//! [`crate::bound::CERTIFY_TOLERANCE`] or a completed proof; every counterexample — whatever produced it
//! (attack, a bound's minimiser, search, or a smaller epsilon of the sweep) — is re-checked here by
//! [`crate::attack::validate`] (plain forward pass, inside the region, forbidden class) before it is
//! recorded; a search that runs out of time gives `unresolved`. Results are independent of the thread
//! count: every random choice is seeded per sample. The pipeline never prints; progress goes to an
//! [`Observer`].

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;
use std::time::Instant;

use rayon::prelude::*;

use super::radius::certified_radius;
use super::report::{EpsilonOutcome, SampleRecord, Stage, Status};
use super::stages::{self, Attempt, SampleState, Task};
use super::CertifyError;
use crate::bound::Method;
use crate::data::Dataset;
use crate::engine::Engine;
use crate::model::deployed::DeployedError;
use crate::model::{predicted_class, Model, Network};
use crate::threat::requirement::Requirement;

/// Receives progress while the pipeline runs (called from worker threads).
pub trait Observer: Sync {
    /// The run starts with `pending` samples to decide out of `total` (the rest come from a journal).
    fn begin(&self, _total: usize, _pending: usize) {}
    /// A sample is finished.
    fn sample_done(&self, _record: &SampleRecord) {}
    /// Branch and bound starts on `samples` samples (every other sample is finished), each given at
    /// most `seconds_each` of search.
    fn search_started(&self, _samples: usize, _seconds_each: f64) {}
    /// The run is over (finished or interrupted).
    fn end(&self) {}
}

/// An observer that does nothing.
#[derive(Debug, Clone, Copy, Default)]
pub struct Silent;

impl Observer for Silent {}

/// How much work the pipeline may do.
#[derive(Debug, Clone, PartialEq)]
pub struct PipelineOptions {
    /// Seconds of branch and bound per sample and epsilon (0 = bounds only; undecided samples are
    /// `unresolved`).
    pub budget_seconds: f64,
    /// Seed of the attacks (each sample derives its own stream from it and its index).
    pub seed: u64,
    /// Also compute each sample's certified radius (largest epsilon scale proven by the sound bounds).
    pub radius: bool,
    /// Bounding methods after the batched interval stage, in order.
    pub methods: Vec<Method>,
    /// Run the quick attack.
    pub attack: bool,
}

impl Default for PipelineOptions {
    /// Bounds only, seed 0, no radius, every method, with the quick attack.
    fn default() -> Self {
        PipelineOptions {
            budget_seconds: 0.0,
            seed: 0,
            radius: false,
            methods: vec![Method::Linear, Method::OptimisedLinear],
            attack: true,
        }
    }
}

impl PipelineOptions {
    /// The stages in the order they run, for the report.
    pub fn stages(&self) -> Vec<Stage> {
        let mut stages = vec![Stage::Clean, Stage::Interval];
        for (position, m) in self.methods.iter().enumerate() {
            if position == 1 && self.attack {
                stages.push(Stage::Attack);
            }
            stages.push(stages::stage_of(*m));
        }
        if self.methods.len() < 2 && self.attack {
            stages.push(Stage::Attack);
        }
        if self.budget_seconds > 0.0 {
            stages.push(Stage::Search);
        }
        stages
    }
}

/// What every stage works with.
pub(crate) struct Context<'a> {
    pub(crate) network: Network,
    pub(crate) engine: Engine,
    pub(crate) deployed: DeployedError,
    pub(crate) model: &'a Model,
    pub(crate) data: &'a Dataset,
    pub(crate) requirement: &'a Requirement,
    pub(crate) options: &'a PipelineOptions,
}

/// Receives each finished sample (e.g. to append it to a journal).
pub type RecordSink<'a> = dyn FnMut(&SampleRecord) -> std::io::Result<()> + Send + 'a;

/// Decides every sample of `indices` (row indices of `data`) and returns their records in the order
/// given. `sink` is called once per finished sample (under a lock, from worker threads), e.g. to append
/// to a journal; `cancel` stops the run before the next stage or search starts (finished samples are
/// kept, unfinished ones are left out of the result).
#[allow(clippy::too_many_arguments)]
pub fn run(
    model: &Model,
    data: &Dataset,
    requirement: &Requirement,
    options: &PipelineOptions,
    indices: &[usize],
    observer: &dyn Observer,
    cancel: &AtomicBool,
    sink: &Mutex<RecordSink<'_>>,
) -> Result<Vec<SampleRecord>, CertifyError> {
    let network = model.classifier();
    let context = Context {
        engine: Engine::new(&network),
        deployed: DeployedError::new(model),
        network,
        model,
        data,
        requirement,
        options,
    };
    let started = Instant::now();
    let mut states = initial_states(&context, indices);
    let mut finished: Vec<Option<SampleRecord>> = vec![None; states.len()];
    let emit = |state: &SampleState, seconds: f64| -> Result<SampleRecord, CertifyError> {
        let record = record_of(&context, state, seconds)?;
        let mut guard = sink.lock().unwrap_or_else(|e| e.into_inner());
        (*guard)(&record).map_err(|e| CertifyError::Journal(e.to_string()))?;
        drop(guard);
        observer.sample_done(&record);
        Ok(record)
    };
    // Bound stages, epsilon by epsilon (ascending), on all open tasks at once.
    let mut searching: Vec<Task> = Vec::new();
    for (k, &eps) in requirement.epsilons.iter().enumerate() {
        if cancel.load(Ordering::SeqCst) {
            break;
        }
        let budget = requirement.budget(eps, model.input.dim);
        let tasks: Vec<Task> = states
            .iter()
            .enumerate()
            .filter(|(_, s)| s.attempts[k].is_none())
            .map(|(slot, s)| Task {
                slot,
                k,
                region: budget.region(data.sample(s.index), &model.input.lower, &model.input.upper),
                deployed_error: f64::INFINITY,
            })
            .collect();
        let mut tasks = stages::reuse_stage(&context, &mut states, tasks);
        tasks = stages::bound_stage(&context, &mut states, tasks, Method::Interval);
        // The first linear method before the attack: on wide networks it is cheaper than attacking
        // every sample, and what it certifies has no counterexample to find.
        for (position, &method) in options.methods.iter().enumerate() {
            if position == 1 && options.attack && !cancel.load(Ordering::SeqCst) {
                tasks = stages::attack_stage(&context, &mut states, tasks)?;
            }
            if cancel.load(Ordering::SeqCst) {
                break;
            }
            tasks = stages::bound_stage(&context, &mut states, tasks, method);
        }
        if options.methods.len() < 2 && options.attack && !cancel.load(Ordering::SeqCst) {
            tasks = stages::attack_stage(&context, &mut states, tasks)?;
        }
        searching.extend(tasks);
        // Samples decided at every epsilon are finished: record them now, so an interruption later
        // loses none of them.
        let share = started.elapsed().as_secs_f64() / states.len().max(1) as f64;
        emit_finished(
            &states,
            &mut finished,
            cancel,
            |state| state.attempts.iter().all(Option::is_some),
            &|state| emit(state, share),
        )?;
    }
    for state in states.iter_mut() {
        stages::propagate(state);
    }
    let bounds_share = started.elapsed().as_secs_f64() / states.len().max(1) as f64;
    let search = options.budget_seconds > 0.0;
    let mut by_sample: Vec<Vec<Task>> = vec![Vec::new(); states.len()];
    for task in searching {
        if states[task.slot].attempts[task.k].is_none() {
            by_sample[task.slot].push(task);
        }
    }
    let bounds_done = !cancel.load(Ordering::SeqCst);
    if bounds_done {
        let waiting: Vec<bool> = by_sample.iter().map(|t| search && !t.is_empty()).collect();
        let position: std::collections::HashMap<usize, usize> = states
            .iter()
            .enumerate()
            .map(|(slot, s)| (s.index, slot))
            .collect();
        emit_finished(
            &states,
            &mut finished,
            cancel,
            |state| !waiting[position[&state.index]],
            &|state| emit(state, bounds_share),
        )?;
    }
    if search && bounds_done {
        let open: Vec<usize> = states
            .iter()
            .zip(&by_sample)
            .filter(|(state, tasks)| {
                !tasks.is_empty() && !state.attempts.iter().all(Option::is_some)
            })
            .map(|(_, tasks)| tasks.len())
            .collect();
        let most = open.iter().copied().max().unwrap_or(0);
        observer.search_started(open.len(), options.budget_seconds * most as f64);
        let searched: Vec<Option<Result<SampleRecord, CertifyError>>> = states
            .par_iter_mut()
            .zip(by_sample.into_par_iter())
            .map(|(state, tasks)| {
                if tasks.is_empty() || cancel.load(Ordering::SeqCst) {
                    return None;
                }
                if state.attempts.iter().all(Option::is_some) {
                    return None;
                }
                let t = Instant::now();
                if let Err(e) = stages::search_sample(&context, state, tasks) {
                    return Some(Err(e));
                }
                Some(emit(state, bounds_share + t.elapsed().as_secs_f64()))
            })
            .collect();
        for (slot, r) in searched.into_iter().enumerate() {
            if let Some(r) = r {
                finished[slot] = Some(r?);
            }
        }
    }
    Ok(finished.into_iter().flatten().collect())
}

/// Records, in parallel, every sample not yet recorded that `ready` accepts; stops starting new ones
/// once `cancel` is set.
fn emit_finished(
    states: &[SampleState],
    finished: &mut [Option<SampleRecord>],
    cancel: &AtomicBool,
    ready: impl Fn(&SampleState) -> bool + Sync,
    emit: &(dyn Fn(&SampleState) -> Result<SampleRecord, CertifyError> + Sync),
) -> Result<(), CertifyError> {
    let records: Vec<Option<Result<SampleRecord, CertifyError>>> = states
        .par_iter()
        .zip(finished.par_iter())
        .map(|(state, done)| {
            if done.is_some() || !ready(state) || cancel.load(Ordering::SeqCst) {
                return None;
            }
            Some(emit(state))
        })
        .collect();
    for (slot, record) in records.into_iter().enumerate() {
        if let Some(r) = record {
            finished[slot] = Some(r?);
        }
    }
    Ok(())
}

/// Clean pass: misclassified samples and samples with nothing forbidden are decided at once; the rest
/// are open at every epsilon.
fn initial_states(context: &Context, indices: &[usize]) -> Vec<SampleState> {
    let epsilons = context.requirement.epsilons.len();
    indices
        .iter()
        .map(|&index| {
            let x = context.data.sample(index);
            let label = context.data.labels[index];
            let logits: Vec<f64> = context.network.forward(x).iter().copied().collect();
            let predicted = predicted_class(&logits);
            let forbidden = context
                .requirement
                .targets
                .forbidden_for(label, context.network.output_dim());
            let decided = if predicted != label {
                Some(Status::Misclassified)
            } else if forbidden.is_empty() {
                Some(Status::Certified)
            } else {
                None
            };
            let attempt = decided.map(|status| Attempt {
                status,
                stage: Stage::Clean,
                margin_lower: None,
                counterexample: None,
            });
            SampleState {
                index,
                label,
                predicted,
                forbidden,
                attempts: vec![attempt; epsilons],
                margins: vec![None; epsilons],
                last_stage: vec![Stage::Interval; epsilons],
                stage_seconds: Default::default(),
            }
        })
        .collect()
}

/// The report record of a finished sample (undecided tasks are `unresolved`).
fn record_of(
    context: &Context,
    state: &SampleState,
    seconds: f64,
) -> Result<SampleRecord, CertifyError> {
    let outcomes: Vec<Attempt> = state
        .attempts
        .iter()
        .enumerate()
        .map(|(k, a)| {
            a.clone().unwrap_or(Attempt {
                status: Status::Unresolved,
                stage: state.last_stage[k],
                margin_lower: state.margins[k],
                counterexample: None,
            })
        })
        .collect();
    let open = state.predicted == state.label && !state.forbidden.is_empty();
    let radius = if context.options.radius && open {
        let statuses: Vec<Status> = outcomes.iter().map(|o| o.status).collect();
        let x = context.data.sample(state.index);
        Some(certified_radius(
            context,
            x,
            state.label,
            &state.forbidden,
            &statuses,
        )?)
    } else {
        None
    };
    let epsilons = &context.requirement.epsilons;
    let sweep = if epsilons.len() > 1 {
        outcomes
            .iter()
            .zip(epsilons)
            .map(|(o, &epsilon)| EpsilonOutcome {
                epsilon,
                status: o.status,
                stage: o.stage,
                margin_lower: o.margin_lower,
                counterexample: o.counterexample.clone(),
            })
            .collect()
    } else {
        Vec::new()
    };
    let last = outcomes.last().expect("at least one epsilon");
    Ok(SampleRecord {
        index: state.index,
        label: state.label,
        predicted: state.predicted,
        status: last.status,
        margin_lower: last.margin_lower,
        stage: last.stage,
        seconds,
        counterexample: last.counterexample.clone(),
        radius,
        stage_seconds: state.stage_seconds.clone(),
        sweep,
    })
}
