//! The loop that runs the trees of one sample ([`verify_sample`]) or of many in parallel
//! ([`verify_batch`]): it owns the deadline, the node limit, the root bound and attack, the order of
//! the forbidden classes and the final verdict. The trees themselves only take steps
//! ([`super::tree::TargetTree::step`]).
//!
//! One [`Engine`] is built per sample and shared by all its trees. Parallelism is rayon's work
//! stealing at two levels: samples of a batch, and the chunks of sub-domains and the leaf LPs inside
//! one sample's steps, so a single hard sample keeps every core busy once the easy ones are done.

use std::time::Instant;

use rayon::prelude::*;

use super::bounding::{self, Job, Margins, Settings};
use super::frontier::Node;
use super::tree::{Problem, Step, TargetTree};
use super::{
    SearchError, SearchOutcome, SearchProblem, SearchSettings, TargetSummary, UnresolvedReason,
    Verdict,
};
use crate::attack::{attack_sample, sample_seed, AttackOutcome, Counterexample};
use crate::bound::{validate, SplitState, CERTIFY_TOLERANCE};
use crate::engine::Engine;
use crate::model::Network;
use crate::threat::Region;

fn check_settings(settings: &SearchSettings) -> Result<(), SearchError> {
    if settings.node_limit == 0 {
        return Err(SearchError::Settings(
            "node limit must be at least 1".into(),
        ));
    }
    if settings.batch_size == 0 {
        return Err(SearchError::Settings(
            "batch size must be at least 1".into(),
        ));
    }
    if settings.frontier_memory == 0 {
        return Err(SearchError::Settings(
            "frontier memory must be at least 1 byte".into(),
        ));
    }
    if settings.slope_options.step.is_nan() || settings.slope_options.step < 0.0 {
        return Err(SearchError::Settings(format!(
            "slope step {} is not allowed, expected a number ≥ 0",
            settings.slope_options.step
        )));
    }
    if !(settings.optimality_gap >= 0.0 && settings.optimality_gap.is_finite()) {
        return Err(SearchError::Settings(format!(
            "optimality gap {} is not allowed, expected a finite number ≥ 0",
            settings.optimality_gap
        )));
    }
    if let Some(attack) = &settings.root_attack {
        attack.check()?;
    }
    Ok(())
}

/// Decides whether any input of `region` moves `network`'s answer for a sample of class `label` into
/// one of `targets` (see the module docs of [`crate::search`] for the guarantees). A 1-logit binary
/// network is searched in its two-logit classifier form. The sample's attack seed is `settings.seed`.
pub fn verify_sample(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    settings: &SearchSettings,
) -> Result<SearchOutcome, SearchError> {
    check_settings(settings)?;
    search(network, region, label, targets, settings, settings.seed)
}

/// [`verify_sample`] for every problem, in parallel over samples; problem `p` uses the attack seed
/// [`sample_seed`]`(settings.seed, p.index)`, so results do not depend on order or thread count (up to
/// the deadline).
pub fn verify_batch(
    network: &Network,
    problems: &[SearchProblem],
    settings: &SearchSettings,
) -> Vec<Result<SearchOutcome, SearchError>> {
    if let Err(error) = check_settings(settings) {
        return problems.iter().map(|_| Err(error.clone())).collect();
    }
    problems
        .par_iter()
        .map(|p| {
            search(
                network,
                &p.region,
                p.label,
                &p.targets,
                settings,
                sample_seed(settings.seed, p.index),
            )
        })
        .collect()
}

fn past(deadline: Option<Instant>) -> bool {
    deadline.is_some_and(|d| Instant::now() >= d)
}

