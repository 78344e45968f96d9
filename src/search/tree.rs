//! One branch-and-bound tree: the minimum of the margin `logit_label − logit_target` over the region,
//! explored best first (lowest bound first) over ReLU activation splits (Bunel et al., 2018 and 2020),
//! a batch of sub-domains per step.
//!
//! A node is a [`crate::bound::SplitState`] with the sound bounds of its sub-domain ([`Node`]).
//! [`TargetTree::step`] takes up to `batch_size` open nodes with the lowest bounds; nodes with no
//! unstable free unit are leaves, solved as LPs in parallel ([`super::leaf`]); the others are split on
//! their best-scored unit (or the best of a look-ahead, [`super::branching`]) and all their children
//! are bounded in one batch ([`super::bounding`]), reusing each parent's pre-activation bounds below
//! the split layer. A child's bound is raised to its parent's (which holds on the larger domain).
//! Every point the tree meets
//! (bound minimisers, short PGD runs from them, [`super::probe`], leaf LP minimisers) is checked by a
//! forward pass; a counterexample is reported only after [`crate::attack::validate`] accepts it.
//! In the decision mode the probe of a step runs beside the branching and bounding of its children
//! (`rayon::join`); both only read the tree and their results are applied in the sequential order, so
//! a step ends in the same state on any number of threads.
//!
//! Pruning: in the decision mode a node goes once its bound exceeds [`CERTIFY_TOLERANCE`]; in the
//! optimality mode once its bound reaches the best margin achieved so far (minus the optimality gap).
//! A step never leaves a taken node unaccounted for: it is split, closed with its bound, or put back
//! ([`super::frontier`]). The tree never decides anything from a bound it could not compute: the
//! runner turns a tree that is stopped early into `unresolved`.

use rayon::prelude::*;

use super::bounding::{Margins, Settings};
use super::branching::{children, Branching, Children};
use super::frontier::{Frontier, Node};
use super::leaf::{solve_leaf, LeafDomain, LeafSolution};
use super::piece::leaf_piece;
use super::probe::{descend, Descent};
use super::{SearchError, SearchSettings, UnresolvedReason};
use crate::attack::validate;
use crate::attack::Counterexample;
use crate::bound::CERTIFY_TOLERANCE;
use crate::engine::Engine;
use crate::model::Network;
use crate::threat::Region;

/// What a tree works on (shared by the trees of one sample).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Problem<'a> {
    /// Classifier-form network (≥ 2 logits).
    pub network: &'a Network,
    /// The engine of `network`.
    pub engine: &'a Engine,
    /// Ball ∩ input range.
    pub region: &'a Region,
    /// The sample's class.
    pub label: usize,
    /// Classes the answer must not move into (a counterexample into any of them ends a decision search).
    pub forbidden: &'a [usize],
    /// Settings.
    pub settings: &'a SearchSettings,
}

/// Result of one step.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Step {
    /// More nodes remain.
    Continue,
    /// Nothing left to do: every node is pruned or solved.
    Finished,
    /// A validated counterexample was found (decision mode stops here).
    Found,
    /// No open node could be processed within the node budget or the memory cap.
    Stopped(UnresolvedReason),
}

/// The search for one forbidden class.
#[derive(Debug)]
pub(crate) struct TargetTree<'a> {
    problem: Problem<'a>,
    /// The forbidden class.
    pub target: usize,
    frontier: Frontier,
    /// Smallest margin `logit_label − logit_target` seen at a region point.
    pub incumbent: f64,
    /// Where [`TargetTree::incumbent`] was reached.
    pub incumbent_point: Option<Vec<f64>>,
    /// A leaf whose bound could not be pushed above the tolerance and gave no counterexample.
    pub undecided: bool,
    /// Sub-domains bounded (the root and every child).
    pub nodes: usize,
    /// Leaves solved by LP.
    pub leaves: usize,
    /// The first validated counterexample.
    pub found: Option<Counterexample>,
}

