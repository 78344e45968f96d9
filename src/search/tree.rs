//! One branch-and-bound tree: the minimum of the margin `logit_label − logit_target` over the region,
//! explored best first (lowest bound first) over ReLU activation splits (Bunel et al., 2018 and 2020).
//!
//! A node is a [`SplitState`] with the sound bounds of its sub-domain: the margin lower bound from
//! [`crate::bound::margin_lower_bounds`] under the node's splits (never below its parent's, which holds on
//! the larger domain) and the pre-activation bounds (the tighter of the node's and its parent's).
//! [`TargetTree::step`] takes the node with the lowest bound and either solves it as a leaf (no unstable
//! free unit left: an LP, [`super::leaf`]) or splits the best-scored unit ([`super::branching`]) into an
//! active and an inactive child. Every point the tree meets (linear-bound minimisers, short PGD runs from
//! them, leaf LP minimisers) is checked by a plain forward pass; points that change the answer into a
//! forbidden class are reported only after [`crate::attack::validate`] accepts them.
//!
//! Pruning: in the decision mode a node goes once its bound exceeds [`CERTIFY_TOLERANCE`]; in the
//! optimality mode once its bound reaches the best margin achieved so far (minus the optimality gap).
//! The tree never decides anything from a bound it could not compute: the runner turns a tree that is
//! stopped early into `unresolved`.

use std::cmp::Ordering;
use std::collections::BinaryHeap;

use super::branching::{ranked_units, Unit};
use super::leaf::{leaf_piece, solve_leaf};
use super::{SearchError, SearchSettings};
use crate::attack::{
    attack_sample, validate, AttackOutcome, AttackSettings, Counterexample, SearchPrecision,
};
use crate::bound::{
    margin_lower_bounds, Domain, LayerBounds, ReluSplit, SplitState, CERTIFY_TOLERANCE,
};
use crate::model::Network;
use crate::threat::Region;

/// Relative slack under which crossed pre-activation bounds count as rounding, not an empty domain.
const CROSSED_SLACK: f64 = 1e-9;

/// What a tree works on (shared by the trees of one sample).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Problem<'a> {
    /// Classifier-form network (≥ 2 logits).
    pub network: &'a Network,
    /// Ball ∩ input range.
    pub region: &'a Region,
    /// The sample's class.
    pub label: usize,
    /// Classes the answer must not move into (a counterexample into any of them ends a decision search).
    pub forbidden: &'a [usize],
    /// Settings.
    pub settings: &'a SearchSettings,
    /// Seed of this sample's attacks.
    pub seed: u64,
}

/// A sub-domain waiting to be processed.
#[derive(Debug, Clone)]
pub(crate) struct Node {
    /// The split constraints.
    pub splits: SplitState,
    /// Sound pre-activation bounds on the sub-domain.
    pub bounds: Vec<LayerBounds>,
    /// Sound margin lower bound on the sub-domain.
    pub lower: f64,
    /// Region point minimising the node's linear bound (a promising start for the attack).
    pub minimiser: Option<Vec<f64>>,
}

impl PartialEq for Node {
    fn eq(&self, other: &Self) -> bool {
        self.lower.total_cmp(&other.lower) == Ordering::Equal
    }
}
impl Eq for Node {}
impl PartialOrd for Node {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}
impl Ord for Node {
    /// Reversed, so the max-heap pops the lowest bound first.
    fn cmp(&self, other: &Self) -> Ordering {
        other.lower.total_cmp(&self.lower)
    }
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
}

/// The search for one forbidden class.
#[derive(Debug)]
pub(crate) struct TargetTree<'a> {
    problem: Problem<'a>,
    /// The forbidden class.
    pub target: usize,
    queue: BinaryHeap<Node>,
    /// Smallest margin `logit_label − logit_target` seen at a region point, and the point.
    pub incumbent: f64,
    /// Where [`TargetTree::incumbent`] was reached.
    pub incumbent_point: Option<Vec<f64>>,
    /// Smallest sound bound of the closed (pruned or solved) sub-domains.
    closed_lower: f64,
    /// A leaf whose bound could not be pushed above the tolerance and gave no counterexample.
    pub undecided: bool,
    /// Sub-domains bounded (children and leaves).
    pub nodes: usize,
    /// Leaves solved by LP.
    pub leaves: usize,
    /// The first validated counterexample.
    pub found: Option<Counterexample>,
}