fn search(
    network: &Network,
    region: &Region,
    label: usize,
    targets: &[usize],
    settings: &SearchSettings,
    seed: u64,
) -> Result<SearchOutcome, SearchError> {
    let start = Instant::now();
    let network = validate(network, region, label, targets, None)?.into_owned();
    let engine = Engine::new(&network);
    let root = bounding::bound(
        &engine,
        region,
        Margins { label, targets },
        &[Job {
            splits: None,
            given: None,
            warm: None,
        }],
        &Settings::of(
            settings,
            if settings.optimality {
                f64::INFINITY
            } else {
                CERTIFY_TOLERANCE
            },
        ),
    )
    .remove(0);
    let mut summaries: Vec<TargetSummary> = targets
        .iter()
        .enumerate()
        .map(|(t, &target)| TargetSummary {
            target,
            lower: root.lower[t],
            upper: f64::INFINITY,
            upper_point: None,
            finished: false,
            nodes: 1,
            leaves: 0,
        })
        .collect();
    let mut nodes = 1;
    let finish = |verdict: Verdict, summaries: Vec<TargetSummary>, nodes: usize| SearchOutcome {
        verdict,
        targets: summaries,
        nodes,
        seconds: start.elapsed().as_secs_f64(),
    };
    if targets.is_empty() || root.empty {
        // Nothing forbidden, or no input at all: nothing can change the answer.
        for s in &mut summaries {
            s.lower = f64::INFINITY;
            s.finished = true;
        }
        let verdict = Verdict::Proved {
            min_margin_lower: f64::INFINITY,
        };
        return Ok(finish(verdict, summaries, nodes));
    }
    let mut found: Option<Counterexample> = None;
    let mut best_attack_point: Option<Vec<f64>> = None;
    if let Some(attack) = &settings.root_attack {
        let mut attack = attack.clone();
        attack.deadline = settings.deadline;
        let starts: Vec<Vec<f64>> = root.minimisers.iter().flatten().cloned().collect();
        match attack_sample(&network, region, label, targets, &attack, seed, &starts)? {
            AttackOutcome::Found(c) => {
                best_attack_point = Some(c.input.clone());
                found = Some(c);
            }
            AttackOutcome::NotFound { best_input, .. } => best_attack_point = Some(best_input),
        }
    }
    if let (Some(c), false) = (&found, settings.optimality) {
        let verdict = Verdict::Counterexample(c.clone());
        return Ok(finish(verdict, summaries, nodes));
    }
    let problem = Problem {
        network: &network,
        engine: &engine,
        region,
        label,
        forbidden: targets,
        settings,
    };
    // Most dangerous class first.
    let mut order: Vec<usize> = (0..targets.len()).collect();
    order.sort_by(|a, b| root.lower[*a].total_cmp(&root.lower[*b]));
    let mut stopped: Option<UnresolvedReason> = None;
    let mut undecided: Option<usize> = None;
    for t in order {
        let target = targets[t];
        if !settings.optimality && root.lower[t] > CERTIFY_TOLERANCE {
            summaries[t].finished = true;
            continue;
        }
        if stopped.is_some() {
            continue;
        }
        let root_node = Node {
            splits: SplitState::free(&network),
            bounds: root.bounds.clone(),
            lower: root.lower[t],
            minimiser: root.minimisers[t].clone(),
            warm: root.warm[t].clone(),
        };
        let mut tree = TargetTree::new(problem, target, root_node);
        let mut points: Vec<Vec<f64>> = best_attack_point.iter().cloned().collect();
        points.extend(found.iter().map(|c| c.input.clone()));
        tree.consider(&points);
        let mut finished = !tree.has_open_nodes();
        while !finished {
            if tree.found.is_some() && !settings.optimality {
                break;
            }
            if past(settings.deadline) {
                stopped = Some(UnresolvedReason::Deadline);
                break;
            }
            let used = nodes + tree.nodes - 1;
            if used >= settings.node_limit {
                stopped = Some(UnresolvedReason::NodeLimit);
                break;
            }
            match tree.step(settings.node_limit - used)? {
                Step::Finished => finished = true,
                Step::Stopped(reason) => {
                    stopped = Some(reason);
                    break;
                }
                Step::Continue | Step::Found => {}
            }
        }
        nodes += tree.nodes - 1;
        let summary = &mut summaries[t];
        summary.lower = tree.lower();
        summary.upper = tree.incumbent;
        summary.upper_point = tree.incumbent_point.clone();
        summary.finished = finished;
        summary.nodes = tree.nodes;
        summary.leaves = tree.leaves;
        if tree.undecided && finished && undecided.is_none() {
            undecided = Some(target);
        }
        if found.is_none() {
            found = tree.found.take();
        }
        if found.is_some() && !settings.optimality {
            break;
        }
    }
    let best_lower = summaries
        .iter()
        .map(|s| s.lower)
        .fold(f64::INFINITY, f64::min);
    let verdict = if let Some(c) = found {
        Verdict::Counterexample(c)
    } else if let Some(reason) = stopped {
        Verdict::Unresolved { best_lower, reason }
    } else if best_lower > CERTIFY_TOLERANCE {
        Verdict::Proved {
            min_margin_lower: best_lower,
        }
    } else {
        let target = undecided.unwrap_or_else(|| {
            summaries
                .iter()
                .min_by(|a, b| a.lower.total_cmp(&b.lower))
                .map_or(targets[0], |s| s.target)
        });
        Verdict::Unresolved {
            best_lower,
            reason: UnresolvedReason::Undecided { target },
        }
    };
    Ok(finish(verdict, summaries, nodes))
}