impl<'a> TargetTree<'a> {
    /// A tree whose root is `root` (bounded by the caller).
    pub fn new(problem: Problem<'a>, target: usize, root: Node) -> TargetTree<'a> {
        let hidden = problem.network.hidden_sizes();
        let mut tree = TargetTree {
            problem,
            target,
            frontier: Frontier::new(&hidden, problem.region.dim()),
            incumbent: f64::INFINITY,
            incumbent_point: None,
            undecided: false,
            nodes: 1,
            leaves: 0,
            found: None,
        };
        if let Some(point) = root.minimiser.clone() {
            tree.consider(&[point]);
        }
        tree.admit(root);
        tree
    }

    /// Sound lower bound on the target's minimum margin over the whole region (so far).
    pub fn lower(&self) -> f64 {
        let mut value = self
            .frontier
            .closed_lower()
            .min(self.frontier.lowest_open());
        if self.problem.settings.optimality {
            value = value.min(self.incumbent);
        }
        value
    }

    /// True when nodes remain.
    pub fn has_open_nodes(&self) -> bool {
        !self.frontier.is_empty()
    }

    fn threshold(&self) -> f64 {
        if self.problem.settings.optimality {
            self.incumbent - self.problem.settings.optimality_gap
        } else {
            CERTIFY_TOLERANCE
        }
    }

    fn prunable(&self, lower: f64) -> bool {
        if self.problem.settings.optimality {
            lower >= self.threshold()
        } else {
            lower > CERTIFY_TOLERANCE
        }
    }

    /// Queues a bounded node or closes it.
    fn admit(&mut self, node: Node) {
        if self.prunable(node.lower) {
            self.frontier.close(node.lower);
        } else {
            self.frontier.push(node);
        }
    }

    /// Checks region points with one batched forward pass: updates the incumbent (from a plain forward
    /// pass) and records the first validated counterexample. Returns true when one was found now.
    pub fn consider(&mut self, points: &[Vec<f64>]) -> bool {
        let Problem {
            network,
            engine,
            region,
            label,
            forbidden,
            ..
        } = self.problem;
        let inside: Vec<&Vec<f64>> = points.iter().filter(|p| region.contains(p)).collect();
        if inside.is_empty() {
            return false;
        }
        let batch = nalgebra::DMatrix::from_fn(region.dim(), inside.len(), |i, j| inside[j][i]);
        let logits = engine.forward(&batch).pre.pop().expect("logits");
        let mut found_now = false;
        for (j, point) in inside.iter().enumerate() {
            let column = logits.column(j);
            if column[label] - column[self.target] < self.incumbent {
                let plain = network.forward(point);
                let margin = plain[label] - plain[self.target];
                if margin < self.incumbent {
                    self.incumbent = margin;
                    self.incumbent_point = Some(point.to_vec());
                }
            }
            let beaten = forbidden.iter().any(|&c| column[c] >= column[label]);
            if self.found.is_none() && beaten {
                if let Some(found) = validate(network, region, label, forbidden, point) {
                    self.found = Some(found);
                    found_now = true;
                }
            }
        }
        found_now
    }

    /// Short PGD runs from `starts` (no tree state changes): the points worth checking.
    fn descend_from(&self, starts: &[Vec<f64>]) -> Vec<Vec<f64>> {
        let settings = self.problem.settings;
        if settings.node_attack_steps == 0 || starts.is_empty() {
            return Vec::new();
        }
        // Optimality mode descends this target's margin; the decision mode any forbidden class.
        let single = [self.target];
        let classes = if settings.optimality {
            &single[..]
        } else {
            self.problem.forbidden
        };
        let descent = Descent {
            label: self.problem.label,
            classes,
            steps: settings.node_attack_steps,
            stop_at_flip: !settings.optimality,
        };
        descend(self.problem.engine, self.problem.region, descent, starts)
    }

    /// Short PGD runs from `starts`; true when they found a counterexample.
    fn probe(&mut self, starts: &[Vec<f64>]) -> bool {
        let points = self.descend_from(starts);
        self.consider(&points)
    }

    fn decided(&self) -> bool {
        self.found.is_some() && !self.problem.settings.optimality
    }

    /// Processes up to `batch_size` open nodes, bounding at most `children` new sub-domains.
    pub fn step(&mut self, children: usize) -> Result<Step, SearchError> {
        let settings = self.problem.settings;
        let capacity = settings.frontier_memory / self.frontier.node_bytes();
        let mut leaves = Vec::new();
        let mut parents = Vec::new();
        let mut reason = None;
        while leaves.len() + parents.len() < settings.batch_size.max(1) {
            let Some(node) = self.frontier.peek() else {
                break;
            };
            if self.prunable(node.lower) {
                let node = self.frontier.pop().expect("peeked");
                self.frontier.close(node.lower);
                continue;
            }
            if node.is_leaf() {
                leaves.push(self.frontier.pop().expect("peeked"));
                continue;
            }
            // Splitting one more node adds two children and removes the node.
            if 2 * (parents.len() + 1) > children {
                reason = Some(UnresolvedReason::NodeLimit);
                break;
            }
            if self.frontier.len() + 2 * parents.len() + 1 > capacity {
                reason = Some(UnresolvedReason::MemoryLimit);
                break;
            }
            parents.push(self.frontier.pop().expect("peeked"));
        }
        if leaves.is_empty() && parents.is_empty() {
            return Ok(match reason {
                Some(reason) => Step::Stopped(reason),
                None => self.after_step(),
            });
        }
        let starts: Vec<Vec<f64>> = leaves
            .iter()
            .chain(&parents)
            .filter_map(|n| n.minimiser.clone())
            .collect();
        // The decision mode's prune threshold never moves, so the children are bounded while the probe
        // runs (rayon::join: an idle core takes one side); the results are applied in the same order
        // as the sequential steps of the optimality mode, so the tree ends in the same state.
        let (points, children) = if settings.optimality {
            (self.descend_from(&starts), None)
        } else {
            let (points, children) = rayon::join(
                || self.descend_from(&starts),
                || self.bound_children(&parents),
            );
            (points, Some(children))
        };
        if self.consider(&points) && self.decided() {
            for node in leaves.into_iter().chain(parents) {
                self.frontier.push(node);
            }
            return Ok(Step::Found);
        }
        self.solve_leaves(leaves)?;
        if self.decided() {
            for node in parents {
                self.frontier.push(node);
            }
            return Ok(Step::Found);
        }
        let children = children.unwrap_or_else(|| self.bound_children(&parents));
        self.admit_children(&parents, children);
        if self.decided() {
            return Ok(Step::Found);
        }
        Ok(self.after_step())
    }

    /// Chooses the split unit of every parent and bounds both children of each (no tree state
    /// changes; the prune threshold is the current one).
    fn bound_children(&self, parents: &[Node]) -> Children {
        let targets = [self.target];
        let margin = Margins {
            label: self.problem.label,
            targets: &targets,
        };
        let settings = Settings::of(self.problem.settings, self.threshold());
        let branching = Branching {
            engine: self.problem.engine,
            region: self.problem.region,
            margin,
            candidates: self.problem.settings.branching_candidates,
        };
        children(branching, &settings, parents)
    }

    /// Admits the bounded children of `parents` (two per parent, in order) and checks their minimisers.
    fn admit_children(&mut self, parents: &[Node], children: Children) {
        self.nodes += children.bounded.len();
        let mut points = Vec::new();
        for ((split, b), c) in children.splits.into_iter().zip(children.bounded).zip(0..) {
            let parent = &parents[c / 2];
            if b.empty {
                continue; // no input reaches this sub-domain
            }
            let [lower] = b.lower[..] else {
                unreachable!("one target per tree")
            };
            let minimiser = b.minimisers.into_iter().next().flatten();
            points.extend(minimiser.clone());
            self.admit(Node {
                splits: split,
                bounds: b.bounds,
                lower: lower.max(parent.lower),
                minimiser,
                warm: b.warm.into_iter().next().flatten(),
            });
        }
        self.consider(&points);
    }

    /// Solves the leaves' LPs in parallel, then closes them in order.
    fn solve_leaves(&mut self, leaves: Vec<Node>) -> Result<(), SearchError> {
        if leaves.is_empty() {
            return Ok(());
        }
        let Problem {
            network,
            engine,
            region,
            label,
            settings,
            ..
        } = self.problem;
        let threshold = self.threshold();
        let target = self.target;
        let solutions: Vec<Result<LeafSolution, SearchError>> = leaves
            .par_iter()
            .map(|node| {
                let piece = leaf_piece(network, &node.splits, &node.bounds, label, target)
                    .ok_or_else(|| {
                        SearchError::Internal("a leaf without a fixed pattern".into())
                    })?;
                let leaf = LeafDomain {
                    engine,
                    splits: &node.splits,
                    bounds: &node.bounds,
                    label,
                    target,
                };
                solve_leaf(&leaf, region, &piece, threshold)
            })
            .collect();
        let mut open = Vec::new();
        for (node, solution) in leaves.iter().zip(solutions) {
            let solution = solution?;
            self.leaves += 1;
            let lower = solution.lower.max(node.lower);
            self.frontier.close(lower);
            if let Some(point) = solution.point {
                let found = self.consider(std::slice::from_ref(&point));
                if !found && !settings.optimality && lower <= CERTIFY_TOLERANCE {
                    open.push(point);
                }
            }
            if lower <= CERTIFY_TOLERANCE && self.found.is_none() {
                self.undecided = true;
            }
        }
        if !open.is_empty() && self.found.is_none() {
            self.probe(&open);
        }
        Ok(())
    }

    fn after_step(&mut self) -> Step {
        if self.problem.settings.optimality && self.frontier.lowest_open() >= self.threshold() {
            // Everything left is at least the incumbent (minus the gap): done.
            self.frontier.close_all();
        }
        if self.frontier.is_empty() {
            Step::Finished
        } else {
            Step::Continue
        }
    }
}

#[cfg(test)]
#[path = "tree_tests.rs"]
mod tests;
