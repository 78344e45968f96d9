//! The per-sample pipeline: every sample goes through the stages cheapest first and stops at the first
//! that decides it.
//!
//! Order per sample and epsilon: clean forward pass (misclassified, or nothing forbidden) → interval
//! bounds (computed for all open samples at once in matrix form) → quick attack → linear → optimised
//! linear → LP → branch and bound within the time budget. Running the batched interval stage before
//! the attack changes only which stage is credited, never an outcome: a sample the interval bound
//! certifies has no counterexample to find. Each stage sees only what the previous ones left open.
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
use std::time::{Duration, Instant};

use rayon::prelude::*;

use super::report::{CounterexampleRecord, EpsilonOutcome, SampleRecord, Stage, Status};
use super::CertifyError;
use crate::attack::{self, AttackOutcome, AttackSettings};
use crate::bound::{self, Method, CERTIFY_TOLERANCE};
use crate::data::Dataset;
use crate::model::{predicted_class, Model, Network};
use crate::threat::requirement::Requirement;
use crate::threat::Region;

/// Receives progress while the pipeline runs (called from worker threads).
pub trait Observer: Sync {
    /// The run starts with `pending` samples to decide out of `total` (the rest come from a journal).
    fn begin(&self, _total: usize, _pending: usize) {}
    /// A sample is finished.
    fn sample_done(&self, _record: &SampleRecord) {}
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
        if self.attack {
            stages.push(Stage::Attack);
        }
        stages.extend(self.methods.iter().map(|m| stage_of(*m)));
        if self.budget_seconds > 0.0 {
            stages.push(Stage::Search);
        }
        stages
    }
}

fn stage_of(method: Method) -> Stage {
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

struct Context<'a> {
    network: Network,
    model: &'a Model,
    data: &'a Dataset,
    requirement: &'a Requirement,
    options: &'a PipelineOptions,
}

/// Receives each finished sample (e.g. to append it to a journal).
pub type RecordSink<'a> = dyn FnMut(&SampleRecord) -> std::io::Result<()> + Send + 'a;

/// Decides every sample of `indices` (row indices of `data`) and returns their records in the order
/// given. `sink` is called once per finished sample (under a lock, from worker threads), e.g. to append
/// to a journal; `cancel` stops the run before the next sample starts (finished samples are kept,
/// unstarted ones are left out of the result).
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
    let context = Context {
        network: model.classifier(),
        model,
        data,
        requirement,
        options,
    };
    let interval = batch_interval(&context, indices)?;
    let results: Vec<Option<Result<SampleRecord, CertifyError>>> = indices
        .par_iter()
        .zip(interval.par_iter())
        .map(|(&index, interval)| {
            if cancel.load(Ordering::SeqCst) {
                return None;
            }
            let record = decide_sample(&context, index, interval);
            if let Ok(r) = &record {
                let mut guard = sink.lock().unwrap_or_else(|e| e.into_inner());
                if let Err(e) = (*guard)(r) {
                    return Some(Err(CertifyError::Journal(e.to_string())));
                }
                drop(guard);
                observer.sample_done(r);
            }
            Some(record)
        })
        .collect();
    let mut records = Vec::with_capacity(results.len());
    for r in results.into_iter().flatten() {
        records.push(r?);
    }
    Ok(records)
}

/// Interval results per sample and epsilon: `Some(margin)` when the stage ran (the sample was correct
/// with something forbidden), with the seconds spent (the batch time shared equally).
struct IntervalResult {
    margins: Vec<Option<f64>>,
    seconds: f64,
}

