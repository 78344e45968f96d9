//! The loop that runs the trees of one sample ([`verify_sample`]) or of many in parallel
//! ([`verify_batch`]): it owns the deadline, the node limit, the root bound and attack, the order of
//! the forbidden classes and the final verdict. The trees themselves only take steps
//! ([`super::tree::TargetTree::step`]).
//!
//! One [`Engine`] is built per sample and shared by all its trees. Parallelism is rayon's work
//! stealing: samples of a batch; in the decision mode the root attack beside the trees (they do not
//! depend on it; its counterexample halts them and is the one reported, so the verdict does not depend
//! on the thread count); and inside the trees' steps (see [`super::tree`]). The optimality mode runs
//! the attack first, since its trees prune against the attack's best margin.

use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use rayon::prelude::*;

use super::bounding::{self, Bounded, Job, Margins, Settings};
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
    let problem = Problem {
        network: &network,
        engine: &engine,
        region,
        label,
        forbidden: targets,
        settings,
    };
    let attack = || -> Result<RootAttack, SearchError> {
        let Some(attack) = &settings.root_attack else {
            return Ok(RootAttack::default());
        };
        let mut attack = attack.clone();
        attack.deadline = settings.deadline;
        let starts: Vec<Vec<f64>> = root.minimisers.iter().flatten().cloned().collect();
        Ok(
            match attack_sample(&network, region, label, targets, &attack, seed, &starts)? {
                AttackOutcome::Found(c) => RootAttack {
                    best: Some(c.input.clone()),
                    found: Some(c),
                },
                AttackOutcome::NotFound { best_input, .. } => RootAttack {
                    best: Some(best_input),
                    found: None,
                },
            },
        )
    };
    let halt = AtomicBool::new(false);
    let (attack, trees) = if settings.optimality || settings.root_attack.is_none() {
        // The optimality mode prunes against the attack's best margin: attack first, then the trees.
        let attack = attack()?;
        let points: Vec<Vec<f64>> = attack.points().cloned().collect();
        let mut searched = summaries.clone();
        let trees = run_trees(problem, &root, &mut searched, &points, &halt);
        (attack, trees.map(|t| (t, searched)))
    } else {
        // The decision mode's trees do not depend on the attack, so both start at once (rayon::join:
        // an idle core takes the trees; on one thread the attack runs first, as in the optimality
        // mode). A counterexample from the attack halts the trees and is the one reported, so the
        // verdict and the point do not depend on the thread count.
        let (attack, trees) = rayon::join(
            || {
                let attack = attack();
                if matches!(&attack, Ok(RootAttack { found: Some(_), .. })) {
                    halt.store(true, Ordering::Relaxed);
                }
                attack
            },
            || {
                let mut searched = summaries.clone();
                run_trees(problem, &root, &mut searched, &[], &halt).map(|t| (t, searched))
            },
        );
        let attack = attack?;
        let trees = trees.map(|(t, mut searched)| {
            let points: Vec<Vec<f64>> = attack.points().cloned().collect();
            note_points(&network, label, &mut searched, &t.searched, &points);
            (t, searched)
        });
        (attack, trees)
    };
    if let (Some(c), false) = (&attack.found, settings.optimality) {
        // Trees halted by the attack still hold sound bounds; a tree error after a counterexample
        // changes nothing.
        if let Ok((trees, searched)) = trees {
            summaries = searched;
            nodes += trees.nodes;
        }
        let verdict = Verdict::Counterexample(c.clone());
        return Ok(finish(verdict, summaries, nodes));
    }
    let (trees, searched) = trees?;
    summaries = searched;
    nodes += trees.nodes;
    let found = attack.found.or(trees.found);
    let (stopped, undecided) = (trees.stopped, trees.undecided);
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

/// What the root attack left: a validated counterexample and the best point it reached.
#[derive(Debug, Default)]
struct RootAttack {
    found: Option<Counterexample>,
    best: Option<Vec<f64>>,
}

impl RootAttack {
    /// The points the trees check (the best point, then the counterexample).
    fn points(&self) -> impl Iterator<Item = &Vec<f64>> {
        self.best.iter().chain(self.found.iter().map(|c| &c.input))
    }
}