impl<'a> TargetTree<'a> {
    /// A tree whose root is `root` (bounded by the caller).
    pub fn new(problem: Problem<'a>, target: usize, root: Node) -> TargetTree<'a> {
        let mut tree = TargetTree {
            problem,
            target,
            queue: BinaryHeap::new(),
            incumbent: f64::INFINITY,
            incumbent_point: None,
            closed_lower: f64::INFINITY,
            undecided: false,
            nodes: 1,
            leaves: 0,
            found: None,
        };
        if let Some(point) = root.minimiser.clone() {
            tree.consider(&point);
        }
        tree.admit(root);
        tree
    }

    /// Sound lower bound on the target's minimum margin over the whole region (so far).
    pub fn lower(&self) -> f64 {
        let open = self.queue.peek().map_or(f64::INFINITY, |n| n.lower);
        let mut value = self.closed_lower.min(open);
        if self.problem.settings.optimality {
            value = value.min(self.incumbent);
        }
        value
    }

    /// True when nodes remain.
    pub fn has_open_nodes(&self) -> bool {
        !self.queue.is_empty()
    }

    fn prunable(&self, lower: f64) -> bool {
        if self.problem.settings.optimality {
            lower >= self.incumbent - self.problem.settings.optimality_gap
        } else {
            lower > CERTIFY_TOLERANCE
        }
    }

    /// Queues a bounded node or closes it.
    fn admit(&mut self, node: Node) {
        if self.prunable(node.lower) {
            self.closed_lower = self.closed_lower.min(node.lower);
        } else {
            self.queue.push(node);
        }
    }

    /// Checks a region point: updates the incumbent and records a validated counterexample.
    /// Returns true when the point is a counterexample.
    pub fn consider(&mut self, point: &[f64]) -> bool {
        let Problem {
            network,
            region,
            label,
            forbidden,
            ..
        } = self.problem;
        if !region.contains(point) {
            return false;
        }
        let logits = network.forward(point);
        let margin = logits[label] - logits[self.target];
        if margin < self.incumbent {
            self.incumbent = margin;
            self.incumbent_point = Some(point.to_vec());
        }
        if self.found.is_none() {
            if let Some(found) = validate(network, region, label, forbidden, point) {
                self.found = Some(found);
                return true;
            }
        }
        false
    }

    /// A short PGD run from `start`; true when it found a counterexample.
    fn attack_from(&mut self, start: &[f64]) -> Result<bool, SearchError> {
        let settings = self.problem.settings;
        if settings.node_attack_steps == 0 {
            return Ok(false);
        }
        let attack = AttackSettings {
            steps: settings.node_attack_steps,
            restarts: 0,
            step_fraction: 0.25,
            patience: 5,
            seed: self.problem.seed,
            deadline: settings.deadline,
            fgsm_first: false,
            targeted: false,
            stop_at_first: true,
            precision: SearchPrecision::Double,
        };
        // Optimality mode descends this target's margin; the decision mode any forbidden class.
        let single = [self.target];
        let forbidden = if settings.optimality {
            &single[..]
        } else {
            self.problem.forbidden
        };
        let seed = self.problem.seed ^ (self.nodes as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15);
        let outcome = attack_sample(
            self.problem.network,
            self.problem.region,
            self.problem.label,
            forbidden,
            &attack,
            seed,
            &[start.to_vec()],
        )?;
        Ok(match outcome {
            AttackOutcome::Found(found) => self.consider(&found.input),
            AttackOutcome::NotFound { best_input, .. } => self.consider(&best_input),
        })
    }

    /// Bounds the child of `parent` with `unit` constrained to `split`; `None` when it is empty.
    fn child(
        &mut self,
        parent: &Node,
        (layer, unit): Unit,
        split: ReluSplit,
    ) -> Result<Option<Node>, SearchError> {
        let problem = self.problem;
        let splits = parent.splits.with(layer, unit, split);
        self.nodes += 1;
        let bounds = margin_lower_bounds(
            problem.network,
            problem.region,
            problem.label,
            &[self.target],
            problem.settings.bound_method,
            Some(&splits),
        )?;
        if let Domain::Empty { .. } = bounds.domain {
            return Ok(None);
        }
        let mut layers = Vec::with_capacity(parent.bounds.len());
        for (mine, theirs) in bounds.pre_activation.iter().zip(&parent.bounds) {
            let tight = mine.tightest(theirs);
            for i in 0..tight.len() {
                let (l, u) = (tight.lower[i], tight.upper[i]);
                if l > u + CROSSED_SLACK * (1.0 + l.abs() + u.abs()) {
                    return Ok(None); // two sound bounds disagree: no input reaches this domain
                }
            }
            layers.push(tight);
        }
        if layers.len() != parent.bounds.len() {
            return Err(SearchError::Internal(
                "bound module returned the wrong number of hidden layers".into(),
            ));
        }
        Ok(Some(Node {
            splits,
            bounds: layers,
            lower: bounds.lower[0].max(parent.lower),
            minimiser: bounds.minimisers[0].clone(),
        }))
    }

    /// Processes the node with the lowest bound.
    pub fn step(&mut self) -> Result<Step, SearchError> {
        let Some(node) = self.queue.pop() else {
            return Ok(Step::Finished);
        };
        if self.prunable(node.lower) {
            // the incumbent improved since the node was queued
            self.closed_lower = self.closed_lower.min(node.lower);
            return Ok(self.after_step());
        }
        if let Some(start) = node.minimiser.clone() {
            if self.attack_from(&start)? && !self.problem.settings.optimality {
                return Ok(Step::Found);
            }
        }
        let problem = self.problem;
        let ranked = ranked_units(
            problem.network,
            &node.bounds,
            &node.splits,
            problem.label,
            self.target,
        );
        if ranked.is_empty() {
            return self.solve_leaf(node);
        }
        let candidates = problem
            .settings
            .branching_candidates
            .max(1)
            .min(ranked.len());
        let mut best: Option<(f64, Vec<Node>)> = None;
        for (unit, _) in ranked.iter().take(candidates) {
            let mut children = Vec::with_capacity(2);
            for split in [ReluSplit::Active, ReluSplit::Inactive] {
                if let Some(child) = self.child(&node, *unit, split)? {
                    children.push(child);
                }
            }
            let worst = children
                .iter()
                .map(|c| c.lower)
                .fold(f64::INFINITY, f64::min);
            if best.as_ref().is_none_or(|(value, _)| worst > *value) {
                best = Some((worst, children));
            }
        }
        let children = best.map(|(_, c)| c).unwrap_or_default();
        for child in children {
            if let Some(point) = child.minimiser.clone() {
                if self.consider(&point) && !problem.settings.optimality {
                    return Ok(Step::Found);
                }
            }
            self.admit(child);
        }
        Ok(self.after_step())
    }

    fn solve_leaf(&mut self, node: Node) -> Result<Step, SearchError> {
        let problem = self.problem;
        let Some(piece) = leaf_piece(
            problem.network,
            &node.splits,
            &node.bounds,
            problem.label,
            self.target,
        ) else {
            return Err(SearchError::Internal(
                "a node without unstable units has no fixed pattern".into(),
            ));
        };
        self.leaves += 1;
        let threshold = if problem.settings.optimality {
            self.incumbent - problem.settings.optimality_gap
        } else {
            CERTIFY_TOLERANCE
        };
        let solution = solve_leaf(problem.region, &piece, threshold)?;
        let lower = solution.lower.max(node.lower);
        self.closed_lower = self.closed_lower.min(lower);
        let mut found = false;
        if let Some(point) = solution.point {
            found = self.consider(&point);
            if !found && !problem.settings.optimality && lower <= CERTIFY_TOLERANCE {
                found = self.attack_from(&point)?;
            }
        }
        if found && !problem.settings.optimality {
            return Ok(Step::Found);
        }
        if lower <= CERTIFY_TOLERANCE && self.found.is_none() {
            self.undecided = true;
        }
        Ok(self.after_step())
    }

    fn after_step(&mut self) -> Step {
        if self.problem.settings.optimality {
            // Everything left is at least the incumbent (minus the gap): done.
            let threshold = self.incumbent - self.problem.settings.optimality_gap;
            if self.queue.peek().is_some_and(|n| n.lower >= threshold) {
                while let Some(n) = self.queue.pop() {
                    self.closed_lower = self.closed_lower.min(n.lower);
                }
            }
        }
        if self.queue.is_empty() {
            Step::Finished
        } else {
            Step::Continue
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Dense;
    use crate::search::leaf::affine_piece;
    use crate::search::solver::{minimise, LinearProgram, LpOutcome, Row};
    use crate::threat::{Budget, Norm};
    use nalgebra::{DMatrix, DVector};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_network(rng: &mut ChaCha8Rng, sizes: &[usize]) -> Network {
        Network::new(
            sizes
                .windows(2)
                .map(|w| Dense {
                    weights: DMatrix::from_fn(w[1], w[0], |_, _| rng.gen_range(-1.0..1.0)),
                    bias: DVector::from_fn(w[1], |_, _| rng.gen_range(-0.3..0.3)),
                })
                .collect(),
        )
    }

    /// Brute force: for every full activation pattern, the exact LP minimum of the margin over the
    /// region points with that pattern (`None` when no point has it). Every unit gets its half-space.
    fn pattern_minima(
        network: &Network,
        region: &Region,
        label: usize,
        target: usize,
    ) -> Vec<(Vec<Vec<bool>>, Option<f64>)> {
        let sizes = network.hidden_sizes();
        let total: usize = sizes.iter().sum();
        assert!(total <= 10);
        (0..1usize << total)
            .map(|bits| {
                let mut pattern = Vec::new();
                let mut position = 0;
                for size in &sizes {
                    pattern.push(
                        (0..*size)
                            .map(|i| bits >> (position + i) & 1 == 1)
                            .collect(),
                    );
                    position += size;
                }
                let piece = affine_piece(network, &pattern, &|_, _| true, label, target);
                let mut program = LinearProgram::default();
                for i in 0..region.dim() {
                    program.add_variable(
                        piece.gradient[i],
                        region.outer_lower[i],
                        region.outer_upper[i],
                    );
                }
                for (row, t) in piece.rows.iter().zip(&piece.right_hand_sides) {
                    program.rows.push(Row {
                        coefficients: row.iter().copied().enumerate().collect(),
                        lower: *t,
                        upper: f64::INFINITY,
                    });
                }
                let value = match minimise(&program, None).unwrap() {
                    LpOutcome::Optimal { value, .. } => Some(value + piece.constant),
                    _ => None,
                };
                (pattern, value)
            })
            .collect()
    }

    fn consistent(splits: &SplitState, pattern: &[Vec<bool>]) -> bool {
        splits.layers.iter().zip(pattern).all(|(s, p)| {
            s.iter().zip(p).all(|(s, p)| match s {
                ReluSplit::Free => true,
                ReluSplit::Active => *p,
                ReluSplit::Inactive => !*p,
            })
        })
    }

    fn exact_over(minima: &[(Vec<Vec<bool>>, Option<f64>)], splits: &SplitState) -> f64 {
        minima
            .iter()
            .filter(|(p, _)| consistent(splits, p))
            .filter_map(|(_, v)| *v)
            .fold(f64::INFINITY, f64::min)
    }

    /// Every node bound is ≤ the brute-force minimum over its sub-domain, and the optimality mode ends at
    /// the brute-force minimum over all patterns.
    #[test]
    fn node_bounds_and_optimum_against_pattern_enumeration() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        for case in 0..6 {
            let sizes: &[usize] = if case % 2 == 0 {
                &[3, 6, 3]
            } else {
                &[2, 4, 4, 3]
            };
            let network = random_network(&mut rng, sizes);
            let dim = sizes[0];
            let center: Vec<f64> = (0..dim).map(|_| rng.gen_range(0.3..0.7)).collect();
            let region = Budget::uniform(Norm::Linf, 0.4, dim).region(
                &center,
                &vec![0.0; dim],
                &vec![1.0; dim],
            );
            let label = crate::model::predicted_class(network.forward(&center).as_slice());
            let target = (label + 1) % 3;
            let minima = pattern_minima(&network, &region, label, target);
            let exact = exact_over(&minima, &SplitState::free(&network));
            let settings = SearchSettings {
                optimality: true,
                ..SearchSettings::default()
            };
            let forbidden = [target];
            let problem = Problem {
                network: &network,
                region: &region,
                label,
                forbidden: &forbidden,
                settings: &settings,
                seed: 0,
            };
            let root = margin_lower_bounds(
                &network,
                &region,
                label,
                &forbidden,
                settings.bound_method,
                None,
            )
            .unwrap();
            assert!(root.lower[0] <= exact + 1e-9);
            let mut tree = TargetTree::new(
                problem,
                target,
                Node {
                    splits: SplitState::free(&network),
                    bounds: root.pre_activation.clone(),
                    lower: root.lower[0],
                    minimiser: root.minimisers[0].clone(),
                },
            );
            let mut steps = 0;
            while tree.has_open_nodes() {
                for node in tree.queue.iter() {
                    let truth = exact_over(&minima, &node.splits);
                    assert!(
                        node.lower <= truth + 1e-7,
                        "case {case}: node bound above its minimum"
                    );
                }
                if tree.step().unwrap() == Step::Finished {
                    break;
                }
                steps += 1;
                assert!(steps < 10_000);
            }
            assert!(
                (tree.incumbent - exact).abs() < 1e-6,
                "case {case}: {} vs {exact}",
                tree.incumbent
            );
            assert!(tree.lower() <= exact + 1e-9);
            // Random partial split states: the bound module's bound under splits is below the minimum.
            for _ in 0..20 {
                let mut splits = SplitState::free(&network);
                for layer in splits.layers.iter_mut() {
                    for s in layer.iter_mut() {
                        *s = match rng.gen_range(0..3) {
                            0 => ReluSplit::Active,
                            1 => ReluSplit::Inactive,
                            _ => ReluSplit::Free,
                        };
                    }
                }
                let truth = exact_over(&minima, &splits);
                let bound = margin_lower_bounds(
                    &network,
                    &region,
                    label,
                    &forbidden,
                    settings.bound_method,
                    Some(&splits),
                )
                .unwrap();
                if let Domain::Feasible = bound.domain {
                    assert!(bound.lower[0] <= truth + 1e-7);
                } else {
                    assert!(
                        truth.is_infinite(),
                        "an emptied domain must hold no pattern"
                    );
                }
            }
        }
    }
}