fn batch_interval(
    context: &Context,
    indices: &[usize],
) -> Result<Vec<IntervalResult>, CertifyError> {
    let model = context.model;
    let classes = context.network.output_dim();
    let dim = model.input.dim;
    let mut open = Vec::new();
    for &i in indices {
        let x = context.data.sample(i);
        let label = context.data.labels[i];
        let logits: Vec<f64> = context.network.forward(x).iter().copied().collect();
        let forbidden = context.requirement.targets.forbidden_for(label, classes);
        if predicted_class(&logits) == label && !forbidden.is_empty() {
            open.push((i, forbidden));
        }
    }
    let mut out: Vec<IntervalResult> = indices
        .iter()
        .map(|_| IntervalResult {
            margins: vec![None; context.requirement.epsilons.len()],
            seconds: 0.0,
        })
        .collect();
    if open.is_empty() {
        return Ok(out);
    }
    let position: std::collections::HashMap<usize, usize> =
        indices.iter().enumerate().map(|(p, &i)| (i, p)).collect();
    for (k, &eps) in context.requirement.epsilons.iter().enumerate() {
        let budget = context.requirement.budget(eps, dim);
        let start = Instant::now();
        // Chunks keep the matrices small and let rayon share the work.
        let chunks: Vec<Result<Vec<f64>, CertifyError>> = open
            .par_chunks(256)
            .map(|chunk| {
                let regions: Vec<Region> = chunk
                    .iter()
                    .map(|(i, _)| {
                        budget.region(
                            context.data.sample(*i),
                            &model.input.lower,
                            &model.input.upper,
                        )
                    })
                    .collect();
                let labels: Vec<usize> =
                    chunk.iter().map(|(i, _)| context.data.labels[*i]).collect();
                let targets: Vec<Vec<usize>> = chunk.iter().map(|(_, f)| f.clone()).collect();
                let bounds = bound::interval::batch_margin_lower_bounds(
                    &context.network,
                    &regions,
                    &labels,
                    &targets,
                )
                .map_err(|e| CertifyError::Bound {
                    index: chunk[0].0,
                    message: e.to_string(),
                })?;
                Ok(bounds
                    .margins
                    .iter()
                    .map(|m| m.iter().copied().fold(f64::INFINITY, f64::min))
                    .collect())
            })
            .collect();
        let share = start.elapsed().as_secs_f64() / open.len() as f64;
        let mut flat = Vec::with_capacity(open.len());
        for c in chunks {
            flat.extend(c?);
        }
        for ((i, _), margin) in open.iter().zip(flat) {
            let slot = &mut out[position[i]];
            slot.margins[k] = Some(margin);
            slot.seconds += share;
        }
    }
    Ok(out)
}

/// The running record of one sample at one epsilon.
struct Attempt {
    status: Status,
    stage: Stage,
    margin_lower: Option<f64>,
    counterexample: Option<CounterexampleRecord>,
}

fn decide_sample(
    context: &Context,
    index: usize,
    interval: &IntervalResult,
) -> Result<SampleRecord, CertifyError> {
    let start = Instant::now();
    let model = context.model;
    let requirement = context.requirement;
    let network = &context.network;
    let x = context.data.sample(index);
    let label = context.data.labels[index];
    let logits: Vec<f64> = network.forward(x).iter().copied().collect();
    let predicted = predicted_class(&logits);
    let forbidden = requirement
        .targets
        .forbidden_for(label, network.output_dim());
    let mut stage_seconds = std::collections::BTreeMap::new();
    let epsilons = &requirement.epsilons;
    let mut outcomes: Vec<Attempt> = Vec::with_capacity(epsilons.len());
    if predicted != label || forbidden.is_empty() {
        let status = if predicted != label {
            Status::Misclassified
        } else {
            Status::Certified
        };
        for _ in epsilons {
            outcomes.push(Attempt {
                status,
                stage: Stage::Clean,
                margin_lower: None,
                counterexample: None,
            });
        }
    } else {
        *stage_seconds.entry(Stage::Interval).or_insert(0.0) += interval.seconds;
        let mut earlier: Option<CounterexampleRecord> = None;
        for (k, &eps) in epsilons.iter().enumerate() {
            let region = requirement.budget(eps, model.input.dim).region(
                x,
                &model.input.lower,
                &model.input.upper,
            );
            // A counterexample of a smaller epsilon lies in this (larger) region too; re-validated.
            let reused = earlier
                .as_ref()
                .and_then(|c| checked(network, &region, label, &forbidden, &c.features));
            let attempt = match reused {
                Some(c) => Attempt {
                    status: Status::Counterexample,
                    stage: Stage::Reused,
                    margin_lower: None,
                    counterexample: Some(c),
                },
                None => decide_region(
                    context,
                    index,
                    &region,
                    label,
                    &forbidden,
                    interval.margins[k],
                    &mut stage_seconds,
                )?,
            };
            if attempt.counterexample.is_some() {
                earlier = attempt.counterexample.clone();
            }
            outcomes.push(attempt);
        }
        // Certified at a larger epsilon ⇒ certified at every smaller one (the region is a subset).
        for k in (0..outcomes.len().saturating_sub(1)).rev() {
            if outcomes[k + 1].status == Status::Certified
                && outcomes[k].status == Status::Unresolved
            {
                outcomes[k].status = Status::Certified;
                outcomes[k].stage = Stage::Reused;
                if let Some(m) = outcomes[k + 1].margin_lower {
                    outcomes[k].margin_lower = best(outcomes[k].margin_lower, m);
                }
            }
        }
    }
    let radius = if context.options.radius && predicted == label && !forbidden.is_empty() {
        Some(certified_radius(context, x, label, &forbidden, &outcomes)?)
    } else {
        None
    };
    let last = outcomes.last().expect("at least one epsilon");
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
    Ok(SampleRecord {
        index,
        label,
        predicted,
        status: last.status,
        margin_lower: last.margin_lower,
        stage: last.stage,
        seconds: start.elapsed().as_secs_f64() + interval.seconds,
        counterexample: last.counterexample.clone(),
        radius,
        stage_seconds,
        sweep,
    })
}