/// What the trees of one sample left.
#[derive(Debug)]
struct Trees {
    /// Sub-domains bounded beyond the root.
    nodes: usize,
    /// Why the trees stopped early (deadline, node limit, memory cap).
    stopped: Option<UnresolvedReason>,
    /// The first target whose finished tree kept an undecided leaf.
    undecided: Option<usize>,
    /// A validated counterexample found in a tree.
    found: Option<Counterexample>,
    /// Positions (in the target order) of the classes that got a tree.
    searched: Vec<usize>,
}

/// Runs one tree per forbidden class not proved at the root, most dangerous class first, until every
/// tree is finished, a counterexample is found, a budget stops the search or `halt` is set (checked
/// before each step). `points` (region points already seen) are checked by every tree first; each
/// tree's results go into its class's summary.
fn run_trees(
    problem: Problem,
    root: &Bounded,
    summaries: &mut [TargetSummary],
    points: &[Vec<f64>],
    halt: &AtomicBool,
) -> Result<Trees, SearchError> {
    let settings = problem.settings;
    let targets = problem.forbidden;
    let mut trees = Trees {
        nodes: 0,
        stopped: None,
        undecided: None,
        found: None,
        searched: Vec::new(),
    };
    // Most dangerous class first.
    let mut order: Vec<usize> = (0..targets.len()).collect();
    order.sort_by(|a, b| root.lower[*a].total_cmp(&root.lower[*b]));
    for t in order {
        let target = targets[t];
        if !settings.optimality && root.lower[t] > CERTIFY_TOLERANCE {
            summaries[t].finished = true;
            continue;
        }
        if trees.stopped.is_some() || halt.load(Ordering::Relaxed) {
            continue;
        }
        let root_node = Node {
            splits: SplitState::free(problem.network),
            bounds: root.bounds.clone(),
            lower: root.lower[t],
            minimiser: root.minimisers[t].clone(),
            warm: root.warm[t].clone(),
        };
        let mut tree = TargetTree::new(problem, target, root_node);
        tree.consider(points);
        trees.searched.push(t);
        let mut finished = !tree.has_open_nodes();
        while !finished {
            if (tree.found.is_some() && !settings.optimality) || halt.load(Ordering::Relaxed) {
                break;
            }
            if past(settings.deadline) {
                trees.stopped = Some(UnresolvedReason::Deadline);
                break;
            }
            let used = 1 + trees.nodes + tree.nodes - 1;
            if used >= settings.node_limit {
                trees.stopped = Some(UnresolvedReason::NodeLimit);
                break;
            }
            match tree.step(settings.node_limit - used)? {
                Step::Finished => finished = true,
                Step::Stopped(reason) => {
                    trees.stopped = Some(reason);
                    break;
                }
                Step::Continue | Step::Found => {}
            }
        }
        trees.nodes += tree.nodes - 1;
        let summary = &mut summaries[t];
        summary.lower = tree.lower();
        summary.upper = tree.incumbent;
        summary.upper_point = tree.incumbent_point.clone();
        summary.finished = finished;
        summary.nodes = tree.nodes;
        summary.leaves = tree.leaves;
        if tree.undecided && finished && trees.undecided.is_none() {
            trees.undecided = Some(target);
        }
        if trees.found.is_none() {
            trees.found = tree.found.take();
        }
        if trees.found.is_some() && !settings.optimality {
            break;
        }
    }
    Ok(trees)
}

/// Lowers the achieved margins of the searched classes to those of `points` (plain forward passes;
/// what the trees would have recorded had they checked the points first).
fn note_points(
    network: &Network,
    label: usize,
    summaries: &mut [TargetSummary],
    searched: &[usize],
    points: &[Vec<f64>],
) {
    for point in points {
        let logits = network.forward(point);
        for &t in searched {
            let summary = &mut summaries[t];
            let margin = logits[label] - logits[summary.target];
            if margin < summary.upper {
                summary.upper = margin;
                summary.upper_point = Some(point.clone());
            }
        }
    }
}