/// Re-validates a candidate point and turns it into a record (`None` if it is not a counterexample).
fn checked(
    network: &Network,
    region: &Region,
    label: usize,
    forbidden: &[usize],
    x: &[f64],
) -> Option<CounterexampleRecord> {
    attack::validate(network, region, label, forbidden, x).map(|c| CounterexampleRecord {
        new_class: c.predicted,
        distance: c.distance,
        features: c.input,
    })
}

fn best(a: Option<f64>, b: f64) -> Option<f64> {
    if !b.is_finite() {
        return a;
    }
    Some(a.map_or(b, |a| a.max(b)))
}

fn add_time(
    stage_seconds: &mut std::collections::BTreeMap<Stage, f64>,
    stage: Stage,
    since: Instant,
) {
    *stage_seconds.entry(stage).or_insert(0.0) += since.elapsed().as_secs_f64();
}

#[allow(clippy::too_many_arguments)]
fn decide_region(
    context: &Context,
    index: usize,
    region: &Region,
    label: usize,
    forbidden: &[usize],
    interval_margin: Option<f64>,
    stage_seconds: &mut std::collections::BTreeMap<Stage, f64>,
) -> Result<Attempt, CertifyError> {
    let network = &context.network;
    let options = context.options;
    let mut margin = None;
    if let Some(m) = interval_margin {
        margin = best(margin, m);
        if m > CERTIFY_TOLERANCE {
            return Ok(Attempt {
                status: Status::Certified,
                stage: Stage::Interval,
                margin_lower: margin,
                counterexample: None,
            });
        }
    }
    let mut last = Stage::Interval;
    if options.attack {
        let t = Instant::now();
        let settings = quick_attack_settings(options.seed);
        let seed = attack::sample_seed(options.seed, index);
        let outcome =
            attack::attack_sample(network, region, label, forbidden, &settings, seed, &[])
                .map_err(|e| CertifyError::Attack {
                    index,
                    message: e.to_string(),
                })?;
        add_time(stage_seconds, Stage::Attack, t);
        last = Stage::Attack;
        if let AttackOutcome::Found(c) = outcome {
            if let Some(record) = checked(network, region, label, forbidden, &c.input) {
                return Ok(Attempt {
                    status: Status::Counterexample,
                    stage: Stage::Attack,
                    margin_lower: margin,
                    counterexample: Some(record),
                });
            }
        }
    }
    for &method in &options.methods {
        let stage = stage_of(method);
        let t = Instant::now();
        let result = bound::margin_lower_bounds(network, region, label, forbidden, method, None);
        add_time(stage_seconds, stage, t);
        last = stage;
        let bounds = match result {
            Ok(b) => b,
            // A solver that fails proves nothing; the next stage gets the sample.
            Err(bound::BoundError::Solver { .. }) => continue,
            Err(e) => {
                return Err(CertifyError::Bound {
                    index,
                    message: e.to_string(),
                })
            }
        };
        margin = best(margin, bounds.worst());
        if bounds.certified() {
            return Ok(Attempt {
                status: Status::Certified,
                stage,
                margin_lower: margin,
                counterexample: None,
            });
        }
        // The points that minimise the relaxation are cheap candidates for a counterexample.
        for point in bounds.minimisers.iter().flatten() {
            if let Some(record) = checked(network, region, label, forbidden, point) {
                return Ok(Attempt {
                    status: Status::Counterexample,
                    stage,
                    margin_lower: margin,
                    counterexample: Some(record),
                });
            }
        }
    }
    if options.budget_seconds > 0.0 {
        let t = Instant::now();
        let deadline = t + Duration::from_secs_f64(options.budget_seconds);
        let seed = attack::sample_seed(options.seed, index);
        let found =
            super::search_stage::run(network, region, label, forbidden, deadline, seed, index)?;
        add_time(stage_seconds, Stage::Search, t);
        last = Stage::Search;
        match found {
            super::search_stage::Found::Proved(proven) => {
                return Ok(Attempt {
                    status: Status::Certified,
                    stage: Stage::Search,
                    margin_lower: best(margin, proven),
                    counterexample: None,
                })
            }
            super::search_stage::Found::Counterexample(point) => {
                if let Some(record) = checked(network, region, label, forbidden, &point) {
                    return Ok(Attempt {
                        status: Status::Counterexample,
                        stage: Stage::Search,
                        margin_lower: margin,
                        counterexample: Some(record),
                    });
                }
            }
            super::search_stage::Found::Open(found) => {
                if let Some(found) = found {
                    margin = best(margin, found);
                }
            }
        }
    }
    Ok(Attempt {
        status: Status::Unresolved,
        stage: last,
        margin_lower: margin,
        counterexample: None,
    })
}

/// True when the sound bounds (interval, then the configured linear methods except LP) certify the
/// region at `scale`.
fn bounds_certify(
    context: &Context,
    x: &[f64],
    label: usize,
    forbidden: &[usize],
    scale: f64,
) -> Result<bool, CertifyError> {
    let model = context.model;
    let region = context.requirement.budget(scale, model.input.dim).region(
        x,
        &model.input.lower,
        &model.input.upper,
    );
    let mut methods = vec![Method::Interval];
    methods.extend(context.options.methods.iter().copied());
    for method in methods {
        match bound::margin_lower_bounds(&context.network, &region, label, forbidden, method, None)
        {
            Ok(b) if b.certified() => return Ok(true),
            Ok(_) | Err(bound::BoundError::Solver { .. }) => {}
            Err(e) => {
                return Err(CertifyError::Bound {
                    index: usize::MAX,
                    message: e.to_string(),
                })
            }
        }
    }
    Ok(false)
}

/// Bisection steps of the radius search.
const RADIUS_STEPS: usize = 12;

/// Largest scale proven by the sound bounds (a lower bound on the robust radius, in epsilon units):
/// starts from the largest epsilon already certified, stops below the smallest with a counterexample,
/// otherwise doubles until the bounds fail, then bisects.
fn certified_radius(
    context: &Context,
    x: &[f64],
    label: usize,
    forbidden: &[usize],
    outcomes: &[Attempt],
) -> Result<f64, CertifyError> {
    let epsilons = &context.requirement.epsilons;
    let mut low = 0.0;
    let mut high: Option<f64> = None;
    for (o, &eps) in outcomes.iter().zip(epsilons) {
        match o.status {
            Status::Certified => low = eps,
            Status::Counterexample if high.is_none() => high = Some(eps),
            _ => {}
        }
    }
    if low == 0.0 && !bounds_certify(context, x, label, forbidden, 0.0)? {
        return Ok(0.0);
    }
    let mut high = match high {
        Some(h) => h,
        None => {
            let mut h = if low > 0.0 {
                low * 2.0
            } else {
                context.requirement.epsilon().max(1e-3)
            };
            let mut doublings = 0;
            while doublings < 10 && bounds_certify(context, x, label, forbidden, h)? {
                low = h;
                h *= 2.0;
                doublings += 1;
            }
            h
        }
    };
    for _ in 0..RADIUS_STEPS {
        let middle = 0.5 * (low + high);
        if bounds_certify(context, x, label, forbidden, middle)? {
            low = middle;
        } else {
            high = middle;
        }
    }
    Ok(low)
}
